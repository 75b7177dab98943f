"""Faults: SIGKILL during training, Ctrl-C during generation, unwritable folders, a full disk.

The promise under test: whatever stops a run, every model file and WAV at its final name is
complete, the manifest lists exactly the WAVs present, earlier outputs are intact, and the
user sees one line. ``SHOTSMITH_FAULT_LOOPS`` sets how many random kill / interrupt moments
are tried (3 SIGKILLs and 1 SIGINT in CI).
"""

from __future__ import annotations

import errno
import json
import os
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from badfiles import hit, tree_digest, wav_bytes
from modelfiles import small_preset
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.config import load_settings
from pipeline.errors import OutputError

LOOPS = int(os.environ.get("SHOTSMITH_FAULT_LOOPS", "3"))
runner = CliRunner()


def _cli(*args: str, **kw) -> subprocess.Popen:
    env = dict(os.environ, PYTHONUNBUFFERED="1")
    return subprocess.Popen([sys.executable, "-m", "pipeline", *args], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, env=env, **kw)


def _wait_for(pred, proc: subprocess.Popen, timeout: float = 90.0) -> bool:
    t0 = time.monotonic()
    while time.monotonic() - t0 < timeout:
        if pred():
            return True
        if proc.poll() is not None:
            return pred()
        time.sleep(0.02)
    return False


@pytest.fixture
def own_tmp():
    """A private temporary folder. The long subprocess tests below outlive other pytest
    sessions on a shared machine, and pytest prunes all but its three newest basetemp
    folders, so tmp_path could vanish under a running trial."""
    with tempfile.TemporaryDirectory(prefix="shotsmith-faults-") as d:
        yield Path(d)


@pytest.fixture(scope="module")
def bank():
    from synthbank import make_bank

    holder = tempfile.TemporaryDirectory(prefix="shotsmith-faults-bank-")
    work = Path(holder.name)
    preset = small_preset(work, patience=1000)  # no early stop in the kill loop
    settings = load_settings(preset)
    yield make_bank(work / "bank", settings.audio, per_family=4), preset
    holder.cleanup()


# --- training killed -------------------------------------------------------------------------


@pytest.mark.slow
def test_sigkill_during_training_keeps_a_loadable_model_and_resume_works(bank, own_tmp):
    from pipeline.modelfile import load_model_file, read_archive
    from pipeline.train import checkpoint_path

    bank_dir, preset = bank
    model = own_tmp / "model.pt"
    ckpt = checkpoint_path(model)
    args = ["train", str(bank_dir), "--model", str(model), "--preset", str(preset),
            "--epochs", "400", "--latent-dim", "4", "--seed", "1"]  # never ends by itself here
    rng = np.random.default_rng(int(os.environ.get("SHOTSMITH_FAULT_SEED", "7")))
    bank_before = tree_digest(bank_dir)
    kills, epochs_seen = 0, []
    for trial in range(LOOPS):
        proc = _cli(*args, *(["--resume"] if trial else []))
        if trial == 0:  # the first run: wait for its first checkpoint, then a random moment
            assert _wait_for(ckpt.exists, proc)
            time.sleep(float(rng.uniform(0.0, 0.8)))  # an epoch takes about 0.7 s here
        else:  # anywhere from loading the checkpoint to a few epochs on, saves included
            time.sleep(float(rng.uniform(1.0, 6.0)))
        if proc.poll() is None:
            proc.send_signal(signal.SIGKILL)
            kills += 1
        out, err = proc.communicate(timeout=60)
        # The last complete files are there at their final names and load.
        why = f"trial {trial}, exit {proc.returncode}: {out[-800:]} {err[-1500:]}"
        assert ckpt.exists() and model.exists(), why
        mf = load_model_file(model)
        assert np.all(np.isfinite(mf.mu)) and len(mf.clip_names) == 24
        state, _ = read_archive(ckpt, kind="checkpoint")
        epochs_seen.append(state["state"]["epoch"])
    assert kills >= 1
    assert epochs_seen == sorted(epochs_seen) and epochs_seen[-1] >= 1  # progress is kept
    # Resume to the end: a few more epochs (the train table may change on resume).
    args[args.index("--epochs") + 1] = str(epochs_seen[-1] + 3)
    done = subprocess.run([sys.executable, "-m", "pipeline", *args, "--resume", "--json"],
                          capture_output=True, text=True, timeout=240)
    assert done.returncode == 0, done.stderr[-1500:]
    summary = json.loads(done.stdout.strip().splitlines()[-1])
    assert summary["epochs"] == epochs_seen[-1] + 3 and summary["stopped"] == "max epochs"
    mf = load_model_file(model)
    assert [h["epoch"] for h in mf.history] == list(range(1, summary["epochs"] + 1))
    assert not ckpt.exists()
    assert tree_digest(bank_dir) == bank_before  # training only reads the bank


# --- generation interrupted ------------------------------------------------------------------


@pytest.fixture(scope="module")
def model_file(bank):
    from modelfiles import write_model_file

    _, preset = bank
    settings = load_settings(preset, {"render": {"batch_size": 4, "iterations": 48}})
    return write_model_file(bank[0].parent / "model.pt", settings)


def _check_outputs(out: Path, *, complete: bool | None = None) -> list[str]:
    """Every WAV is whole, nothing temporary is left, the manifest lists exactly the WAVs."""
    manifest = json.loads((out / "manifest.json").read_text(encoding="utf-8"))
    wavs = sorted(p.name for p in out.glob("*.wav"))
    assert sorted(it["file"] for it in manifest["items"]) == wavs
    assert not [p.name for p in out.iterdir() if p.name.startswith(".")]
    for name in wavs:
        info = sf.info(out / name)
        assert info.frames == 8000 and info.samplerate == 16000 and info.subtype == "PCM_24"
        y, _ = sf.read(out / name)
        assert np.all(np.isfinite(y))
    if complete is not None:
        assert manifest["complete"] is complete
    return wavs


@pytest.mark.slow
def test_ctrl_c_during_generate_leaves_whole_wavs_and_a_true_manifest(model_file, own_tmp):
    rng = np.random.default_rng(11)
    interrupted, trials = 0, max(1, LOOPS // 2)  # each start costs seconds (torch import)
    for trial in range(trials):
        out = own_tmp / f"out{trial}"
        proc = _cli("generate", str(model_file), "--out", str(out), "-n", "2000", "--seed", "3")
        assert _wait_for(lambda o=out: (o / "manifest.json").exists(), proc)
        time.sleep(float(rng.uniform(0.0, 1.0)))
        proc.send_signal(signal.SIGINT)
        _, err = proc.communicate(timeout=60)
        assert proc.returncode == 130, err[-1500:]
        assert err.strip().splitlines() == ["interrupted"], err[-1500:]
        wavs = _check_outputs(out, complete=False)
        assert 0 < len(wavs) < 2000
        interrupted += 1
    assert interrupted == trials


def test_keyboard_interrupt_from_the_progress_callback(model_file, tmp_path):
    from pipeline.create import generate_sounds

    calls = []

    def progress(done, total=None, **_):
        calls.append(done)
        if len(calls) == 3:
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        generate_sounds(model_file, tmp_path / "out", n=40, seed=0, progress=progress)
    wavs = _check_outputs(tmp_path / "out", complete=False)
    assert len(wavs) == calls[-1] == 12  # three batches of four were finished and listed


# --- folders that cannot be written, a full disk ---------------------------------------------


def test_missing_parent_and_file_in_the_way_are_one_line_errors(model_file, tmp_path):
    (tmp_path / "a file").write_text("x")
    for out in (tmp_path / "a file", tmp_path / "a file" / "sub"):
        result = runner.invoke(app, ["generate", str(model_file), "--out", str(out), "-n", "1"])
        assert result.exit_code == 1, result.output
        lines = result.output.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith(f"error: {out}"), result.output
    assert (tmp_path / "a file").read_text() == "x"
    # a missing folder (and its parents) is created
    deep = tmp_path / "new" / "deeper"
    result = runner.invoke(app, ["generate", str(model_file), "--out", str(deep), "-n", "2"])
    assert result.exit_code == 0, result.output
    assert len(list(deep.glob("*.wav"))) == 2


def test_read_only_output_folder_is_one_line_error(model_file, tmp_path, monkeypatch):
    import tempfile

    from pipeline import render

    out = tmp_path / "ro"
    out.mkdir()
    (out / "keep.wav").write_bytes(b"mine")
    if os.geteuid() != 0:
        out.chmod(0o555)
    else:  # root writes anywhere: make creating a file in that folder fail as it would
        real = tempfile.mkstemp

        def mkstemp(*a, dir=None, **k):
            if dir is not None and Path(dir) == out:
                raise PermissionError(errno.EACCES, "Permission denied", str(dir))
            return real(*a, dir=dir, **k)

        monkeypatch.setattr(render.tempfile, "mkstemp", mkstemp)
    try:
        result = runner.invoke(app, ["generate", str(model_file), "--out", str(out), "-n", "2"])
    finally:
        out.chmod(0o755)
    assert result.exit_code == 1
    assert result.output.strip() == (
        f"error: {out}: output folder is not writable (permission denied)")
    assert sorted(p.name for p in out.iterdir()) == ["keep.wav"]
    assert (out / "keep.wav").read_bytes() == b"mine"


@pytest.mark.parametrize("where", ["wav", "rename", "manifest"])
def test_full_disk_during_generate_keeps_earlier_files(model_file, tmp_path, monkeypatch, where):
    from pipeline import bank, render
    from pipeline.create import generate_sounds, vary_sound

    out = tmp_path / "out"
    first = vary_sound(model_file, "kick_00", out, n=3, seed=1)["files"]  # an earlier run
    before = {n: (out / n).read_bytes() for n in first}
    manifest_before = (out / "manifest.json").read_bytes()
    count = {"n": 0}

    def full(*a, **k):
        raise OSError(errno.ENOSPC, "No space left on device")

    if where == "wav":  # the fifth WAV of the second run cannot be written
        real_write = render.sf.write

        def write(*a, **k):
            count["n"] += 1
            if count["n"] >= 5:
                full()
            return real_write(*a, **k)

        monkeypatch.setattr(render.sf, "write", write)
    elif where == "rename":
        monkeypatch.setattr(render.os, "link", full)
        monkeypatch.setattr(render.os, "replace", full)
    else:
        real_dump = bank.json.dump

        def dump(*a, **k):
            count["n"] += 1
            if count["n"] >= 2:
                full()
            return real_dump(*a, **k)

        monkeypatch.setattr(bank.json, "dump", dump)
    with pytest.raises(OutputError) as info:
        generate_sounds(model_file, out, n=12, seed=2)
    msg = str(info.value)
    assert "\n" not in msg and "No space left on device" in msg and str(out) in msg
    monkeypatch.undo()
    for name, data in before.items():  # earlier outputs untouched
        assert (out / name).read_bytes() == data
    assert not [p.name for p in out.iterdir() if p.name.startswith(".")]
    if where == "manifest":  # it could not be rewritten: the last written one stands
        assert (out / "manifest.json").read_bytes() != b""
        json.loads((out / "manifest.json").read_text(encoding="utf-8"))
    elif where == "rename":  # nothing new reached its name; the first manifest stands
        assert _check_outputs(out, complete=True) == sorted(first)
        assert (out / "manifest.json").read_bytes() == manifest_before
    else:
        wavs = _check_outputs(out, complete=False)
        assert set(first) <= set(wavs) and len(wavs) == len(first) + 4


@pytest.mark.parametrize("where", ["index", "rows"])
def test_full_disk_during_ingest_keeps_the_previous_bank(tmp_path, monkeypatch, where):
    from pipeline import bank
    from pipeline.bank import open_bank
    from pipeline.ingest import ingest_folder

    src = tmp_path / "src"
    src.mkdir()
    for i in range(3):
        (src / f"s{i}.wav").write_bytes(wav_bytes(hit(16000, seed=i), 16000))
    settings = load_settings("tiny")
    ingest_folder(src, tmp_path / "bank", settings, jobs=1)
    old = open_bank(tmp_path / "bank")
    old_rows = np.array(old.spectra)
    (src / "s3.wav").write_bytes(wav_bytes(hit(16000, seed=9), 16000))

    def full(*a, **k):
        raise OSError(errno.ENOSPC, "No space left on device")

    if where == "index":  # the new index.json cannot be written
        real_dump = bank.json.dump

        def dump(obj, *a, **k):
            if isinstance(obj, dict) and "clips" in obj:
                full()
            return real_dump(obj, *a, **k)

        monkeypatch.setattr(bank.json, "dump", dump)
        named = tmp_path / "bank" / "index.json"
    else:  # a spectrogram row cannot be written (a memory map would raise SIGBUS here)
        monkeypatch.setattr(bank.os, "pwrite", full)
        named = tmp_path / "bank"
    result = runner.invoke(app, ["ingest", str(src), "--bank", str(tmp_path / "bank"),
                                 "--preset", "tiny", "--jobs", "1"])
    monkeypatch.undo()
    assert result.exit_code == 1
    assert result.stderr.strip() == f"error: {named}: cannot write (No space left on device)"
    kept = open_bank(tmp_path / "bank")  # the previous bank, whole
    assert len(kept) == 3 and np.array_equal(np.array(kept.spectra), old_rows)
    assert not [p.name for p in (tmp_path / "bank").iterdir() if p.name.startswith(".")]


def test_full_disk_while_saving_a_model_keeps_the_last_one(bank, tmp_path, monkeypatch):
    from pipeline import modelfile
    from pipeline.modelfile import load_model_file
    from pipeline.train import train_model

    bank_dir, preset = bank
    settings = load_settings(preset, {"train": {"epochs": 4, "seed": 2},
                                      "model": {"latent_dim": 4}})
    real_open = open
    saves = []

    def full_open(file, mode="r", *a, **k):
        if "w" in mode:
            saves.append(file)
            if len(saves) > 2:  # model and checkpoint of epoch 1 went through
                raise OSError(errno.ENOSPC, "No space left on device", str(file))
        return real_open(file, mode, *a, **k)

    monkeypatch.setattr(modelfile, "open", full_open, raising=False)
    model = tmp_path / "model.pt"
    with pytest.raises(OutputError) as info:
        train_model(bank_dir, model, settings)
    monkeypatch.undo()
    assert str(info.value) in (f"{model}: cannot write (No space left on device)",
                               f"{model}.ckpt: cannot write (No space left on device)")
    mf = load_model_file(model)
    assert mf.best["epoch"] == 1
    assert sorted(p.name for p in tmp_path.iterdir()) == ["model.pt", "model.pt.ckpt"]
