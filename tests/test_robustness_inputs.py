"""The bad-input corpus (tests/badfiles.py) through every command that reads audio.

ingest, resynth, and the audio-file arguments of interpolate and vary each meet every case;
each case must end in a clip or a listed reason, never an exception escaping, and SOURCE must
be byte-for-byte the same afterwards. An hours-long file is read lazily: peak memory is
measured in a fresh process.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from badfiles import CLIP, EITHER, HIDDEN, build_corpus, tree_digest

from pipeline import frontend, scan
from pipeline.bank import REPORT_FILE, open_bank
from pipeline.config import RenderSpec, load_settings
from pipeline.errors import AudioError, ShotsmithError
from pipeline.ingest import ingest_folder, load_clip
from pipeline.manifest import load_manifest

TINY = load_settings("tiny", {"render": {"iterations": 2}})
SPEC = TINY.audio
# Reasons that only the folder scan gives; a file path handed straight to load_clip gets the
# front end's own reason (or, for a second name of a good file, a clip).
SCAN_ONLY = ("symlink loop", "broken symbolic link", "not a regular file", "same file as")


@pytest.fixture(scope="module")
def corpus(tmp_path_factory):
    root = tmp_path_factory.mktemp("corpus") / "library"
    cases = build_corpus(root)
    yield root, cases
    os.chmod(root / "fs" / "locked.wav", 0o644)


def _matches(case, outcome: str) -> bool:
    """``outcome`` is CLIP or the listed reason."""
    if case.expect in (EITHER, HIDDEN):
        return True
    if case.expect == CLIP:
        return outcome == CLIP
    return outcome != CLIP and case.expect in outcome


def test_corpus_is_broad(corpus):
    _, cases = corpus
    assert len(cases) >= 100
    kinds = {c.expect for c in cases}
    assert {CLIP, EITHER, "empty file (0 bytes)", "NaN or infinite", "symlink loop"} <= kinds


def test_front_end_gives_a_clip_or_an_audio_error_for_every_file(corpus):
    root, cases = corpus
    outcomes = {}
    for case in cases:
        path = root / case.rel.rstrip("/")
        try:
            clip = load_clip(path, SPEC)
        except AudioError as exc:  # anything else escaping fails the test
            msg = str(exc)
            assert msg.startswith(f"{path}: ") and "\n" not in msg.replace(str(path), ""), msg
            outcomes[case.rel.rstrip("/")] = msg[len(str(path)) + 2 :]
        else:
            assert clip.shape == (SPEC.n_samples,) and clip.dtype == np.float32
            assert np.all(np.isfinite(clip))
            peak = float(np.max(np.abs(clip)))
            assert peak == pytest.approx(10 ** (SPEC.peak_db / 20), rel=1e-4), case.rel
            outcomes[case.rel.rstrip("/")] = CLIP
    for case in cases:
        got = outcomes[case.rel.rstrip("/")]
        if case.rel.endswith("/"):  # folders
            assert got != CLIP, case
        elif any(case.expect.startswith(s) for s in SCAN_ONLY):
            assert got == CLIP if case.expect == "same file as" else got != CLIP, case
        else:
            assert _matches(case, got), (case, got)
    assert outcomes["fs/folder.wav"] == "is a folder, not an audio file"
    assert outcomes["fs/pipe.wav"].startswith("not a regular file")


def _check_report(root: Path, cases, accepted: set[str], reasons: dict[str, str]) -> None:
    for case in cases:
        if case.rel == "fs/folder.wav/":  # a folder: scanned, never listed itself
            assert case.rel not in reasons and case.rel[:-1] not in accepted
            continue
        if case.expect == HIDDEN:
            assert case.rel not in accepted and case.rel not in reasons, case
            continue
        got = CLIP if case.rel in accepted else reasons.get(case.rel)
        assert got is not None, f"{case.rel!r} ({case.what}) is neither a clip nor listed"
        assert _matches(case, got), (case, got)
        if got != CLIP:
            assert got and "\n" not in got and "Traceback" not in got, got
    expected = {c.rel for c in cases if c.rel != "fs/folder.wav/" and c.expect != HIDDEN}
    assert accepted | set(reasons) == expected  # nothing extra, nothing missing


@pytest.mark.parametrize("jobs", [1, 2])
def test_ingest_lists_every_case_and_leaves_source_alone(corpus, tmp_path, jobs):
    root, cases = corpus
    before = tree_digest(root)
    summary = ingest_folder(root, tmp_path / "bank", TINY, jobs=jobs)
    assert tree_digest(root) == before
    bank = open_bank(tmp_path / "bank")
    report = json.loads((tmp_path / "bank" / REPORT_FILE).read_text(encoding="utf-8"))
    reasons = {s["path"]: s["reason"] for s in report["skipped"]}
    accepted = {c["path"] for c in bank.clips}
    _check_report(root, cases, accepted, reasons)
    assert summary.accepted == len(bank) and summary.skipped == len(reasons)
    assert len(set(bank.names)) == len(bank)
    spectra = np.asarray(bank.spectra, dtype=np.float32)
    assert np.all(np.isfinite(spectra)) and spectra.min() >= 0.0 and spectra.max() <= 1.0
    assert not list((tmp_path / "bank").glob(".*"))  # no temporary files left behind


def test_permission_denied_file_and_folder_are_reasons(corpus, tmp_path, monkeypatch):
    """Running as root, chmod cannot lock anything: simulate EACCES on one file and one
    folder (the real chmod case runs below when not root)."""
    root, _ = corpus
    locked_file = os.fspath(root / "layout" / "2 channels.wav")
    locked_dir = os.fspath(root / "rates")
    real_open, real_scandir = open, os.scandir

    def deny_open(path, *args, **kwargs):
        if os.fspath(path) == locked_file:
            raise PermissionError(13, "Permission denied", path)
        return real_open(path, *args, **kwargs)

    def deny_scandir(path="."):
        if os.fspath(path) == locked_dir:
            raise PermissionError(13, "Permission denied", path)
        return real_scandir(path)

    monkeypatch.setattr(frontend, "open", deny_open, raising=False)
    monkeypatch.setattr(scan.os, "scandir", deny_scandir)
    ingest_folder(root, tmp_path / "bank", TINY, jobs=1)
    report = json.loads((tmp_path / "bank" / REPORT_FILE).read_text(encoding="utf-8"))
    reasons = {s["path"]: s["reason"] for s in report["skipped"]}
    assert reasons["layout/2 channels.wav"] == "cannot be read: permission denied"
    assert reasons["rates/"] == "folder not readable: permission denied"
    assert not any(p.startswith("rates/") and p != "rates/" for p in reasons)


@pytest.mark.skipif(os.name != "posix" or os.geteuid() == 0, reason="root reads mode 000 files")
def test_real_chmod_000_file_and_folder(tmp_path):
    src = tmp_path / "src"
    (src / "shut").mkdir(parents=True)
    sf.write(src / "ok.wav", 0.5 * np.sin(np.arange(4000) * 0.1), 16000)
    sf.write(src / "locked.wav", 0.5 * np.sin(np.arange(4000) * 0.1), 16000)
    sf.write(src / "shut" / "inside.wav", 0.5 * np.sin(np.arange(4000) * 0.1), 16000)
    os.chmod(src / "locked.wav", 0)
    os.chmod(src / "shut", 0)
    try:
        ingest_folder(src, tmp_path / "bank", TINY, jobs=1)
    finally:
        os.chmod(src / "locked.wav", 0o644)
        os.chmod(src / "shut", 0o755)
    report = json.loads((tmp_path / "bank" / REPORT_FILE).read_text(encoding="utf-8"))
    reasons = {s["path"]: s["reason"] for s in report["skipped"]}
    assert "permission denied" in reasons["locked.wav"]
    assert "permission denied" in reasons["shut/"]


def test_resynth_lists_every_case_writes_only_into_out_and_leaves_source_alone(corpus, tmp_path):
    from pipeline.resynth import resynth_folder

    root, cases = corpus
    before = tree_digest(root)
    out = tmp_path / "out"
    s = resynth_folder(root, out, TINY, jobs=1)
    assert tree_digest(root) == before
    manifest = load_manifest(out)
    accepted = {it["source"] for it in manifest["items"]}
    reasons = {sk["path"]: sk["reason"] for sk in manifest["skipped"]}
    reasons |= {f["source"]: f["reason"] for f in manifest.get("failed", [])}
    _check_report(root, cases, accepted, reasons)
    # Every output is a plain, finished WAV directly in --out, named safely, and listed.
    present = sorted(p.name for p in out.iterdir())
    assert present == sorted([it["file"] for it in manifest["items"]] + ["manifest.json"])
    assert s["written"] == len(manifest["items"])
    for name in present:
        p = out / name
        if name == "manifest.json":
            continue
        assert p.is_file() and not p.is_symlink() and p.parent == out
        assert len(name.encode()) <= 255 and not name.startswith(".") and "/" not in name
        y, sr = sf.read(p)
        assert sr == SPEC.sample_rate and np.all(np.isfinite(y))
        assert np.max(np.abs(y)) <= 10 ** (TINY.render.peak_db / 20) + 2**-23


# --- audio files as interpolate / vary arguments ----------------------------------------------


@pytest.fixture(scope="module")
def untrained_model(tmp_path_factory):
    from modelfiles import write_model_file

    return write_model_file(tmp_path_factory.mktemp("model") / "model.pt", TINY)


def test_file_arguments_resolve_to_a_code_or_one_clear_error(corpus, untrained_model):
    from pipeline.create import resolve_sound
    from pipeline.modelfile import load_model_file

    root, cases = corpus
    mf = load_model_file(untrained_model)
    n_codes = 0
    for case in cases:
        path = root / case.rel.rstrip("/")
        try:
            wp = resolve_sound(mf, str(path))
        except ShotsmithError as exc:  # AudioError for a bad file, ParameterError for a non-file
            msg = str(exc)
            assert "\n" not in msg.replace(str(path), "") and str(path) in msg, msg
            assert case.expect != CLIP or not case.is_file or case.rel.endswith("/"), (case, msg)
        else:
            assert case.is_file and case.expect in (CLIP, EITHER, HIDDEN, "same file as"), case
            assert wp.mu.shape == (mf.latent_dim,) and np.all(np.isfinite(wp.mu))
            n_codes += 1
    assert n_codes >= 60


def test_interpolate_and_vary_with_odd_files_leave_them_alone(corpus, untrained_model, tmp_path):
    from pipeline.create import interpolate_sounds, vary_sound

    root, _ = corpus
    a = root / "names" / ("é" * 125 + ".wav")
    b = root / "lies" / "claims a billion frames.wav"
    c = root / "long" / "hours long.wav"
    before = tree_digest(root)
    s = interpolate_sounds(untrained_model, [str(a), str(b), str(c)], tmp_path / "i", steps=3,
                           seed=1, render=RenderSpec(iterations=1))
    v = vary_sound(untrained_model, str(root / "names" / "line\nbreak.wav"), tmp_path / "v",
                   n=2, seed=1, render=RenderSpec(iterations=1))
    assert tree_digest(root) == before
    for summary, folder in ((s, tmp_path / "i"), (v, tmp_path / "v")):
        names = sorted(p.name for p in folder.iterdir())
        assert names == sorted(summary["files"] + ["manifest.json"])
        assert all("\n" not in n and len(n.encode()) <= 255 for n in names)
    with pytest.raises(AudioError, match=r"nan\.wav: corrupt samples"):
        vary_sound(untrained_model, str(root / "values" / "nan.wav"), tmp_path / "x", n=1)
    assert not (tmp_path / "x").exists() or not list((tmp_path / "x").glob("*.wav"))


# --- hours-long files: bounded memory ---------------------------------------------------------


_MEMORY_PROBE = textwrap.dedent(
    """
    import json, resource, sys
    sys.path.insert(0, sys.argv[1])
    from pathlib import Path
    from badfiles import hit, sparse_wav, wav_bytes
    from pipeline.config import load_settings
    from pipeline.ingest import ingest_folder, load_clip

    work = Path(sys.argv[2])
    settings = load_settings("tiny")
    rss = lambda: resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    (work / "short").mkdir()
    (work / "short" / "one second.wav").write_bytes(wav_bytes(hit(48000, seconds=1.0, ch=2), 48000))
    load_clip(work / "short" / "one second.wav", settings.audio)
    ingest_folder(work / "short", work / "bank-short", settings, jobs=1)
    base = rss()
    (work / "long").mkdir()
    size = sparse_wav(work / "long" / "hours.wav", sr=48000, channels=2, hours=float(sys.argv[3]))
    clip = load_clip(work / "long" / "hours.wav", settings.audio)
    after_clip = rss()
    s = ingest_folder(work / "long", work / "bank-long", settings, jobs=1)
    print(json.dumps({"base": base, "after_clip": after_clip, "after_ingest": rss(),
                      "size": size, "accepted": s.accepted, "duration": s.audio_seconds}))
    """
)


def test_hours_long_file_is_read_lazily_in_bounded_memory(tmp_path):
    hours = 3.0  # 48 kHz stereo 16-bit: a 2.07 GB file (sparse), 4.1 GB as float32 samples
    tests_dir = str(Path(__file__).parent)
    run = subprocess.run([sys.executable, "-c", _MEMORY_PROBE, tests_dir, str(tmp_path),
                          str(hours)], capture_output=True, text=True, timeout=120)
    assert run.returncode == 0, run.stderr[-2000:]
    m = json.loads(run.stdout.strip().splitlines()[-1])
    assert m["accepted"] == 1 and m["duration"] == pytest.approx(hours * 3600)
    whole = m["size"] * 2  # float32 of every 16-bit sample
    grown = max(m["after_clip"], m["after_ingest"]) - m["base"]
    # Bounded: a few seconds of audio plus the resampler, far from the whole file.
    assert grown < 64 * 2**20, f"peak RSS grew by {grown / 2**20:.1f} MiB"
    assert grown < whole / 50


@pytest.mark.skipif(sys.platform != "linux", reason="byte file names are a POSIX matter")
def test_paths_that_are_not_utf8_reach_every_json_file(tmp_path, untrained_model):
    """A SOURCE folder and a file argument whose names are not UTF-8 (Latin-1 bytes)."""
    from badfiles import hit, wav_bytes

    from pipeline.create import vary_sound
    from pipeline.resynth import resynth_folder

    src = Path(os.fsdecode(os.fsencode(tmp_path) + b"/Ger\xe4usche"))
    src.mkdir()
    odd = Path(os.fsdecode(os.fsencode(src) + b"/caf\xe9.wav"))
    odd.write_bytes(wav_bytes(hit(16000), 16000))
    before = tree_digest(src)
    ingest_folder(src, tmp_path / "bank", TINY, jobs=1)
    report = json.loads((tmp_path / "bank" / REPORT_FILE).read_text(encoding="utf-8"))
    assert report["source"] == str(src)  # a \udcXX escape that reads back as the same path
    resynth_folder(src, tmp_path / "re", TINY, jobs=1)
    v = vary_sound(untrained_model, str(odd), tmp_path / "v", n=1, seed=0,
                   render=RenderSpec(iterations=1))
    manifest = load_manifest(tmp_path / "v")
    assert manifest["items"][0]["sources"] == [str(odd)]
    assert Path(manifest["request"]["sound"]).is_file()
    assert v["files"] == ["vary-caf-00.wav"]
    assert tree_digest(src) == before


def test_inspect_tells_another_bank_with_the_same_names_by_its_sounds(tmp_path):
    """Issue 13: a different bank whose clips share the names is not the same bank."""
    import torch
    from badfiles import hit, wav_bytes
    from modelfiles import model_dict

    from pipeline.inspection import inspect_model
    from pipeline.modelfile import names_digest, save_atomic

    banks = {}
    for which, f0 in (("mine", 110.0), ("other", 2500.0)):
        src = tmp_path / f"{which} kit"
        src.mkdir()
        for i in range(6):  # the names model_dict gives its clips
            name = f"{'kick' if i % 2 == 0 else 'hat'}_{i:02d}.wav"
            (src / name).write_bytes(wav_bytes(hit(16000, f0=f0 * (1 + i / 8), seed=i), 16000))
        ingest_folder(src, tmp_path / which, TINY, jobs=1)
        banks[which] = open_bank(tmp_path / which)
    assert banks["mine"].names == banks["other"].names
    d = model_dict(TINY)
    d["bank"] = {"path": str(tmp_path / "mine"), "n_clips": 6,
                 "names_sha256": names_digest(banks["mine"].names),
                 "fingerprint": banks["mine"].fingerprint()}
    save_atomic(d, tmp_path / "m.pt")
    assert isinstance(torch.load(tmp_path / "m.pt", weights_only=True)["bank"], dict)
    same = {which: inspect_model(tmp_path / "m.pt", tmp_path / f"x {which}",
                                 bank=tmp_path / which)["reconstruction"]["same_bank"]
            for which in banks}
    assert same == {"mine": True, "other": False}


def _deep(root: Path, depth: int, wav: bytes) -> None:
    """``depth`` nested folders of 200-byte names with a WAV at the bottom, made through
    folder descriptors (past PATH_MAX no absolute path reaches them)."""
    fd = os.open(root, os.O_RDONLY)
    try:
        for k in range(depth):
            name = f"{k:02d}" + "d" * 198
            os.mkdir(name, dir_fd=fd)
            nxt = os.open(name, os.O_RDONLY, dir_fd=fd)
            os.close(fd)
            fd = nxt
        out = os.open("deep hit.wav", os.O_WRONLY | os.O_CREAT, 0o644, dir_fd=fd)
        os.write(out, wav)
        os.close(out)
    finally:
        os.close(fd)


@pytest.mark.skipif(sys.platform != "linux", reason="PATH_MAX 4096 and libsndfile's 1024")
def test_long_paths_are_read_or_named_with_a_reason(tmp_path):
    """Issue 13: a file at an absolute path of 1024 bytes or more read as "System error.";
    folders past the system's path limit were dropped silently (counted as ignored)."""
    from badfiles import hit, wav_bytes

    src = tmp_path / "kit"
    src.mkdir()
    wav = wav_bytes(hit(16000), 16000)
    (src / "near").mkdir()
    _deep(src / "near", 6, wav)  # about 1.3 KB: over libsndfile's buffer, under PATH_MAX
    (src / "far").mkdir()
    _deep(src / "far", 24, wav)  # about 4.9 KB: past PATH_MAX
    summary = ingest_folder(src, tmp_path / "bank", TINY, jobs=1)
    report = json.loads((tmp_path / "bank" / REPORT_FILE).read_text("utf-8"))
    assert summary.accepted == 1 and summary.ignored == 0, report
    long = [s for s in report["skipped"] if "path too long" in s["reason"]]
    assert len(long) == 1 and long[0]["path"].startswith("far/"), report["skipped"]
    near = next(p for p in (src / "near").rglob("*.wav"))
    assert len(os.fsencode(near)) >= 1024
    assert load_clip(near, SPEC).shape == (SPEC.n_samples,)
    assert near.read_bytes() == wav  # the library as it was (a tree digest cannot walk it)
