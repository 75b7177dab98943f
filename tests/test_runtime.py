"""The process policy (pipeline/runtime.py) and the device logic of training and loading."""

from __future__ import annotations

import io
import os
import subprocess
import sys
from pathlib import Path
from unittest import mock

import numpy as np
import pytest

from pipeline import runtime

ROOT = Path(__file__).resolve().parents[1]


def test_cgroup_quota_rounds_up_and_max_means_none(tmp_path):
    f = tmp_path / "cpu.max"
    f.write_text("150000 100000\n")
    assert runtime.cgroup_cpu_limit(f) == 2
    f.write_text("50000 100000\n")
    assert runtime.cgroup_cpu_limit(f) == 1
    f.write_text("max 100000\n")
    assert runtime.cgroup_cpu_limit(f) is None
    assert runtime.cgroup_cpu_limit(tmp_path / "absent") is None
    f.write_text("garbage")
    assert runtime.cgroup_cpu_limit(f) is None


def test_quota_caps_the_affinity(monkeypatch, tmp_path):
    monkeypatch.setattr(runtime.os, "sched_getaffinity", lambda pid: {0, 1, 2, 3, 4, 5})
    quota = tmp_path / "cpu.max"
    quota.write_text("300000 100000")
    monkeypatch.setattr(runtime, "CPU_MAX", quota)
    monkeypatch.setattr(runtime.cgroup_cpu_limit, "__defaults__", (quota,))
    monkeypatch.setitem(runtime._chosen, "threads", None)
    assert runtime.available_cores() == 3
    monkeypatch.setenv("LOCAL_WORLD_SIZE", "2")
    assert runtime.default_threads() == 1  # 3 cores among 2 local ranks
    monkeypatch.setenv("LOCAL_WORLD_SIZE", "4")
    assert runtime.default_threads() == 1
    monkeypatch.setitem(runtime._chosen, "threads", 5)  # --threads wins
    assert runtime.default_threads() == 5


def test_prepare_sets_passive_waiting_unless_the_user_chose():
    code = ("import os, sys; from pipeline.runtime import prepare; n = prepare({t}); "
            "print(os.environ.get('OMP_WAIT_POLICY'), os.environ.get('OMP_NUM_THREADS'), n, "
            "'torch' in sys.modules)")
    env = {k: v for k, v in os.environ.items() if not k.startswith("OMP_")}
    env["PYTHONPATH"] = str(ROOT)
    run = lambda t, **e: subprocess.run(  # noqa: E731
        [sys.executable, "-c", code.format(t=t)], env={**env, **e}, capture_output=True,
        text=True, check=True).stdout.split()
    assert run(None)[0] == "PASSIVE" and run(None)[3] == "False"  # torch not imported
    assert run(None, OMP_WAIT_POLICY="ACTIVE")[0] == "ACTIVE"
    assert run(3)[1:3] == ["3", "3"]


def test_cli_threads_option_reaches_training(tmp_path):
    from modelfiles import small_preset
    from synthbank import small_bank

    bank = small_bank(tmp_path / "bank", n=12)
    preset = small_preset(tmp_path, epochs=1)
    env = {k: v for k, v in os.environ.items() if not k.startswith("OMP_")}
    out = subprocess.run(
        [sys.executable, "-m", "pipeline", "train", str(bank), "--model", str(tmp_path / "m.pt"),
         "--preset", str(preset), "--threads", "1", "--json"],
        env={**env, "PYTHONPATH": str(ROOT)}, capture_output=True, text=True, cwd=tmp_path)
    assert out.returncode == 0, out.stderr[-2000:]
    import json

    s = json.loads(out.stdout)
    assert s["threads"] == 1 and s["world_size"] == 1 and s["rank"] == 0


# ------------------------------------------------------------------------- devices


def test_cuda_without_cuda_is_one_line(tmp_path):
    import torch
    from synthbank import small_bank
    from typer.testing import CliRunner

    from pipeline.cli import app

    if torch.cuda.is_available():
        pytest.skip("this machine has CUDA")
    bank = small_bank(tmp_path / "bank", n=8)
    r = CliRunner().invoke(app, ["train", str(bank), "--model", str(tmp_path / "m.pt"),
                                 "--device", "cuda", "--epochs", "1"])
    assert r.exit_code == 1
    lines = r.output.strip().splitlines()
    assert lines[-1] == "error: device='cuda': CUDA is not available here"
    assert not any("Traceback" in ln for ln in lines)
    assert not (tmp_path / "m.pt").exists()


def test_a_model_saved_from_cuda_tensors_loads_on_the_cpu(tmp_path):
    import torch
    import torch.serialization as ser
    from modelfiles import model_dict

    from pipeline.config import load_settings
    from pipeline.files import write_atomic
    from pipeline.modelfile import load_model_file

    settings = load_settings("tiny", {"model": {"width": 32, "depth": 2}})
    payload = model_dict(settings)
    buf = io.BytesIO()
    # every storage recorded as a CUDA one, as torch.save writes it on a GPU machine
    with mock.patch.object(ser, "location_tag", lambda storage: "cuda:0"):
        torch.save(payload, buf)
    if not torch.cuda.is_available():  # the file really is a CUDA one: plain loading fails
        with pytest.raises(RuntimeError, match="CUDA"):
            torch.load(io.BytesIO(buf.getvalue()), weights_only=True)
    path = tmp_path / "gpu.pt"
    write_atomic(path, buf.getvalue())
    m = load_model_file(path)
    assert all(v.device.type == "cpu" for v in m.model.state_dict().values())
    for k, v in payload["state_dict"].items():
        assert torch.equal(m.model.state_dict()[k], v)
    spectra = m.decode(m.mu[:2])
    assert spectra.shape == (2, settings.audio.n_bins, settings.audio.n_frames)
    assert np.isfinite(spectra).all()


def test_importing_the_package_sets_passive_waiting_without_loading_torch():
    import subprocess
    import sys

    env = {k: v for k, v in os.environ.items() if k != "OMP_WAIT_POLICY"}
    code = ("import os, sys, pipeline; "
            "print(os.environ.get('OMP_WAIT_POLICY'), 'torch' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True,
                         text=True, check=True).stdout.split()
    assert out == ["PASSIVE", "False"]
    env["OMP_WAIT_POLICY"] = "ACTIVE"  # the user's own choice wins
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True,
                         text=True, check=True).stdout.split()
    assert out == ["ACTIVE", "False"]
