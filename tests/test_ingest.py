"""Ingest: the audio front end's pure functions, lazy reading, a messy library, the cache."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from math import gcd
from pathlib import Path

import numpy as np
import pytest
import scipy.signal
import soundfile as sf
from badfiles import tree_digest

from pipeline import frontend
from pipeline.bank import INDEX_FILE, REPORT_FILE, open_bank
from pipeline.config import load_settings
from pipeline.errors import AudioError, BankError, ParameterError, ShotsmithError
from pipeline.ingest import (
    align_onset,
    fit_length,
    ingest_folder,
    load_clip,
    mix_to_mono,
    normalise_peak,
    resample,
)

TINY = load_settings("tiny")  # 16 kHz, 0.5 s, n_fft 512 / hop 128
SPEC = TINY.audio


def hit(sr: int, *, seconds: float = 0.3, f0: float = 220.0, amp: float = 0.5, ch: int = 1,
        seed: int = 0) -> np.ndarray:
    """A decaying tone with a little noise: a stand-in one-shot, ``(n,)`` or ``(n, ch)``."""
    rng = np.random.default_rng(seed)
    t = np.arange(int(seconds * sr)) / sr
    y = amp * np.exp(-6.0 * t) * (np.sin(2 * np.pi * f0 * t) + 0.05 * rng.standard_normal(t.size))
    return y if ch == 1 else np.stack([y * (1.0 - 0.1 * c) for c in range(ch)], axis=1)


def write(path: Path, y: np.ndarray, sr: int, **kw) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    sf.write(path, y, sr, **kw)
    return path


# --- pure functions ---------------------------------------------------------------------------


@pytest.mark.parametrize("sr_in, sr_out, f0", [(44100, 16000, 1000.0), (8000, 16000, 440.0),
                                               (96000, 22050, 3000.0)])
def test_resample_keeps_tone_and_agrees_with_scipy(sr_in, sr_out, f0):
    t = np.arange(sr_in // 2) / sr_in
    x = (0.5 * np.sin(2 * np.pi * f0 * t)).astype(np.float32)
    y = resample(x, orig_sr=sr_in, target_sr=sr_out)
    assert y.dtype == np.float32 and len(y) == round(len(x) * sr_out / sr_in)
    spectrum = np.abs(np.fft.rfft(y * np.hanning(len(y))))
    assert np.argmax(spectrum) * sr_out / len(y) == pytest.approx(f0, abs=sr_out / len(y))
    # Reference: scipy.signal.resample_poly (polyphase FIR, Kaiser window beta 5). Away from the
    # edges the two band-limited resamplers agree within 2e-3 of full scale (measured 7e-4;
    # resample_poly's own passband error dominates: soxr is within 1e-5 of the ideal sine).
    g = gcd(sr_in, sr_out)
    ref = scipy.signal.resample_poly(x.astype(np.float64), sr_out // g, sr_in // g)
    m = len(y) // 10
    assert np.max(np.abs(y[m:-m] - ref[m:-m])) < 2e-3
    ideal = 0.5 * np.sin(2 * np.pi * f0 * np.arange(len(y)) / sr_out)
    assert np.max(np.abs(y[m:-m] - ideal[m:-m])) < 1e-5


def test_mix_to_mono_is_the_channel_mean():
    y = np.array([[1.0, 0.0, -0.5], [0.25, 0.25, 0.25]], dtype=np.float32)
    np.testing.assert_allclose(mix_to_mono(y), [1.0 / 6.0, 0.25], rtol=1e-6)
    assert mix_to_mono(np.ones(4)).shape == (4,)


def test_align_onset_drops_lead_in_and_keeps_preroll():
    sr, lead = 16000, 3000
    y = np.concatenate([np.full(lead, 1e-4), hit(sr, amp=0.8)]).astype(np.float32)
    out = align_onset(y, sr=sr, onset_db=-50.0, preroll_ms=5.0)
    preroll = 80  # 5 ms at 16 kHz
    onset = np.argmax(np.abs(y) >= 0.8 * 0.95 * 10 ** (-50 / 20))  # ~first sample above -50 dB
    assert len(y) - len(out) == onset - preroll
    np.testing.assert_array_equal(out[preroll:], y[onset:])
    assert np.all(np.abs(out[:preroll]) < np.abs(y).max() * 10 ** (-50 / 20))


def test_align_onset_at_start_and_on_silence_keeps_everything():
    y = hit(16000).astype(np.float32)
    assert len(align_onset(y, sr=16000, onset_db=-50.0, preroll_ms=5.0)) == len(y)
    z = np.zeros(100, np.float32)
    assert len(align_onset(z, sr=16000, onset_db=-50.0, preroll_ms=5.0)) == 100


def test_fit_length_crops_with_a_raised_cosine_fade():
    sr, n = 16000, 8000
    y = np.ones(n + 5000, np.float32)
    out = fit_length(y, n_samples=n, sr=sr, fade_ms=15.0)
    n_fade = 240
    assert out.shape == (n,) and out.dtype == np.float32
    np.testing.assert_array_equal(out[: n - n_fade], 1.0)
    assert out[-1] == 0.0  # silent at the crop point: no click
    k = np.arange(1, n_fade + 1)
    np.testing.assert_allclose(out[-n_fade:], 0.5 * (1 + np.cos(np.pi * k / n_fade)), atol=1e-6)
    assert np.all(np.diff(out[-n_fade:]) < 0)


def test_fit_length_pads_short_clips_with_silence_and_no_fade():
    y = np.linspace(1.0, 0.5, 1000, dtype=np.float32)
    out = fit_length(y, n_samples=8000, sr=16000, fade_ms=15.0)
    np.testing.assert_array_equal(out[:1000], y)
    np.testing.assert_array_equal(out[1000:], 0.0)


def test_normalise_peak():
    y = np.array([0.1, -0.25, 0.2], np.float32)
    out = normalise_peak(y, peak_db=-1.0)
    assert 20 * np.log10(np.abs(out).max()) == pytest.approx(-1.0, abs=1e-5)
    np.testing.assert_allclose(out / out[1], y / y[1], rtol=1e-6)
    np.testing.assert_array_equal(normalise_peak(np.zeros(3), peak_db=-1.0), 0.0)


# --- one file ---------------------------------------------------------------------------------


def test_load_clip_fits_and_normalises(tmp_path):
    p = write(tmp_path / "stereo 48k.wav", hit(48000, ch=2), 48000, subtype="PCM_24")
    y = load_clip(p, SPEC)
    assert y.dtype == np.float32 and y.shape == (SPEC.n_samples,)
    assert 20 * np.log10(np.abs(y).max()) == pytest.approx(SPEC.peak_db, abs=1e-4)


def test_load_clip_error_names_path_and_reason(tmp_path):
    p = tmp_path / "empty.wav"
    p.touch()
    with pytest.raises(AudioError, match=r"empty\.wav: empty file \(0 bytes\)"):
        load_clip(p, SPEC)


def test_ten_minute_file_is_read_only_as_far_as_needed(tmp_path, monkeypatch):
    sr = 8000
    long = np.tile(hit(sr, seconds=1.0), 600)  # 10 minutes
    p = write(tmp_path / "ten minutes.wav", long, sr)
    frames_read = []
    real_read = sf.SoundFile.read

    def counting_read(self, frames=-1, *args, **kwargs):
        out = real_read(self, frames, *args, **kwargs)
        frames_read.append(len(out))
        return out

    monkeypatch.setattr(sf.SoundFile, "read", counting_read)
    clip = load_clip(p, SPEC)
    budget = (SPEC.duration + frontend.ONSET_SEARCH_S + 0.1) * sr
    assert 0 < sum(frames_read) <= budget < len(long) / 100
    monkeypatch.undo()
    head, _ = sf.read(p, frames=sum(frames_read), dtype="float32")
    np.testing.assert_array_equal(clip, frontend.prepare_clip(head, sr, SPEC))


def test_a_late_onset_reads_on_to_the_full_clip(tmp_path):
    sr = 16000
    lead = np.zeros(int(2.3 * sr))  # inside the onset search, but the clip runs past the first read
    tone = 0.5 * np.sin(2 * np.pi * 500 * np.arange(sr) / sr)
    clip = load_clip(write(tmp_path / "late.wav", np.concatenate([lead, tone]), sr), SPEC)
    # The clip starts at the onset (pre-roll aside) and is tone to the end: no zero padding.
    preroll = int(SPEC.preroll_ms * sr / 1000)
    assert np.abs(clip[:preroll]).max() == 0.0 and np.abs(clip[preroll + 1]) > 0
    tail = np.abs(clip[-1000:-400])  # before the crop fade
    assert tail.max() > 0.85 and np.sum(tail > 0.5) > 300


def test_leading_silence_beyond_the_search_window_is_a_reason(tmp_path):
    sr = 16000
    y = np.concatenate([np.zeros(int(3.0 * sr)), hit(sr)])
    with pytest.raises(AudioError, match=r"silent: peak -inf dBFS in the first 2\.6 s"):
        load_clip(write(tmp_path / "very late.wav", y, sr), SPEC)


def test_permission_denied_is_a_reason(tmp_path, monkeypatch):
    p = write(tmp_path / "locked.wav", hit(16000), 16000)

    def denied(*args, **kwargs):
        raise PermissionError(13, "Permission denied")

    monkeypatch.setattr(frontend, "open", denied, raising=False)
    with pytest.raises(AudioError, match="locked.wav: cannot be read: permission denied"):
        load_clip(p, SPEC)


@pytest.mark.skipif(os.name != "posix" or os.geteuid() == 0, reason="root can read any file")
def test_unreadable_file_on_disk(tmp_path):
    p = write(tmp_path / "locked.wav", hit(16000), 16000)
    p.chmod(0)
    try:
        with pytest.raises(AudioError, match="permission denied"):
            load_clip(p, SPEC)
    finally:
        p.chmod(0o644)


# --- a messy library --------------------------------------------------------------------------


ACCEPT = "accepted"


@pytest.fixture
def messy(tmp_path) -> tuple[Path, dict[str, str]]:
    """A library with every kind of trouble a real one has; ``expected`` maps path -> outcome."""
    src = tmp_path / "library"
    expected: dict[str, str] = {}

    def add(rel: str, y, sr: int, outcome: str = ACCEPT, **kw) -> None:
        write(src / rel, y, sr, **kw)
        expected[rel] = outcome

    add("kicks/kick 01.wav", hit(44100, f0=60), 44100)
    add("kicks/deep/nested/further/kick 02.aiff", hit(44100, f0=70), 44100)
    add("rates/phone 8k.wav", hit(8000), 8000)
    add("rates/hires 96k.wav", hit(96000), 96000, subtype="PCM_24")
    add("surround/six channels.wav", hit(48000, ch=6), 48000)
    add("long/ten minutes.flac", np.tile(hit(8000, seconds=1.0), 600), 8000)
    add("formats/vorbis.ogg", hit(22050, ch=2), 22050, format="OGG", subtype="VORBIS")
    add("formats/lossless.flac", hit(44100), 44100, format="FLAC")
    add("formats/UPPER.WAV", hit(44100), 44100)
    if "MP3" in sf.available_formats():  # libsndfile >= 1.1.0 (its CHANGELOG)
        add("formats/lossy.mp3", hit(44100), 44100, format="MP3", subtype="MPEG_LAYER_III")
    add("names/Snäre – dünn №1.wav", hit(44100, seed=1), 44100)
    add("names/キック.wav", hit(44100, seed=2), 44100)
    add("names/  spaced   out  .wav", hit(44100, seed=3), 44100)
    add("folder.wav/inside.wav", hit(44100, seed=4), 44100)  # a folder named like a file
    add("top level.wav", hit(44100, seed=5), 44100)
    add("bad/silence.wav", np.zeros(4410), 44100, outcome="silent: peak -inf dBFS")
    quiet = 1e-4 * np.sin(2 * np.pi * 441 * np.arange(4410) / 44100)  # peak -80 dBFS
    add("bad/too quiet.wav", quiet, 44100, subtype="FLOAT", outcome="silent: peak -80.0 dBFS")
    add("bad/one sample.wav", np.array([0.5]), 44100, outcome="too short: 1 sample")
    nan = hit(44100).astype(np.float32)
    nan[100] = np.nan
    add("bad/nan.wav", nan, 44100, subtype="FLOAT", outcome="NaN or infinite")
    inf = hit(44100).astype(np.float32)
    inf[200] = np.inf
    add("bad/inf.wav", inf, 44100, subtype="FLOAT", outcome="NaN or infinite")
    phase = hit(44100)
    add("bad/cancelling.wav", np.stack([phase, -phase], 1), 44100, outcome="channels cancel out")

    (src / "bad" / "zero bytes.wav").touch()
    expected["bad/zero bytes.wav"] = "empty file (0 bytes)"
    good = (src / "kicks" / "kick 01.wav").read_bytes()
    (src / "bad" / "truncated header.wav").write_bytes(good[:30])
    expected["bad/truncated header.wav"] = "not a readable audio file: error in WAV file"
    (src / "cut short.wav").write_bytes(good[: len(good) // 2])  # header promises more data
    expected["cut short.wav"] = ACCEPT
    (src / "bad" / "actually text.wav").write_text("these are my notes\n" * 20)
    expected["bad/actually text.wav"] = "not a readable audio file: format not recognised"

    os.symlink("..", src / "kicks" / "deep" / "back up")  # a loop to an enclosing folder
    expected["kicks/deep/back up/"] = "symlink loop"
    os.symlink("self.wav", src / "bad" / "self.wav")  # a link to itself
    expected["bad/self.wav"] = "symlink loop"
    os.symlink("nowhere.wav", src / "bad" / "dangling.wav")
    expected["bad/dangling.wav"] = "broken symbolic link"
    os.mkfifo(src / "bad" / "pipe.wav")
    expected["bad/pipe.wav"] = "not a regular file"

    # Quietly skipped (counted as hidden) and ignored (not audio by name).
    (src / ".DS_Store").write_bytes(b"\0\0\0\1Bud1")
    (src / "kicks" / "._kick 01.wav").write_bytes(b"\0\5\26\7" + b"\0" * 80)
    (src / ".git").mkdir()
    (src / ".git" / "x.wav").write_bytes(good)
    (src / "README.txt").write_text("kit notes")
    (src / "kicks" / "cover.jpg").write_bytes(b"\xff\xd8\xff\xe0")
    return src, expected


def test_messy_library_every_file_accepted_or_listed_with_reason(messy, tmp_path):
    src, expected = messy
    before = tree_digest(src)
    summary = ingest_folder(src, tmp_path / "bank", TINY, jobs=1)
    assert tree_digest(src) == before  # SOURCE is never written

    bank = open_bank(tmp_path / "bank")
    report = json.loads((tmp_path / "bank" / REPORT_FILE).read_text(encoding="utf-8"))
    reasons = {s["path"]: s["reason"] for s in report["skipped"]}
    accepted = {c["path"] for c in bank.clips}
    for rel, outcome in expected.items():
        if outcome == ACCEPT:
            assert rel in accepted, (rel, reasons.get(rel))
        else:
            assert outcome in reasons.get(rel, ""), (rel, reasons.get(rel))
    assert accepted | set(reasons) == set(expected)
    assert (report["hidden"], report["ignored"]) == (3, 2)  # .DS_Store, ._kick 01.wav, .git/
    n_ok = sum(v == ACCEPT for v in expected.values())
    assert summary.accepted == report["accepted"] == len(bank) == n_ok
    assert summary.skipped == len(expected) - n_ok
    assert summary.decoded == summary.accepted + 9  # the other 4 rejects come from the scan
    assert report["audio"] == TINY.to_dict()["audio"] and report["seconds"] >= 0

    by_path = {c["path"]: c for c in bank.clips}
    assert by_path["kicks/deep/nested/further/kick 02.aiff"]["category"] == "kicks"
    assert by_path["top level.wav"]["category"] is None
    assert by_path["surround/six channels.wav"]["channels"] == 6
    assert by_path["rates/hires 96k.wav"]["sample_rate"] == 96000
    assert by_path["long/ten minutes.flac"]["duration"] == pytest.approx(600.0)
    assert len(set(bank.names)) == len(bank)
    assert bank.spectra.shape == (n_ok, SPEC.n_bins, SPEC.n_frames)
    assert np.all(np.isfinite(bank.spectra)) and bank.spectra.max() > 0.5
    assert not list((tmp_path / "bank").glob(".*"))  # no temporary files left behind


def test_names_are_stems_unless_they_collide(tmp_path):
    src = tmp_path / "src"
    for rel in ("a/kick.wav", "b/kick.wav", "c/kick.wav", "c/kick.flac", "snare.wav"):
        write(src / rel, hit(16000), 16000)
    ingest_folder(src, tmp_path / "bank", TINY, jobs=1)
    names = {c["path"]: c["name"] for c in open_bank(tmp_path / "bank").clips}
    assert names == {"a/kick.wav": "a/kick", "b/kick.wav": "b/kick", "c/kick.flac": "c/kick.flac",
                     "c/kick.wav": "c/kick.wav", "snare.wav": "snare"}


@pytest.mark.skipif(sys.platform != "linux", reason="byte file names are a POSIX matter")
def test_a_file_name_that_is_not_utf8(tmp_path):
    src = tmp_path / "src"
    src.mkdir()
    name = os.fsencode(src) + b"/caf\xe9 latin-1.wav"
    sf.write(name, hit(16000), 16000)  # bytes: soundfile cannot encode such a str
    summary = ingest_folder(src, tmp_path / "bank", TINY, jobs=1)
    assert summary.accepted == 1
    assert open_bank(tmp_path / "bank").clips[0]["path"] == "caf\\xe9 latin-1.wav"


# --- the cache --------------------------------------------------------------------------------


@pytest.fixture
def small_library(tmp_path) -> Path:
    src = tmp_path / "src"
    for i in range(4):
        write(src / f"kicks/k{i}.wav", hit(44100, f0=50 + 10 * i, seed=i), 44100)
        write(src / f"hats/h{i}.flac", hit(22050, f0=3000 + 100 * i, seed=i), 22050)
    write(src / "bad/silent.wav", np.zeros(2000), 16000)
    (src / "bad/text.wav").write_text("not audio")
    return src


def test_rerun_on_unchanged_folder_decodes_nothing(small_library, tmp_path):
    first = ingest_folder(small_library, tmp_path / "bank", TINY, jobs=1)
    spectra = np.array(open_bank(tmp_path / "bank").spectra)
    again = ingest_folder(small_library, tmp_path / "bank", TINY, jobs=1)
    assert (first.decoded, first.reused, first.accepted, first.skipped) == (10, 0, 8, 2)
    assert (again.decoded, again.reused, again.accepted, again.skipped) == (0, 8, 8, 2)
    np.testing.assert_array_equal(open_bank(tmp_path / "bank").spectra, spectra)


def test_touched_added_and_removed_files_update_only_themselves(small_library, tmp_path):
    bank_dir = tmp_path / "bank"
    ingest_folder(small_library, bank_dir, TINY, jobs=1)
    before = open_bank(bank_dir)
    rows = {c["path"]: np.array(before.spectra[i]) for i, c in enumerate(before.clips)}

    write(small_library / "kicks/k1.wav", hit(44100, f0=200, seed=9), 44100)  # changed
    write(small_library / "kicks/new.wav", hit(44100, f0=90), 44100)  # added
    (small_library / "hats/h0.flac").unlink()  # removed
    st = os.stat(small_library / "hats/h2.flac")
    os.utime(small_library / "hats/h2.flac", ns=(st.st_atime_ns, st.st_mtime_ns + 10**9))  # touched
    s = ingest_folder(small_library, bank_dir, TINY, jobs=1)
    assert (s.decoded, s.reused, s.accepted, s.skipped) == (3, 5, 8, 2)

    after = open_bank(bank_dir)
    paths = [c["path"] for c in after.clips]
    assert "hats/h0.flac" not in paths and "kicks/new.wav" in paths and paths == sorted(paths)
    for i, p in enumerate(paths):
        if p in rows and p != "kicks/k1.wav":
            np.testing.assert_array_equal(after.spectra[i], rows[p])
    assert not np.array_equal(after.spectra[paths.index("kicks/k1.wav")], rows["kicks/k1.wav"])


def test_a_changed_bad_file_is_decoded_again(small_library, tmp_path):
    ingest_folder(small_library, tmp_path / "bank", TINY, jobs=1)
    write(small_library / "bad/silent.wav", hit(16000), 16000)  # fixed by the user
    s = ingest_folder(small_library, tmp_path / "bank", TINY, jobs=1)
    assert (s.decoded, s.accepted, s.skipped) == (1, 9, 1)


def test_different_audio_settings_rebuild(small_library, tmp_path):
    ingest_folder(small_library, tmp_path / "bank", TINY, jobs=1)
    other = load_settings("tiny", {"audio": {"sample_rate": 22050}})
    s = ingest_folder(small_library, tmp_path / "bank", other, jobs=1)
    assert (s.decoded, s.reused, s.accepted) == (10, 0, 8)
    assert "sample_rate" in s.cache
    bank = open_bank(tmp_path / "bank")
    assert bank.audio.sample_rate == 22050 and bank.spectra.shape[1] == other.audio.n_bins


def test_a_bank_of_an_older_format_is_refused_then_rebuilt(small_library, tmp_path):
    # format 1 spectra had no analysis pad (other frame count): one line, then a rebuild
    bank_dir = tmp_path / "bank"
    ingest_folder(small_library, bank_dir, TINY, jobs=1)
    index = json.loads((bank_dir / INDEX_FILE).read_text())
    (bank_dir / INDEX_FILE).write_text(json.dumps(index | {"format": 1}))
    with pytest.raises(BankError, match=r"bank format 1 was made by an older shotsmith.*"
                                        r"re-run 'shotsmith ingest'") as err:
        open_bank(bank_dir)
    assert "\n" not in str(err.value)
    s = ingest_folder(small_library, bank_dir, TINY, jobs=1)
    assert (s.decoded, s.reused) == (10, 0)
    assert open_bank(bank_dir).spectra.shape[2] == TINY.audio.n_frames


def test_jobs_2_gives_the_same_bank_as_jobs_1(small_library, tmp_path):
    calls = []
    ingest_folder(small_library, tmp_path / "one", TINY, jobs=1)
    ingest_folder(
        small_library, tmp_path / "two", TINY, jobs=2, progress=lambda d, t: calls.append((d, t))
    )
    one, two = open_bank(tmp_path / "one"), open_bank(tmp_path / "two")
    assert one.clips == two.clips
    np.testing.assert_array_equal(one.spectra, two.spectra)
    reports = [json.loads((tmp_path / b / REPORT_FILE).read_text()) for b in ("one", "two")]
    assert reports[0]["skipped"] == reports[1]["skipped"]
    assert calls[-1] == (10, 10) and [d for d, _ in calls] == sorted(d for d, _ in calls)


# --- refusals ---------------------------------------------------------------------------------


def test_bank_inside_or_equal_to_source_is_refused(small_library):
    for bank in (small_library / "bank", small_library, small_library / "kicks" / "b"):
        with pytest.raises(ParameterError, match="must not be inside the source folder"):
            ingest_folder(small_library, bank, TINY, jobs=1)
    assert not (small_library / "bank").exists()


def test_no_usable_files_is_one_clear_error(tmp_path):
    src = tmp_path / "src"
    write(src / "silent.wav", np.zeros(1000), 16000)
    (src / "notes.txt").write_text("x")
    with pytest.raises(ShotsmithError, match=r"no usable audio files in .*src \(1 skipped"):
        ingest_folder(src, tmp_path / "bank", TINY, jobs=1)
    report = json.loads((tmp_path / "bank" / REPORT_FILE).read_text())
    assert report["accepted"] == 0 and report["skipped"][0]["reason"].startswith("silent")


def test_missing_source_and_foreign_index_are_refused(small_library, tmp_path):
    with pytest.raises(ParameterError, match="source folder not found"):
        ingest_folder(tmp_path / "nope", tmp_path / "bank", TINY)
    foreign = tmp_path / "theirs"
    foreign.mkdir()
    (foreign / INDEX_FILE).write_text('{"something": "else"}')
    with pytest.raises(BankError, match="not a shotsmith bank"):
        ingest_folder(small_library, foreign, TINY, jobs=1)
    assert (foreign / INDEX_FILE).read_text() == '{"something": "else"}'


def test_ingest_does_not_import_torch():
    code = "import sys, pipeline.ingest; print('torch' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"
