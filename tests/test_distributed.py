"""Data-parallel training on CPU: two gloo ranks against one process.

The ranks run in subprocesses (``torchrun``, and plain processes given the variables
torchrun sets, for the kill test); the reference runs in this process. DDP averages the
ranks' gradients; with each rank's share of a batch, the average is the whole batch's
gradient, so the weights must agree with one process to float32 rounding.
"""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import torch
from synthbank import small_bank, small_settings

from pipeline.dataset import EpochSampler, clip_noise
from pipeline.distributed import ranks_from_env
from pipeline.errors import TrainingError
from pipeline.modelfile import load_model_file
from pipeline.train import train_model

TESTS = Path(__file__).resolve().parent
ROOT = TESTS.parent

WORKER = """
import sys
sys.path[:0] = [{tests!r}, {root!r}]
from synthbank import small_settings
from pipeline.errors import ShotsmithError
from pipeline.train import train_model
try:
    s = train_model({bank!r}, {model!r}, small_settings(epochs={epochs}, batch_size={batch}),
                    device="cpu", threads=1)
except ShotsmithError as exc:
    print(f"error: {{exc}}", file=sys.stderr)
    sys.exit(1)
print("world", s.world_size, "rank", s.rank, "epochs", s.epochs, s.stopped, flush=True)
sys.exit(130 if s.stopped == "interrupted" else 0)
"""


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def worker(tmp: Path, bank: Path, model: Path, *, epochs: int, batch: int) -> Path:
    script = tmp / "worker.py"
    script.write_text(WORKER.format(tests=str(TESTS), root=str(ROOT), bank=str(bank),
                                    model=str(model), epochs=epochs, batch=batch))
    return script


def launch(script: Path, world: int = 2) -> list[subprocess.Popen]:
    """The ranks as plain processes, with the variables torchrun would set."""
    port = str(free_port())
    return [subprocess.Popen(
        [sys.executable, str(script)], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
        text=True, env=env(RANK=str(r), WORLD_SIZE=str(world), LOCAL_RANK=str(r),
                           LOCAL_WORLD_SIZE=str(world), MASTER_ADDR="127.0.0.1",
                           MASTER_PORT=port))
        for r in range(world)]


def wait_for(path: Path, proc: subprocess.Popen, seconds: float = 300) -> None:
    deadline = time.monotonic() + seconds
    while not path.exists():
        assert time.monotonic() < deadline, f"no {path.name} after {seconds} s"
        assert proc.poll() is None, proc.communicate()[1]
        time.sleep(0.02)


def env(**extra: str) -> dict[str, str]:
    e = {**os.environ, "OMP_WAIT_POLICY": "PASSIVE", "PYTHONPATH": str(ROOT), **extra}
    for key in ("RANK", "WORLD_SIZE", "LOCAL_RANK", "LOCAL_WORLD_SIZE"):
        if key not in extra:
            e.pop(key, None)
    return e


# ---------------------------------------------------------------- pure parts


def test_ranks_share_every_batch_exactly():
    # one process's k-th batch of 6 is the union of two ranks' k-th batches of 3,
    # from any start (a resume with another number of ranks)
    for start in (0, 6, 12):
        one = EpochSampler(40, seed=2)
        one.set_epoch(5, start=start)
        order = list(one)
        shares = []
        for rank in (0, 1):
            s = EpochSampler(40, seed=2, rank=rank, world=2)
            s.set_epoch(5, start=start)
            shares.append(list(s))
            assert len(s) == len(shares[-1])
        assert sorted(shares[0] + shares[1]) == sorted(order)
        for k in range(0, len(order), 6):
            got = shares[0][k // 2 : k // 2 + 3] + shares[1][k // 2 : k // 2 + 3]
            assert sorted(got) == sorted(order[k : k + 6])


def test_clip_noise_is_keyed_by_seed_epoch_and_row():
    a = clip_noise(0, 3, np.array([5, 9, 11]), 7)
    assert a.shape == (3, 7) and a.dtype == np.float32
    np.testing.assert_array_equal(clip_noise(0, 3, np.array([11, 5]), 7), a[[2, 0]])
    assert not np.allclose(clip_noise(0, 4, np.array([5]), 7), a[:1])
    assert not np.allclose(clip_noise(1, 3, np.array([5]), 7), a[:1])
    # standard normal: moments and the normal's quantiles (scipy.stats.norm, from memory:
    # 0.8413 below +1 sigma)
    z = clip_noise(7, 0, np.arange(20000), 16).ravel()
    assert abs(z.mean()) < 0.01 and abs(z.std() - 1) < 0.01
    assert abs(np.mean(z < 1.0) - 0.8413) < 0.005
    # neighbouring rows are not correlated
    m = clip_noise(7, 0, np.arange(4000), 2)
    assert abs(np.corrcoef(m[:-1, 0], m[1:, 0])[0, 1]) < 0.05


def test_ranks_come_from_torchrun_variables():
    r = ranks_from_env({"RANK": "1", "WORLD_SIZE": "3", "LOCAL_RANK": "1"})
    assert (r.rank, r.world, r.local_rank, r.active, r.main) == (1, 3, 1, True, False)
    assert not ranks_from_env({}).active
    with pytest.raises(TrainingError, match="RANK=3 does not fit WORLD_SIZE=2"):
        ranks_from_env({"RANK": "3", "WORLD_SIZE": "2"})


# ------------------------------------------------------------------- two ranks


@pytest.fixture(scope="module")
def bank(tmp_path_factory) -> Path:
    return small_bank(tmp_path_factory.mktemp("ddp") / "bank", n=48)  # 42 training clips


@pytest.mark.slow
def test_two_gloo_ranks_equal_one_process(bank, tmp_path):
    batch, epochs = 14, 2  # 42 training clips: three whole batches per epoch
    one = tmp_path / "one" / "m.pt"
    one.parent.mkdir()
    train_model(bank, one, small_settings(epochs=epochs, batch_size=batch), device="cpu")
    two = tmp_path / "two" / "m.pt"
    two.parent.mkdir()
    script = worker(tmp_path, bank, two, epochs=epochs, batch=batch)
    out = subprocess.run(
        [sys.executable, "-m", "torch.distributed.run", "--nproc-per-node", "2",
         "--master-port", str(free_port()), str(script)],
        env=env(), capture_output=True, text=True, timeout=600)
    assert out.returncode == 0, out.stderr[-3000:]
    assert "world 2 rank 0 epochs 2" in out.stdout and "world 2 rank 1 epochs 2" in out.stdout
    assert sorted(p.name for p in two.parent.iterdir()) == ["m.pt"]  # rank 0 alone wrote
    a, b = load_model_file(one), load_model_file(two)
    sa, sb = a.model.state_dict(), b.model.state_dict()
    assert sa.keys() == sb.keys()
    for k in sa:
        torch.testing.assert_close(sb[k], sa[k], atol=1e-5, rtol=0, msg=k)
    np.testing.assert_allclose(b.mu, a.mu, atol=1e-4)
    for ha, hb in zip(a.history, b.history, strict=True):
        assert hb["val_loss"] == pytest.approx(ha["val_loss"], rel=1e-5)
        assert hb["train_loss"] == pytest.approx(ha["train_loss"], rel=1e-5)


@pytest.mark.slow
def test_a_killed_rank_stops_the_other_and_keeps_the_last_model(bank, tmp_path):
    model = tmp_path / "m.pt"
    procs = launch(worker(tmp_path, bank, model, epochs=400, batch=6))
    try:
        wait_for(model, procs[0])
        procs[1].send_signal(signal.SIGKILL)
        _, err = procs[0].communicate(timeout=300)
    finally:
        for p in procs:
            if p.poll() is None:
                p.kill()
    assert procs[0].returncode == 1, err
    lines = [ln for ln in err.splitlines() if ln.startswith("error:")]
    assert len(lines) == 1, err
    assert "another training process stopped" in lines[0] and str(model) in lines[0]
    assert "is kept" in lines[0]
    m = load_model_file(model)  # the last complete model file
    assert m.best["epoch"] >= 1 and np.isfinite(m.mu).all()


@pytest.fixture(scope="module")
def uneven_bank(tmp_path_factory) -> Path:
    return small_bank(tmp_path_factory.mktemp("ddp") / "bank", n=52)  # 43 training clips


@pytest.mark.slow
def test_interrupted_two_ranks_resume_in_one_process(uneven_bank, tmp_path):
    # 43 clips in batches of 6: each epoch ends on a batch of 1, where rank 1 has no clip
    # and steps on a stand-in that counts for nothing. Ctrl-C on rank 0 stops both at the
    # same batch; one process resumes the checkpoint and must land where one process
    # running throughout lands.
    batch, epochs = 6, 8
    ref = tmp_path / "ref.pt"
    train_model(uneven_bank, ref, small_settings(epochs=epochs, batch_size=batch), device="cpu")
    model = tmp_path / "m.pt"
    procs = launch(worker(tmp_path, uneven_bank, model, epochs=epochs, batch=batch))
    try:
        wait_for(model, procs[0])
        procs[0].send_signal(signal.SIGINT)
        outs = [p.communicate(timeout=300) for p in procs]
    finally:
        for p in procs:
            if p.poll() is None:
                p.kill()
    assert [p.returncode for p in procs] == [130, 130], [o[1][-2000:] for o in outs]
    assert "interrupted" in outs[0][0] and "interrupted" in outs[1][0]
    assert sorted(p.name for p in tmp_path.iterdir() if p.name.startswith("m.pt")) == [
        "m.pt", "m.pt.ckpt"]
    s = train_model(uneven_bank, model, small_settings(epochs=epochs, batch_size=batch),
                    device="cpu", resume=True)
    assert s.stopped == "max epochs" and s.world_size == 1
    a, b = load_model_file(ref), load_model_file(model)
    assert a.best["epoch"] == b.best["epoch"]
    for k, v in a.model.state_dict().items():
        torch.testing.assert_close(b.model.state_dict()[k], v, atol=1e-5, rtol=0, msg=k)
