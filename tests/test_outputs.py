"""The output side: whole files with the folder's usual permissions, names that keep their step
and stay unique, tagged WAVs, and the manifest as JSON plus an append-only log."""

from __future__ import annotations

import errno
import json
import os
import signal
import time
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from badfiles import tree_digest

from pipeline import __version__, files, manifest, outputs, render, spectra
from pipeline.config import RenderSpec, load_settings
from pipeline.errors import OutputError
from pipeline.manifest import load_manifest

SR = 48000
TINY = load_settings("tiny")
DEAD_PID = int(Path("/proc/sys/kernel/pid_max").read_text()) + 1 if Path(
    "/proc/sys/kernel/pid_max").exists() else 2**22 + 1  # no such process


def _full(*a, **k):
    raise OSError(errno.ENOSPC, "No space left on device")


# --- files.py ------------------------------------------------------------------------------


def test_pcm_24_round_trip_within_one_lsb(tmp_path, rng):
    y = 0.5 * np.sin(2 * np.pi * 1000 * np.arange(SR) / SR) + 0.01 * rng.standard_normal(SR)
    path = outputs.write_wav(tmp_path / "x.wav", y, SR, bit_depth="24")
    back, sr = sf.read(path, dtype="float64")
    # soundfile / libsndfile SF_FORMAT_PCM_24 (tests/references.md section 10): error <= 2^-23
    assert sr == SR and sf.info(path).subtype == "PCM_24"
    assert np.max(np.abs(back - y)) <= 2**-23
    out, _ = render.finish_audio(y, SR, RenderSpec(bit_depth="24"))
    path = outputs.write_wav(tmp_path / "f.wav", out, SR, bit_depth="24")
    np.testing.assert_array_equal(sf.read(path, dtype="float32")[0], out)  # bit exact


@pytest.mark.parametrize(("bit_depth", "subtype"), [("16", "PCM_16"), ("32f", "FLOAT")])
def test_other_bit_depths_write_exactly_what_was_finished(tmp_path, rng, bit_depth, subtype):
    out, _ = render.finish_audio(rng.standard_normal(SR // 2), SR, RenderSpec(bit_depth=bit_depth),
                                 rng=rng)
    path = outputs.write_wav(tmp_path / "x.wav", out, SR, bit_depth=bit_depth)
    assert sf.info(path).subtype == subtype
    np.testing.assert_array_equal(sf.read(path, dtype="float32")[0], out)


def test_existing_file_is_kept_without_overwrite(tmp_path):
    path = outputs.write_wav(tmp_path / "a.wav", np.full(100, 0.25), SR)
    before = path.read_bytes()
    with pytest.raises(OutputError, match=r"a\.wav: already exists"):
        outputs.write_wav(path, np.full(100, -0.5), SR)
    assert path.read_bytes() == before
    outputs.write_wav(path, np.full(100, -0.5), SR, overwrite=True)
    assert path.read_bytes() != before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a.wav"]  # no temporary left


def test_full_disk_is_an_output_error_and_leaves_nothing(tmp_path, monkeypatch):
    monkeypatch.setattr(files, "_write_all", _full)
    with pytest.raises(OutputError, match=r"x\.wav: cannot write \(No space left on device\)"):
        outputs.write_wav(tmp_path / "x.wav", np.zeros(10), SR)
    with pytest.raises(OutputError, match=r"j\.json: cannot write \(No space left on device\)"):
        files.write_json_atomic(tmp_path / "j.json", {"a": 1})
    assert list(tmp_path.iterdir()) == []


def test_one_reason_for_every_os_error():
    assert files.reason(OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))) == (
        "No space left on device")  # glibc's strerror(ENOSPC)
    assert files.reason(PermissionError(errno.EACCES, "Permission denied")) == "permission denied"
    assert files.reason(OSError("plain text")) == "plain text"


@pytest.mark.parametrize("umask", [0o022, 0o027])
def test_files_get_the_folders_usual_permissions(tmp_path, rng, umask):
    old = os.umask(umask)
    try:
        files.write_json_atomic(tmp_path / "a.json", {"a": 1})
        outputs.write_wav(tmp_path / "a.wav", np.zeros(100), SR)
        U = _U(rng, 1)
        render.render_spectra([(U, [{"stem": "r"}])], tmp_path / "out", TINY.audio,
                              RenderSpec(iterations=1))
    finally:
        os.umask(old)
    # open(2) creates files with 0o666 less the umask (POSIX); mkstemp would give 0600
    want = 0o666 & ~umask
    for p in (tmp_path / "a.json", tmp_path / "a.wav", tmp_path / "out" / "r.wav",
              tmp_path / "out" / "manifest.json"):
        assert p.stat().st_mode & 0o777 == want, p


def test_temporaries_of_killed_processes_are_removed_and_live_ones_kept(tmp_path):
    dead = tmp_path / f".a.wav.tmp-{DEAD_PID}-0a1b2c"
    old_style = tmp_path / f".m.pt.tmp-{DEAD_PID}"
    live = tmp_path / f".b.wav.tmp-{os.getpid()}-0a1b2c"
    mine = tmp_path / f".notes.txt.tmp-{DEAD_PID}"  # not a name the caller writes
    other = tmp_path / ".hidden-user-file"
    for p in (dead, old_style, live, mine, other):
        p.write_bytes(b"partial")
    assert files.remove_stale_temporaries(tmp_path, ["m.pt"]) == [old_style]
    assert files.remove_stale_temporaries(tmp_path, lambda n: n.endswith(".wav")) == [dead]
    assert {p.name for p in tmp_path.iterdir()} == {live.name, mine.name, other.name}
    assert len(files.temp_path(tmp_path / ("x" * 255)).name.encode()) <= 255


# --- names -----------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "text",
    ["../../etc/passwd", "/abs/path/kick", "C:\\Windows\\system32", "..", ".", "", "CON", "nul.txt",
     "com1", "a\x00b\x1fc\x7f", "  .hidden  ", "trailing dots...", "x" * 400, "東京の雨 " * 40,
     "a/../b", "\u202egnp.exe"],
)
def test_safe_names_cannot_escape_the_folder(tmp_path, text):
    for name in (outputs.safe_name(text), outputs.label_stem(text)):
        assert name and "/" not in name and "\\" not in name and ".." not in name
        assert not name.startswith(".") and not name.endswith((".", " "))
        assert len(name.encode("utf-8")) <= outputs.NAME_MAX_BYTES
        assert not any(ord(c) < 32 or c == "\x7f" for c in name)
        assert name.split(".")[0].lower() not in {"con", "nul", "com1"}
        target = (tmp_path / f"{name}.wav").resolve()
        assert target.parent == tmp_path.resolve()


def test_safe_names_keep_unicode_and_ordinary_text():
    assert outputs.safe_name("Schlagzeug über 東京") == "Schlagzeug über 東京"
    assert outputs.safe_name("kick_01-hard") == "kick_01-hard"
    assert outputs.label_stem("kick_01-hard") == "kick_01-hard"


def test_long_labels_keep_their_suffix_and_differ_by_a_hash_of_the_whole():
    a, b = "interpolate-" + "ä" * 150 + "-to-x", "interpolate-" + "ä" * 150 + "-to-y"
    sa, sb = outputs.label_stem(a), outputs.label_stem(b)
    assert sa != sb and sa[:-9] == sb[:-9] and sa[-9] == "~"
    assert len(sa.encode()) <= outputs.LABEL_MAX_BYTES
    assert outputs.label_stem(a) == sa  # the same label always gives the same name
    assert outputs.numbered(8, 3, width=2) == ["-08", "-09", "-10"]
    assert outputs.numbered(0, 101, width=2)[-1] == "-100" and outputs.numbered(0, 101, width=2)[
        0] == "-000"


def test_next_number_counts_after_the_files_already_there(tmp_path):
    assert outputs.next_number(tmp_path, "generate") == 0
    for name in ("generate-0000.wav", "generate-0007.wav", "generate-0003-2.wav", "other-0099.wav",
                 "generate-x.wav"):
        (tmp_path / name).write_bytes(b"")
    assert outputs.next_number(tmp_path, "generate") == 8
    long = "vary-" + "k" * 300
    (tmp_path / f"{outputs.label_stem(long)}-04.wav").write_bytes(b"")
    assert outputs.next_number(tmp_path, long) == 5


# --- WAV tags ----------------------------------------------------------------------------------


def _U(rng, b, audio=TINY.audio):
    t = np.arange(audio.n_samples) / audio.sample_rate
    y = np.stack([np.sin(2 * np.pi * (100 + 150 * i) * t) * np.exp(-6 * t) for i in range(b)])
    return spectra.clip_to_unit(0.9 * y, audio)


def test_every_wav_carries_riff_info_tags(tmp_path, rng):
    model = {"path": "m.pt", "sha256": "0123456789abcdef" * 4}
    items = [{"stem": "kick über", "suffix": "-03", "kind": "interpolate", "seed": 41,
              "sources": ["kick_00", "hat/東京.wav"]}]
    render.render_spectra([(_U(rng, 1), items)], tmp_path, TINY.audio, RenderSpec(iterations=1),
                          manifest_extra={"model": model})
    # read back by libsndfile through soundfile (an outside reader of RIFF INFO: INAM, ISFT, ICMT)
    with sf.SoundFile(tmp_path / "kick über-03.wav") as fh:
        assert fh.title == "kick über-03"
        assert fh.software.startswith(f"shotsmith {__version__}")
        assert fh.comment == ("kind=interpolate; seed=41; sources=kick_00, hat/東京.wav; "
                              "model=sha256:0123456789ab")
    render.render_spectra([(_U(rng, 1), [{"stem": "r", "kind": "resynth", "seed": 2,
                                          "sources": ["a/b.wav"]}])], tmp_path / "r", TINY.audio,
                          RenderSpec(iterations=1, bit_depth="16"))
    with sf.SoundFile(tmp_path / "r" / "r.wav") as fh:
        assert fh.comment == "kind=resynth; seed=2; sources=a/b.wav; model=none"


# --- the output folder and its manifest --------------------------------------------------------


def _batches(rng, sizes, start=0, stem="hit"):
    k = start
    for b in sizes:
        yield _U(rng, b), [{"stem": f"{stem} {k + i}", "kind": "test"} for i in range(b)]
        k += b


def test_unwritable_output_folder_is_one_clear_error(tmp_path):
    blocker = tmp_path / "file"
    blocker.write_text("x")
    with pytest.raises(OutputError, match="exists and is not a folder"):
        outputs.OutputFolder(blocker)
    with pytest.raises(OutputError, match="sub: cannot create the output folder"):
        outputs.OutputFolder(blocker / "sub")  # its parent is a file
    if os.geteuid() != 0:  # root writes into read-only folders anyway
        ro = tmp_path / "ro"
        ro.mkdir()
        ro.chmod(0o500)
        with pytest.raises(OutputError, match="not writable"):
            outputs.OutputFolder(ro)


def test_a_folder_is_written_by_one_run_at_a_time(tmp_path):
    first = outputs.OutputFolder(tmp_path)
    with pytest.raises(OutputError, match="another shotsmith run is writing into this folder"):
        outputs.OutputFolder(tmp_path)
    ready, started = os.pipe()
    pid = os.fork()  # a worker forked now (a decoder process) outlives the run below
    if pid == 0:
        os.write(started, b"1")
        time.sleep(30)
        os._exit(0)
    try:
        assert os.read(ready, 1) == b"1"  # the worker is running
        first.close(complete=False)
        outputs.OutputFolder(tmp_path).close(complete=False)  # the worker does not hold it
    finally:
        os.kill(pid, signal.SIGKILL)
        os.waitpid(pid, 0)
    assert list(tmp_path.iterdir()) == []  # runs that wrote nothing leave nothing


def test_the_manifest_is_not_rewritten_per_batch(tmp_path, rng, monkeypatch):
    """Per batch, only the new items are appended: the cost does not grow with the folder."""
    spec = RenderSpec(iterations=1, batch_size=2)
    render.render_spectra(_batches(rng, [2] * 20, stem="old"), tmp_path, TINY.audio, spec)
    whole, logged = [], []
    real_fold, real_append = manifest.fold, manifest.ManifestLog.append
    monkeypatch.setattr(manifest, "fold", lambda *a, **k: whole.append(1) or real_fold(*a, **k))

    def append(self, **record):
        logged.append(len(files.json_bytes(manifest.jsonable(record), indent=None)))
        return real_append(self, **record)

    monkeypatch.setattr(manifest.ManifestLog, "append", append)
    calls = []
    render.render_spectra(_batches(rng, [2, 2, 2], stem="new"), tmp_path, TINY.audio, spec,
                          progress=lambda done, total: calls.append(len(whole)))
    assert calls == [0, 0, 0] and len(whole) == 1  # manifest.json is written once, at the end
    assert len(logged) == 1 + 6 + 1  # the run's start, one line per item, its end
    assert max(logged[1:-1]) < 2000  # an item's line, whatever the folder holds
    m = load_manifest(tmp_path)
    assert len(m["items"]) == 46 and [r["run"] for r in m["runs"]] == [1, 2]
    assert not (tmp_path / manifest.LOG_FILE).exists()


def test_load_manifest_reads_every_run_and_the_log_of_an_interrupted_one(tmp_path, rng):
    spec = RenderSpec(iterations=1)
    a, b = {"path": "a.pt", "sha256": "aa"}, {"path": "b.pt", "sha256": "bb"}
    assert load_manifest(tmp_path) is None
    render.render_spectra(_batches(rng, [2]), tmp_path, TINY.audio, spec,
                          manifest_extra={"model": a, "request": {"n": 2}})
    render.render_spectra(_batches(rng, [2], start=2), tmp_path, TINY.audio, spec,
                          manifest_extra={"model": b, "request": {"n": 3}})
    # a third run that was killed: its items are only in the log, and one WAV is missing
    run3 = outputs.OutputFolder(tmp_path)
    run3.header = {"model": None, "request": {"command": "resynth"}}
    names = run3.claim(["late 0", "late 1"])
    for name in names:
        run3.write(name, np.zeros(64, np.float32), 16000, "24", {"kind": "resynth"})
    run3._log.close()  # the process dies here: no fold, the folder is free again
    run3._release()
    (tmp_path / names[1]).unlink()
    before = tree_digest(tmp_path)
    m = load_manifest(tmp_path)
    assert tree_digest(tmp_path) == before  # read-only
    got = [(it["file"], it["run"], it["model"]) for it in m["items"]]
    assert got == [("hit 0.wav", 1, a), ("hit 1.wav", 1, a), ("hit 2.wav", 2, b),
                   ("hit 3.wav", 2, b), ("late 0.wav", 3, None)]
    assert m["complete"] is False and m["request"] == {"command": "resynth"}
    assert [r["complete"] for r in m["runs"]] == [True, True, False]
    assert [r["request"] for r in m["runs"]][:2] == [{"n": 2}, {"n": 3}]
    # the next run folds the log first, drops the missing file, and numbers itself 4
    render.render_spectra(_batches(rng, [1], start=9), tmp_path, TINY.audio, spec)
    on_disk = json.loads((tmp_path / "manifest.json").read_text(encoding="utf-8"))
    assert [it["file"] for it in on_disk["items"]] == [
        "hit 0.wav", "hit 1.wav", "hit 2.wav", "hit 3.wav", "late 0.wav", "hit 9.wav"]
    assert [r["run"] for r in on_disk["runs"]] == [1, 2, 3, 4] and on_disk["complete"] is True
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(
        ["manifest.json", *(it["file"] for it in on_disk["items"])])


def test_a_log_line_cut_short_is_skipped_and_the_next_starts_clean(tmp_path, rng):
    render.render_spectra(_batches(rng, [1]), tmp_path, TINY.audio, RenderSpec(iterations=1))
    log = manifest.ManifestLog(tmp_path, 2)
    log.append(start={"model": None})
    log.append(item={"file": "hit 0.wav", "kind": "again"})
    log.close()
    with open(tmp_path / manifest.LOG_FILE, "ab") as fh:
        fh.write(b'{"run": 2, "item": {"file": "hit 0.w')  # killed mid-line
    log = manifest.ManifestLog(tmp_path, 2)
    log.append(failed={"file": "x.wav", "reason": "test"})
    log.close()
    m = load_manifest(tmp_path)
    assert [it["kind"] for it in m["items"]] == ["again"] and m["failed"][0]["file"] == "x.wav"


def test_older_manifests_are_read(tmp_path):
    (tmp_path / "a.wav").write_bytes(b"")
    (tmp_path / "b.wav").write_bytes(b"")
    (tmp_path / "manifest.json").write_text(json.dumps({
        "tool": "shotsmith", "version": "0.1.0", "model": {"path": "m.pt", "sha256": "cc"},
        "complete": True, "failed": [],
        "items": [{"file": "a.wav", "kind": "generate", "earlier_run": True},
                  {"file": "b.wav", "kind": "generate"}, {"file": "../../x.wav"}]}))
    m = load_manifest(tmp_path)
    assert [(it["file"], it["model"]) for it in m["items"]] == [
        ("a.wav", None), ("b.wav", {"path": "m.pt", "sha256": "cc"})]
    assert m["model"] == {"path": "m.pt", "sha256": "cc"} and m["complete"] is True


def test_foreign_or_newer_manifests_are_one_line_errors(tmp_path):
    (tmp_path / "manifest.json").write_text('{"my": "notes"}')
    with pytest.raises(OutputError, match="exists and is not a shotsmith manifest"):
        load_manifest(tmp_path)
    (tmp_path / "manifest.json").write_text('{"tool": "shotsmith", "format": 9, "items": []}')
    with pytest.raises(OutputError, match="manifest format 9 is newer"):
        load_manifest(tmp_path)
    (tmp_path / "manifest.json").write_text('{"tool": ')
    with pytest.raises(OutputError, match="unreadable manifest"):
        load_manifest(tmp_path)


def test_full_disk_while_logging_keeps_the_manifest_true(tmp_path, rng, monkeypatch):
    spec = RenderSpec(iterations=1, batch_size=2)
    render.render_spectra(_batches(rng, [2]), tmp_path, TINY.audio, spec)
    real, count = manifest.ManifestLog.append, {"n": 0}

    def append(self, **record):
        count["n"] += 1
        if count["n"] == 4:  # the start, two items, then the disk is full
            raise files.cannot_write(self.path, OSError(errno.ENOSPC, "No space left on device"))
        return real(self, **record)

    def no_json(path, data, **k):  # nor can manifest.json be written
        raise files.cannot_write(path, OSError(errno.ENOSPC, "No space left on device"))

    monkeypatch.setattr(manifest.ManifestLog, "append", append)
    monkeypatch.setattr(files, "write_json_atomic", no_json)
    with pytest.raises(OutputError) as info:
        render.render_spectra(_batches(rng, [2, 2], start=2), tmp_path, TINY.audio, spec)
    assert str(info.value) == (f"{tmp_path / manifest.LOG_FILE}: cannot write "
                               "(No space left on device)")
    monkeypatch.undo()
    m = load_manifest(tmp_path)  # manifest.json and the log left by the failed fold
    wavs = sorted(p.name for p in tmp_path.glob("*.wav"))
    assert sorted(it["file"] for it in m["items"]) == wavs and len(wavs) == 4
    assert not [p.name for p in tmp_path.iterdir() if p.name.startswith(".")]
