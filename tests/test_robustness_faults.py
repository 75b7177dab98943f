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


def _check_outputs(out: Path, *, complete: bool | None = None, folded: bool = True) -> list[str]:
    """Every WAV is whole, nothing temporary is left, the manifest (as the one loader reads
    it) lists exactly the WAVs; ``folded``: the log is folded into manifest.json."""
    from pipeline.manifest import LOG_FILE, load_manifest

    manifest = load_manifest(out)
    wavs = sorted(p.name for p in out.glob("*.wav"))
    assert sorted(it["file"] for it in manifest["items"]) == wavs
    assert not manifest["unlisted"]
    if folded:  # a kill may leave temporaries: the next run removes them
        assert not [p.name for p in out.iterdir() if p.name.startswith(".")]
        assert not (out / LOG_FILE).exists()
        on_disk = json.loads((out / "manifest.json").read_text(encoding="utf-8"))
        assert sorted(it["file"] for it in on_disk["items"]) == wavs
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
        assert _wait_for(lambda o=out: any(o.glob("*.wav")), proc)
        time.sleep(float(rng.uniform(0.0, 1.0)))
        proc.send_signal(signal.SIGINT)
        _, err = proc.communicate(timeout=60)
        assert proc.returncode == 130, err[-1500:]
        assert err.strip().splitlines() == ["interrupted"], err[-1500:]
        wavs = _check_outputs(out, complete=False)
        assert 0 < len(wavs) < 2000
        interrupted += 1
    assert interrupted == trials


@pytest.mark.slow
def test_sigkill_during_generate_leaves_a_manifest_of_exactly_the_wavs(model_file, own_tmp):
    """Killed at random moments, run after run into one folder: what the manifest loader reads
    is exactly the WAVs present; the next run removes the temporaries, adds after what is
    there, and ends with a folded manifest marked complete."""
    from pipeline.create import generate_sounds

    rng = np.random.default_rng(int(os.environ.get("SHOTSMITH_FAULT_SEED", "7")))
    out, kills = own_tmp / "out", 0
    for trial in range(LOOPS):
        had = len(list(out.glob("*.wav"))) if out.exists() else 0
        proc = _cli("generate", str(model_file), "--out", str(out), "-n", "2000",
                    "--seed", str(trial))
        assert _wait_for(lambda h=had: len(list(out.glob("*.wav"))) > h, proc)
        time.sleep(float(rng.uniform(0.0, 1.0)))  # a batch of 4 takes about 0.1 s here
        if proc.poll() is None:
            proc.send_signal(signal.SIGKILL)
            kills += 1
        out_text, err = proc.communicate(timeout=60)
        why = f"trial {trial}, exit {proc.returncode}: {out_text[-800:]} {err[-1500:]}"
        wavs = _check_outputs(out, folded=False)
        assert len(wavs) > had, why
    assert kills >= 1
    done = generate_sounds(model_file, out, n=3, seed=99)
    last = sorted(p.name for p in out.glob("*.wav"))[-3:]
    assert done["files"] == last  # numbered after everything the killed runs left
    _check_outputs(out, complete=True)


_KILL_SCRIPT = """
import importlib, os, signal, sys
import numpy as np
from pipeline import render, spectra
from pipeline.config import RenderSpec, load_settings

where, attr, k, when, overwrite, out, prefix, f0 = sys.argv[1:9]
owner = importlib.import_module(where) if "." not in attr else None
if owner is None:
    cls, attr = attr.split(".")
    owner = getattr(importlib.import_module(where), cls)
real, calls = getattr(owner, attr), [0]

def hooked(*a, **kw):
    calls[0] += 1
    if calls[0] == int(k) and when == "before":
        os.kill(os.getpid(), signal.SIGKILL)
    result = real(*a, **kw)
    if calls[0] == int(k) and when == "after":
        os.kill(os.getpid(), signal.SIGKILL)
    return result

setattr(owner, attr, hooked)
audio = load_settings("tiny").audio
t = np.arange(audio.n_samples) / audio.sample_rate
f = [float(f0) + 50 * i for i in range(6)]
U = spectra.clip_to_unit(np.stack([0.5 * np.sin(2 * np.pi * fi * t) * np.exp(-8 * t) for fi in f]),
                         audio)
items = [{"stem": f"{prefix}-{i}", "kind": "test"} for i in range(6)]
render.render_spectra([(U, items)], out, audio, RenderSpec(iterations=1, batch_size=2),
                      overwrite=overwrite == "1")
sys.exit(3)  # the hook never fired
"""

KILL_POINTS = [  # (module, function, call, before/after, overwrite)
    ("pipeline.files", "write_temp", 3, "after", False),  # a WAV's temporary, nothing logged
    ("pipeline.manifest", "ManifestLog.append", 4, "before", False),
    ("pipeline.manifest", "ManifestLog.append", 4, "after", False),  # logged, not at its name
    ("os", "link", 2, "before", False),
    ("os", "link", 2, "after", False),  # at its name, the temporary still there
    ("pipeline.manifest", "ManifestLog.append", 3, "before", True),  # --overwrite: the old
    ("os", "replace", 2, "after", True),  # file is gone before the new one is logged
    ("pipeline.manifest", "fold", 1, "before", False),  # every WAV there, the log not folded
    ("os", "replace", 1, "after", False),  # manifest.json written, the log not yet removed
]


@pytest.mark.slow
@pytest.mark.parametrize(("where", "fn", "k", "when", "overwrite"), KILL_POINTS)
def test_sigkill_at_each_step_of_writing_a_file(own_tmp, where, fn, k, when, overwrite):
    from pipeline.manifest import load_manifest

    out = own_tmp / "out"
    first = subprocess.run([sys.executable, "-c", _KILL_SCRIPT, "os", "getpid", "0", "-", "0",
                            str(out), "a", "200"], capture_output=True, text=True, timeout=120)
    assert first.returncode == 3, first.stderr[-1500:]  # a whole first run
    before = {p.name: p.read_bytes() for p in out.glob("*.wav")}
    proc = subprocess.run([sys.executable, "-c", _KILL_SCRIPT, where, fn, str(k), when,
                           str(int(overwrite)), str(out), "a" if overwrite else "b", "230"],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == -signal.SIGKILL, proc.stderr[-1500:]
    m = load_manifest(out)
    wavs = sorted(p.name for p in out.glob("*.wav"))
    assert sorted(it["file"] for it in m["items"]) == wavs and not m["unlisted"]
    for it in m["items"]:  # each file is described by the run that wrote it
        same = (out / it["file"]).read_bytes() == before.get(it["file"])
        assert same == (it["run"] == 1), (it["file"], it["run"])
    assert len(wavs) >= (4 if overwrite else 6)
    # the next run: temporaries gone, the log folded, complete, still exactly the files
    from pipeline import render

    render.render_spectra([], out, load_settings("tiny").audio, render.RenderSpec())
    m = load_manifest(out)
    assert m["complete"] is True
    assert sorted(it["file"] for it in m["items"]) == sorted(p.name for p in out.glob("*.wav"))
    assert sorted(p.name for p in out.iterdir() if not p.name.endswith(".wav")) == [
        "manifest.json"]


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
    out = tmp_path / "ro"
    out.mkdir()
    (out / "keep.wav").write_bytes(b"mine")
    if os.geteuid() != 0:
        out.chmod(0o555)
    else:  # root writes anywhere: make creating a file in that folder fail as it would
        real = os.open

        def os_open(path, flags, *a, **k):
            if flags & os.O_CREAT and Path(path).parent == out:
                raise PermissionError(errno.EACCES, "Permission denied", str(path))
            return real(path, flags, *a, **k)

        monkeypatch.setattr(os, "open", os_open)
    try:
        result = runner.invoke(app, ["generate", str(model_file), "--out", str(out), "-n", "2"])
    finally:
        out.chmod(0o755)
    assert result.exit_code == 1
    assert result.output.strip() == (
        f"error: {out}: output folder is not writable (permission denied)")
    assert sorted(p.name for p in out.iterdir()) == ["keep.wav"]
    assert (out / "keep.wav").read_bytes() == b"mine"


@pytest.mark.parametrize("where", ["wav", "rename", "log", "manifest"])
def test_full_disk_during_generate_keeps_earlier_files(model_file, tmp_path, monkeypatch, where):
    from pipeline import files, manifest
    from pipeline.create import generate_sounds, vary_sound

    out = tmp_path / "out"
    first = vary_sound(model_file, "kick_00", out, n=3, seed=1)["files"]  # an earlier run
    before = {n: (out / n).read_bytes() for n in first}
    manifest_before = (out / "manifest.json").read_bytes()
    count = {"n": 0}

    def full(*a, **k):
        raise OSError(errno.ENOSPC, "No space left on device")

    real_write = files._write_all
    if where == "wav":  # the fifth WAV of the second run cannot be written

        def write_all(fd, data):
            if bytes(data[:4]) == b"RIFF":
                count["n"] += 1
                if count["n"] >= 5:
                    full()
            return real_write(fd, data)

        monkeypatch.setattr(files, "_write_all", write_all)
    elif where == "rename":  # no WAV reaches its name, nor can manifest.json be replaced
        monkeypatch.setattr(os, "link", full)
        monkeypatch.setattr(os, "replace", full)
    elif where == "log":  # the log cannot take the sixth item, and then nothing at all
        real_append = manifest.ManifestLog.append

        def append(self, **record):
            count["n"] += 1
            if count["n"] >= 7:
                monkeypatch.setattr(files, "_write_all", full)
                raise files.cannot_write(self.path, OSError(errno.ENOSPC, os.strerror(28)))
            return real_append(self, **record)

        monkeypatch.setattr(manifest.ManifestLog, "append", append)
    else:  # every WAV went in; the final manifest.json cannot be written
        monkeypatch.setattr(files, "_write_all", lambda fd, data: full() if bytes(
            data[:2]) == b"{\n" else real_write(fd, data))
    with pytest.raises(OutputError) as info:
        generate_sounds(model_file, out, n=12, seed=2)
    msg = str(info.value)
    assert "\n" not in msg and msg.endswith("cannot write (No space left on device)"), msg
    assert msg.startswith(str(out))
    monkeypatch.undo()
    for name, data in before.items():  # earlier outputs untouched
        assert (out / name).read_bytes() == data
    wavs = _check_outputs(out, folded=False)  # what the loader reads: manifest.json + the log
    from pipeline.manifest import load_manifest

    m = load_manifest(out)
    if where == "manifest":  # the last manifest.json stands; the log completes it
        assert (out / "manifest.json").read_bytes() == manifest_before
        assert len(wavs) == len(first) + 12 and m["complete"] is True
    elif where == "rename":  # nothing new reached its name; the first manifest stands
        assert wavs == sorted(first) and m["complete"] is False
        assert (out / "manifest.json").read_bytes() == manifest_before
    else:
        assert set(first) <= set(wavs) and len(wavs) == len(first) + (4 if where == "wav" else 5)
        assert m["complete"] is False
    assert [r["run"] for r in m["runs"]] == [1, 2]
    # the next run into the folder folds what was left and goes on after it
    again = generate_sounds(model_file, out, n=2, seed=3)["files"]
    assert set(again).isdisjoint(wavs)
    _check_outputs(out, complete=True)


_FULL_DISK = """
set -e
mount -t tmpfs -o size=192k shotsmith-full "$1"
set +e
"$2" -m pipeline generate "$3" --out "$1/out" -n 40 --seed 1 --iterations 1 2>"$1/err"
echo "rc=$?"
cat "$1/err"
"$2" -c "
import json, sys, pathlib
from pipeline.manifest import load_manifest
out = pathlib.Path(sys.argv[1])
m = load_manifest(out)
print(json.dumps({'items': sorted(it['file'] for it in m['items']),
                  'wavs': sorted(p.name for p in out.glob('*.wav'))}))
" "$1/out"
"""


@pytest.mark.slow
def test_a_real_full_disk_during_generate_names_the_reason(model_file, own_tmp):
    """A 192 KiB tmpfs in a private mount namespace (util-linux unshare): the system's own
    ENOSPC, not a simulated one, reaches the user as its words."""
    import shutil

    unshare = shutil.which("unshare")
    probe = unshare and subprocess.run([unshare, "-rm", "true"], capture_output=True)
    if not probe or probe.returncode != 0:
        pytest.skip("needs unshare -rm (user and mount namespaces) to mount a small tmpfs")
    mnt = own_tmp / "disk"
    mnt.mkdir()
    done = subprocess.run([unshare, "-rm", "sh", "-c", _FULL_DISK, "sh", str(mnt),
                           sys.executable, str(model_file)], capture_output=True, text=True,
                          timeout=300)
    lines = done.stdout.strip().splitlines()
    assert lines and lines[0] == "rc=1", done.stdout + done.stderr
    assert len(lines) == 3 and lines[1].startswith(f"error: {mnt}/out/"), lines
    assert lines[1].endswith(": cannot write (No space left on device)"), lines
    seen = json.loads(lines[2])
    assert seen["items"] == seen["wavs"] and 0 < len(seen["wavs"]) < 40


@pytest.mark.parametrize("where", ["index", "clips", "spectra", "rows"])
def test_full_disk_during_ingest_keeps_the_previous_bank(tmp_path, monkeypatch, where):
    from pipeline import bank, files
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

    if where in ("index", "clips"):  # the new index.json or clip table cannot be written
        real_write = files._write_all
        mark = b'"clip_count"' if where == "index" else b'"mtime_ns"'

        def write_all(fd, data):
            if mark in bytes(data):
                full()
            return real_write(fd, data)

        monkeypatch.setattr(files, "_write_all", write_all)
        named = tmp_path / "bank" / ("index.json" if where == "index" else "clips.jsonl")
    elif where == "spectra":  # the rename of the spectra fails after the clip table's
        real_commit = files.commit

        def commit(tmp, path, **k):
            if Path(path).name == "spectra.npy":
                Path(tmp).unlink()
                raise files.cannot_write(path, OSError(errno.ENOSPC, "No space left on device"))
            return real_commit(tmp, path, **k)

        monkeypatch.setattr(files, "commit", commit)
        named = tmp_path / "bank" / "spectra.npy"
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
    assert kept.clips == old.clips
    assert not [p.name for p in (tmp_path / "bank").iterdir() if p.name.startswith(".")]
    index = json.loads((tmp_path / "bank" / "index.json").read_text("utf-8"))
    assert [p.name for p in (tmp_path / "bank").glob("clips-*")] == [index["clips_file"]]


def test_what_killed_ingests_left_in_the_bank_is_removed(tmp_path):
    from pipeline.ingest import ingest_folder

    src, bank = tmp_path / "src", tmp_path / "bank"
    src.mkdir()
    for i in range(2):
        (src / f"s{i}.wav").write_bytes(wav_bytes(hit(16000, seed=i), 16000))
    ingest_folder(src, bank, load_settings("tiny"), jobs=1)
    dead = int(Path("/proc/sys/kernel/pid_max").read_text()) + 1  # no such process
    left = [bank / f".ingest-staging.npy.tmp-{dead}-a1b2c3", bank / f".spectra.npy.tmp-{dead}",
            bank / f".index.json.tmp-{dead}-00ff00", bank / f".clips.jsonl.tmp-{dead}-0a0b0c"]
    live = bank / f".ingest-staging.npy.tmp-{os.getpid()}-a1b2c3"  # an ingest running now
    mine = bank / f".notes.txt.tmp-{dead}"  # not a bank file: not ours to remove
    for p in (*left, live, mine):
        p.write_bytes(b"\0" * 4096)
    ingest_folder(src, bank, load_settings("tiny"), jobs=1)
    assert sorted(p.name for p in bank.iterdir() if p.name.startswith(".")) == sorted(
        [live.name, mine.name])


def test_full_disk_while_saving_a_model_keeps_the_last_one(bank, tmp_path, monkeypatch):
    from pipeline import files
    from pipeline.modelfile import load_model_file
    from pipeline.train import train_model

    bank_dir, preset = bank
    settings = load_settings(preset, {"train": {"epochs": 4, "seed": 2},
                                      "model": {"latent_dim": 4}})
    real_write = files._write_all
    saves = []

    def full_write(fd, data):
        saves.append(fd)
        if len(saves) > 2:  # model and checkpoint of epoch 1 went through
            raise OSError(errno.ENOSPC, "No space left on device")
        return real_write(fd, data)

    monkeypatch.setattr(files, "_write_all", full_write)
    model = tmp_path / "model.pt"
    with pytest.raises(OutputError) as info:
        train_model(bank_dir, model, settings)
    monkeypatch.undo()
    assert str(info.value) in (f"{model}: cannot write (No space left on device)",
                               f"{model}.ckpt: cannot write (No space left on device)")
    mf = load_model_file(model)
    assert mf.best["epoch"] == 1
    assert sorted(p.name for p in tmp_path.iterdir()) == ["model.pt", "model.pt.ckpt"]


# --- round two (issue 13): what a killed ingest leaves running or behind ---------------------


def _children(pid: int) -> list[int]:
    try:
        return [int(x) for x in Path(f"/proc/{pid}/task/{pid}/children").read_text().split()]
    except OSError:
        return []


def _running(pid: int) -> bool:
    try:  # a zombie (state Z) has ended; its parent just has not collected it
        return Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0] != "Z"
    except OSError:
        return False


@pytest.mark.slow
@pytest.mark.skipif(not Path("/proc/self/task").is_dir(), reason="reads /proc (Linux)")
def test_sigkill_during_parallel_ingest_takes_the_decoders_along(own_tmp):
    """SIGKILL runs no clean-up: the decoder workers must still end with their parent (they
    held the caller's stdout for ever), and the next ingest removes the staging file left."""
    src, bank = own_tmp / "src", own_tmp / "bank"
    src.mkdir()
    rng = np.random.default_rng(0)
    for i in range(80):  # 3 s noise at 44.1 kHz: resampling keeps the workers busy
        sf.write(src / f"s{i:02d}.wav", 0.1 * rng.standard_normal(3 * 44100), 44100)
    digest = tree_digest(src)
    proc = _cli("ingest", str(src), "--bank", str(bank), "--jobs", "2", "--preset", "tiny")
    assert _wait_for(lambda: len(_children(proc.pid)) >= 2, proc), proc.communicate()
    workers = _children(proc.pid)
    time.sleep(0.3)
    proc.kill()
    proc.communicate(timeout=30)
    deadline = time.monotonic() + 10
    while any(_running(w) for w in workers) and time.monotonic() < deadline:
        time.sleep(0.05)
    assert not [w for w in workers if _running(w)], "decoder workers outlived their parent"
    left = [p.name for p in bank.iterdir() if p.name.startswith(".")] if bank.exists() else []
    again = _cli("ingest", str(src), "--bank", str(bank), "--jobs", "2", "--preset", "tiny")
    out, err = again.communicate(timeout=300)
    assert again.returncode == 0, err
    assert [p.name for p in bank.iterdir() if p.name.startswith(".")] == [], left
    assert tree_digest(src) == digest


def test_ctrl_c_in_the_first_epoch_of_train_json_is_one_json_object(bank, tmp_path, monkeypatch):
    """Issue 13: Ctrl-C before the first epoch ends (no best loss yet) exits 130 with one
    valid JSON object on stdout (no NaN), and again when it comes before training starts."""
    import pipeline.progress

    bank_dir, _ = bank

    def strict(text: str) -> dict:
        return json.loads(text, parse_constant=lambda c: pytest.fail(f"{c} in the JSON"))

    def ctrl_c_at_start(*a, **kw):  # the progress bar's first call is the 'start' event
        from contextlib import contextmanager

        @contextmanager
        def bar_cm():
            yield lambda *a, **kw: os.kill(os.getpid(), signal.SIGINT)
        return bar_cm()

    monkeypatch.setattr(pipeline.progress, "progress_bar", ctrl_c_at_start)
    model = tmp_path / "m.pt"
    result = runner.invoke(app, ["train", str(bank_dir), "--model", str(model), "--epochs", "3",
                                 "--json"])
    assert result.exit_code == 130, result.output
    lines = result.stdout.strip().splitlines()
    assert len(lines) == 1, result.stdout
    s = strict(lines[0])
    assert s["stopped"] == "interrupted" and s["model"] is None and not model.exists()
    assert s["best_val_loss"] is None and s["resume_command"].endswith("--resume")

    def interrupted_early(*a, **kw):
        raise KeyboardInterrupt

    import pipeline.train

    monkeypatch.setattr(pipeline.train, "train_model", interrupted_early)
    result = runner.invoke(app, ["train", str(bank_dir), "--model", str(tmp_path / "n.pt"),
                                 "--json"])
    assert result.exit_code == 130 and result.stderr.strip() == "interrupted"
    assert strict(result.stdout) == {"stopped": "interrupted", "exit_code": 130}
