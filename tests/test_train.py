"""Training: split, schedule, determinism, interruption, resume, failure, quality."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import threading
from pathlib import Path

import numpy as np
import pytest
import torch
from synthbank import (
    SMALL_AUDIO,
    make_bank,
    param_spectra,
    small_settings,
    write_spectra_bank,
)

import pipeline.train as train_mod
from pipeline.config import load_settings
from pipeline.dataset import EpochSampler, SpectraDataset, split_indices
from pipeline.errors import OutputError, TrainingError
from pipeline.modelfile import load_model_file, read_archive
from pipeline.train import checkpoint_path, kl_weight_at, lr_at, train_model

TESTS = Path(__file__).resolve().parent


@pytest.fixture(scope="module")
def bank(small_banks) -> Path:
    return small_banks(48)


def weights(path: Path) -> dict[str, torch.Tensor]:
    return torch.load(path, weights_only=True)["state_dict"]


def same_weights(a: dict, b: dict) -> bool:
    return a.keys() == b.keys() and all(torch.equal(a[k], b[k]) for k in a)


# ------------------------------------------------------------------ pure functions


def test_split_is_stratified_deterministic_and_disjoint():
    cats = ["kick"] * 40 + ["hat"] * 20 + [None] * 10 + ["solo"]
    train, val = split_indices(cats, val_fraction=0.25, seed=3)
    assert np.intersect1d(train, val).size == 0
    assert np.array_equal(np.union1d(train, val), np.arange(len(cats)))
    held = [cats[i] for i in val]
    assert held.count("kick") == 10 and held.count("hat") == 5 and held.count(None) == 2
    assert "solo" not in held  # a single clip stays in training
    again = split_indices(cats, val_fraction=0.25, seed=3)
    assert np.array_equal(again[1], val)
    assert not np.array_equal(split_indices(cats, val_fraction=0.25, seed=4)[1], val)


def test_split_holds_out_one_clip_of_a_small_bank_and_none_at_fraction_zero():
    train, val = split_indices(["a", "b", "c"], val_fraction=0.15, seed=0)
    assert len(val) == 1 and len(train) == 2
    train, val = split_indices(["a"] * 10, val_fraction=0.0, seed=0)
    assert len(val) == 0 and len(train) == 10


def test_lr_schedule_warms_up_then_follows_a_cosine():
    kw = {"learning_rate": 1e-3, "warmup_epochs": 5, "epochs": 45, "min_lr_ratio": 0.1}
    assert lr_at(0, **kw) == pytest.approx(1e-4)
    assert lr_at(2.5, **kw) == pytest.approx(5.5e-4)
    assert lr_at(5, **kw) == pytest.approx(1e-3)
    # cosine annealing (Loshchilov & Hutter 2017): halfway down at the midpoint
    assert lr_at(25, **kw) == pytest.approx(1e-4 + 0.5 * 9e-4)
    assert lr_at(45, **kw) == pytest.approx(1e-4)
    assert lr_at(60, **kw) == pytest.approx(1e-4)
    after = [lr_at(e, **kw) for e in np.linspace(5, 45, 81)]
    assert all(b <= a for a, b in zip(after, after[1:]))


def test_kl_warmup_rises_from_zero_to_beta():
    # Bowman et al. 2016: weight 0 at the start, non-decreasing, beta after warm-up
    beta, warm = 0.7, 10
    w = [kl_weight_at(e, beta=beta, warmup_epochs=warm) for e in np.linspace(0, 30, 301)]
    assert w[0] == 0.0
    assert all(b >= a for a, b in zip(w, w[1:]))
    assert kl_weight_at(warm, beta=beta, warmup_epochs=warm) == beta
    assert kl_weight_at(25.5, beta=beta, warmup_epochs=warm) == beta
    assert kl_weight_at(5, beta=beta, warmup_epochs=warm) == pytest.approx(beta / 2)
    assert kl_weight_at(0, beta=beta, warmup_epochs=0) == beta


def test_epoch_sampler_order_depends_only_on_seed_and_epoch():
    s = EpochSampler(50, seed=1)
    s.set_epoch(3)
    order = list(s)
    assert sorted(order) == list(range(50))
    t = EpochSampler(50, seed=1)
    t.set_epoch(3, start=20)
    assert list(t) == order[20:] and len(t) == 30
    s.set_epoch(4)
    assert list(s) != order


def test_dataset_reads_float16_rows_as_float32(tmp_path):
    spectra = np.random.default_rng(0).random((5, 3, 4)).astype(np.float16)
    ds = SpectraDataset(spectra, np.array([4, 1]))
    batch, rows = ds.__getitems__([1, 0])
    assert rows.tolist() == [1, 4]
    assert batch.dtype == torch.float32 and batch.shape == (2, 3, 4)
    np.testing.assert_array_equal(batch.numpy(), spectra[[1, 4]].astype(np.float32))


# ----------------------------------------------------------------------- training


def test_loss_falls_on_a_small_synthesized_bank(tmp_path):
    audio = small_settings().audio
    path = make_bank(tmp_path / "bank", audio, per_family=8)
    events: list[dict] = []
    settings = small_settings(epochs=12, beta=0.2, batch_size=8)
    s = train_model(path, tmp_path / "m.pt", settings, progress=events.append)
    hist = load_model_file(tmp_path / "m.pt").history
    assert len(hist) == 12 and s.epochs == 12 and s.stopped == "max epochs"
    assert hist[-1]["train_recon"] < 0.7 * hist[0]["train_recon"], hist
    assert s.best_val_recon < 0.7 * hist[0]["val_recon"], (s, hist[0])
    kinds = {e["event"] for e in events}
    assert kinds == {"start", "batch", "epoch"}
    ep = [e for e in events if e["event"] == "epoch"]
    keys = {"epoch", "epochs", "train_loss", "val_loss", "recon", "kl", "eta_seconds"}
    assert all(keys <= e.keys() for e in ep) and ep[-1]["eta_seconds"] == 0
    assert [e["epoch"] for e in ep] == list(range(1, 13))


def test_summary_reports_the_contract_fields_and_nothing_on_stdout(bank, tmp_path, capfd):
    s = train_model(bank, tmp_path / "m.pt", small_settings(epochs=2)).to_dict()
    out, _ = capfd.readouterr()
    assert out == ""
    for key in ("epochs", "best_val_loss", "best_val_recon", "best_val_kl", "seconds",
                "clips_per_second", "stopped", "resume_command"):
        assert key in s
    assert s["best_val_loss"] == pytest.approx(s["best_val_recon"] + 1.0 * s["best_val_kl"])
    assert s["clips_per_second"] > 0 and s["n_train"] + s["n_val"] == 48
    assert s["threads"] == len(os.sched_getaffinity(0))
    assert s["checkpoint"] is None and not checkpoint_path(tmp_path / "m.pt").exists()
    json.dumps(s)  # --json prints it as is


def test_thread_count_and_global_rng_are_left_as_found(bank, tmp_path):
    torch.set_num_threads(1)
    torch.manual_seed(123)
    expected = torch.rand(3)
    torch.manual_seed(123)
    train_model(bank, tmp_path / "m.pt", small_settings(epochs=1))
    assert torch.get_num_threads() == 1
    assert torch.equal(torch.rand(3), expected)


def test_same_seed_gives_identical_weights(bank, tmp_path):
    for name, seed in (("a", 0), ("b", 0), ("c", 1)):
        train_model(bank, tmp_path / f"{name}.pt", small_settings(epochs=2, seed=seed))
    a, b, c = (weights(tmp_path / f"{n}.pt") for n in "abc")
    assert same_weights(a, b)
    assert not same_weights(a, c)


def test_the_bank_audio_spec_wins_over_the_settings(bank, tmp_path):
    other = small_settings(epochs=1).replace(audio=load_settings("tiny").audio)
    train_model(bank, tmp_path / "m.pt", other)
    mf = load_model_file(tmp_path / "m.pt")
    assert mf.audio.n_fft == SMALL_AUDIO["n_fft"] and mf.mu.shape == (48, 8)


def test_existing_model_is_not_overwritten_without_leave(bank, tmp_path):
    path = tmp_path / "m.pt"
    path.write_bytes(b"keep me")
    with pytest.raises(OutputError, match="already exists; pass --overwrite"):
        train_model(bank, path, small_settings(epochs=1))
    assert path.read_bytes() == b"keep me"
    train_model(bank, path, small_settings(epochs=1), overwrite=True)
    assert load_model_file(path).history
    with pytest.raises(OutputError, match="does not exist"):
        train_model(bank, tmp_path / "no" / "m.pt", small_settings(epochs=1))
    with pytest.raises(TrainingError, match="no checkpoint to resume"):
        train_model(bank, tmp_path / "new.pt", small_settings(epochs=1), resume=True)


# ------------------------------------------------------------ interruption, resume


def _interrupt_at(epoch: int, batch: int):
    stop = threading.Event()

    def progress(d):
        if d["event"] == "batch" and d["epoch"] == epoch and d["batch"] == batch:
            stop.set()

    return stop, progress


def test_interrupted_and_resumed_run_equals_an_uninterrupted_one(bank, tmp_path):
    settings = small_settings(epochs=4)
    full = train_model(bank, tmp_path / "full.pt", settings)
    stop, progress = _interrupt_at(epoch=2, batch=2)
    part = train_model(bank, tmp_path / "part.pt", settings, progress=progress, interrupt=stop)
    assert part.stopped == "interrupted" and part.epochs == 1
    ckpt_file = checkpoint_path(tmp_path / "part.pt")
    assert part.checkpoint == str(ckpt_file) and ckpt_file.exists()
    assert part.resume_command.endswith("--resume") and "part.pt" in part.resume_command
    ckpt, _ = read_archive(ckpt_file, kind="checkpoint")
    batches = -(-full.n_train // 16)
    steps = {int(s["step"]) for s in ckpt["optimizer_state"]["state"].values()}
    assert steps == {batches + 2}  # AdamW's step count: one epoch plus two batches
    assert ckpt["state"]["epoch"] == 1 and ckpt["state"]["clips_done"] == 32

    done = train_model(bank, tmp_path / "part.pt", settings, resume=True)
    assert done.epochs == 4 and done.epochs_this_run == 3 and done.stopped == "max epochs"
    assert same_weights(weights(tmp_path / "full.pt"), weights(tmp_path / "part.pt"))
    h1 = load_model_file(tmp_path / "full.pt").history
    h2 = load_model_file(tmp_path / "part.pt").history
    assert [h["val_loss"] for h in h1] == [h["val_loss"] for h in h2]
    assert done.best_val_loss == full.best_val_loss
    assert not ckpt_file.exists()


def test_resume_refuses_a_different_architecture(bank, tmp_path):
    stop, progress = _interrupt_at(epoch=1, batch=1)
    train_model(bank, tmp_path / "m.pt", small_settings(epochs=3), progress=progress,
                interrupt=stop)
    wider = small_settings(epochs=3, model={"width": 48})
    with pytest.raises(TrainingError, match=r"model\.width is 48 here but 32") as err:
        train_model(bank, tmp_path / "m.pt", wider, resume=True)
    assert "\n" not in str(err.value)
    more = train_model(bank, tmp_path / "m.pt", small_settings(epochs=5), resume=True)
    assert more.epochs == 5  # a longer schedule is fine


def test_a_non_finite_loss_stops_and_keeps_the_last_good_model(bank, tmp_path, monkeypatch):
    real, calls = train_mod.vae_loss, [0]

    def turns_nan(*args, **kwargs):
        loss, rec, kl = real(*args, **kwargs)
        calls[0] += torch.is_grad_enabled()  # training steps only, not validation
        return (loss * float("nan") if calls[0] > 7 else loss), rec, kl

    monkeypatch.setattr(train_mod, "vae_loss", turns_nan)
    path = tmp_path / "m.pt"
    with pytest.raises(TrainingError, match="non-finite at epoch 3.*last good model") as err:
        train_model(bank, path, small_settings(epochs=6))
    assert "\n" not in str(err.value)
    mf = load_model_file(path)  # batches 1-6 were fine: epochs 1 and 2 are in the file
    assert len(mf.history) == 2 and np.isfinite(mf.mu).all()
    assert read_archive(checkpoint_path(path), kind="checkpoint")[0]["state"]["epoch"] == 2


CHILD = """
import json, sys
from synthbank import small_settings
from pipeline.train import train_model
def progress(d):
    if d["event"] == "epoch":
        print("EPOCH", d["epoch"], flush=True)
s = train_model(sys.argv[1], sys.argv[2], small_settings(epochs=400), progress=progress)
print("SUMMARY", json.dumps(s.to_dict()), flush=True)
"""


def _child(bank: Path, model: Path) -> subprocess.Popen:
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(TESTS), str(TESTS.parent)])}
    return subprocess.Popen([sys.executable, "-c", CHILD, str(bank), str(model)], env=env,
                            stdout=subprocess.PIPE, text=True)


def _wait_for(proc: subprocess.Popen, line: str) -> None:
    for got in proc.stdout:
        if got.strip() == line:
            return
    raise AssertionError(f"child ended before {line!r} (rc {proc.wait()})")


@pytest.mark.slow
def test_sigkill_right_after_a_checkpoint_leaves_a_loadable_model(bank, tmp_path):
    model = tmp_path / "m.pt"
    proc = _child(bank, model)
    try:
        _wait_for(proc, "EPOCH 2")
        proc.send_signal(signal.SIGKILL)
    finally:
        proc.wait(timeout=60)
    assert proc.returncode == -signal.SIGKILL
    mf = load_model_file(model)
    assert len(mf.history) >= 1 and mf.mu.shape == (48, 8)
    ckpt, _ = read_archive(checkpoint_path(model), kind="checkpoint")
    done = ckpt["state"]["epoch"]
    assert done >= 2
    s = train_model(bank, model, small_settings(epochs=done + 1), resume=True)
    assert s.epochs == done + 1 and s.epochs_this_run == 1
    assert sorted(p.name for p in tmp_path.iterdir()) == ["m.pt"]  # no temporaries left


@pytest.mark.slow
def test_ctrl_c_stops_saves_and_prints_the_resume_command(bank, tmp_path):
    model = tmp_path / "m.pt"
    proc = _child(bank, model)
    try:
        _wait_for(proc, "EPOCH 1")
        proc.send_signal(signal.SIGINT)
        out, _ = proc.communicate(timeout=60)
    finally:
        proc.kill()
    assert proc.returncode == 0
    summary = json.loads(out.split("SUMMARY", 1)[1])
    assert summary["stopped"] == "interrupted"
    assert summary["resume_command"] == (
        f"shotsmith train {bank} --model {model} --preset tiny --epochs 400 --latent-dim 8 "
        "--beta 1.0 --seed 0 --resume"
    )
    ckpt, _ = read_archive(checkpoint_path(model), kind="checkpoint")
    assert ckpt["state"]["epoch"] == summary["epochs"] >= 1
    load_model_file(model)


def _cli_train_interrupted_at(monkeypatch, bank, model, epoch, *extra):
    """``shotsmith train`` in-process, with a real SIGINT sent at batch 1 of ``epoch``."""
    from modelfiles import small_preset
    from typer.testing import CliRunner

    from pipeline.cli import app

    real = train_mod.train_model

    def with_ctrl_c(*args, progress=None, **kwargs):
        def on_event(d):
            if d["event"] == "batch" and d["epoch"] == epoch and d["batch"] == 1:
                os.kill(os.getpid(), signal.SIGINT)  # the handler train_model installs
            progress(d)

        return real(*args, progress=on_event, **kwargs)

    monkeypatch.setattr(train_mod, "train_model", with_ctrl_c)
    preset = small_preset(model.parent, latent_dim=8)
    return CliRunner().invoke(app, ["train", str(bank), "--model", str(model), "--preset",
                                    str(preset), "--epochs", "9", *extra])


def _strict_json(text: str) -> dict:
    def no_constants(name):
        raise AssertionError(f"{name} in the JSON summary")

    return json.loads(text, parse_constant=no_constants)


def test_ctrl_c_in_the_first_epoch_exits_130_with_one_json_object_and_no_model(
        bank, tmp_path, monkeypatch):
    model = tmp_path / "m.pt"
    result = _cli_train_interrupted_at(monkeypatch, bank, model, 1, "--json")
    assert result.exit_code == 130, result.output
    summary = _strict_json(result.stdout)  # one object, nothing else on stdout, no NaN
    assert summary["stopped"] == "interrupted" and summary["epochs"] == 0
    assert summary["model"] is None and not model.exists()  # says exactly what exists
    assert summary["best_val_loss"] is None
    assert summary["checkpoint"] == str(checkpoint_path(model)) and checkpoint_path(model).exists()
    assert result.stderr.count("to resume:") == 1 and summary["resume_command"] in result.stderr


def test_ctrl_c_later_names_the_kept_model_and_prints_the_resume_line_once(
        bank, tmp_path, monkeypatch):
    model = tmp_path / "m.pt"
    result = _cli_train_interrupted_at(monkeypatch, bank, model, 2)
    assert result.exit_code == 130, result.output
    assert result.output.count("to resume:") == 1  # stdout and stderr together
    assert f"model in {model}" in result.stdout and model.exists()
    assert "interrupted during epoch 2" in result.stdout
    assert load_model_file(model).best["epoch"] == 1


# ------------------------------------------------------------------------ quality


@pytest.mark.slow
def test_validation_error_beats_the_mean_and_16_dims_beat_2(tmp_path):
    # held-out reconstructions of a 6-factor synthetic bank: far below the best
    # constant guess (the training mean), and a 16-D latent beats a 2-D one
    # (common practice: 10-30 dimensions reconstruct much better than 2)
    audio = small_settings().audio
    U, cats = param_spectra(400, audio, seed=0)
    bank = write_spectra_bank(tmp_path / "bank", audio, U, cats)
    rms = {}
    for dim in (16, 2):
        settings = small_settings(epochs=40, beta=0.2, model={"latent_dim": dim, "width": 64,
                                                              "kernel_size": 5})
        train_model(bank, tmp_path / f"m{dim}.pt", settings)
        mf = load_model_file(tmp_path / f"m{dim}.pt")
        val = mf.split["val"]
        rms[dim] = float(np.sqrt(np.mean((mf.decode(mf.mu[val]) - U[val]) ** 2)))
    train = mf.split["train"]
    const = float(np.sqrt(np.mean((U[train].mean(axis=0) - U[val]) ** 2)))
    # measured (seed 0): 0.058 (16-D), 0.078 (2-D), 0.226 (constant)
    assert rms[16] < 0.5 * const, (rms, const)
    assert rms[16] < 0.9 * rms[2], rms
