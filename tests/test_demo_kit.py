"""The shipped demo kit: reproducible byte for byte, small, clean, and spectrally distinct."""

from __future__ import annotations

import hashlib
from pathlib import Path

import librosa
import numpy as np
import pytest
import soundfile as sf

from pipeline import demo
from pipeline.errors import OutputError

KIT = Path(__file__).resolve().parents[1] / "demo_sounds"


def _hashes(root: Path) -> dict[str, str]:
    return {p.relative_to(root).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(root.rglob("*.wav"))}


@pytest.fixture(scope="module")
def regenerated(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("kit")
    summary = demo.synthesize_kit(out)
    assert summary.written == summary.files
    return out


@pytest.fixture(scope="module")
def clips() -> dict[str, list[np.ndarray]]:
    by_cat: dict[str, list[np.ndarray]] = {}
    for p in sorted(KIT.rglob("*.wav")):
        y, sr = sf.read(p, dtype="float64")
        assert sr == demo.KIT_SAMPLE_RATE
        by_cat.setdefault(p.parent.name, []).append(y)
    return by_cat


def test_regenerating_is_byte_identical(regenerated):
    shipped = _hashes(KIT)
    assert shipped, "demo_sounds/ is empty: run `python -m pipeline.demo`"
    assert _hashes(regenerated) == shipped


def test_kit_size_and_layout():
    files = sorted(KIT.rglob("*.wav"))
    cats = {p.parent.name for p in files}
    assert len(cats) >= 6 and len(files) >= 120
    assert sum(p.stat().st_size for p in files) < 4_000_000
    for p in files:
        assert p.parent.parent == KIT and p.stem.startswith(p.parent.name + "_")
        info = sf.info(p)  # soundfile / libsndfile reads what the stdlib wave module wrote
        assert (info.channels, info.subtype) == (1, "PCM_16")
    assert len({hashlib.sha256(p.read_bytes()).digest() for p in files}) == len(files)


def test_no_clipping_and_clean_edges(clips):
    for cat, ys in clips.items():
        for y in ys:
            peak_db = 20 * np.log10(np.max(np.abs(y)))
            assert -1.05 < peak_db < -0.95, (cat, peak_db)  # peak about -1 dBFS, never 0
            assert abs(y.mean()) < 3e-3, cat  # no DC offset (below -50 dBFS)
            assert abs(y[0]) < 1e-3 and abs(y[-1]) < 1e-3, cat  # no step at either end
            tail = np.sqrt(np.mean(y[-int(0.01 * demo.KIT_SAMPLE_RATE):] ** 2))
            assert 20 * np.log10(tail + 1e-12) < -40, cat  # decayed, not cut off


@pytest.fixture(scope="module")
def features(clips) -> dict[str, dict[str, np.ndarray]]:
    """Per clip, from one STFT each: energy-weighted spectral centroid (Hz) and
    flatness (librosa.feature.spectral_centroid / spectral_flatness), the
    mel-band energy profile in dB (librosa.feature.melspectrogram), the length."""
    sr = demo.KIT_SAMPLE_RATE
    mel = librosa.filters.mel(sr=sr, n_fft=1024, n_mels=32, fmin=20.0, fmax=sr / 2)
    out = {}
    for cat, ys in clips.items():
        rows = {"centroid": [], "flatness": [], "mel_db": [], "length": []}
        for y in ys:
            S = np.abs(librosa.stft(y, n_fft=1024, hop_length=256, window="hann", center=True,
                                    pad_mode="constant"))
            w = (S**2).sum(axis=0) / (S**2).sum()
            c = librosa.feature.spectral_centroid(S=S, sr=sr, n_fft=1024, hop_length=256)[0]
            rows["centroid"].append(w @ c)
            rows["flatness"].append(w @ librosa.feature.spectral_flatness(S=S)[0])
            prof = (mel @ S**2).sum(axis=1)
            rows["mel_db"].append(librosa.power_to_db(prof, ref=np.max, top_db=80.0))
            rows["length"].append(y.size)
        out[cat] = {k: np.array(v) for k, v in rows.items()}
    return out


def test_categories_differ_in_the_expected_ways(features):
    med = {c: {k: np.median(v, axis=0) for k, v in f.items()} for c, f in features.items()}
    # Hats are high-passed metal, kicks a low sine: centroids decades apart.
    assert med["hat"]["centroid"] > 10 * med["kick"]["centroid"]
    others = np.concatenate([f["centroid"] for c, f in features.items() if c != "hat"])
    assert features["hat"]["centroid"].min() > others.max()
    assert med["kick"]["centroid"] < med["snare"]["centroid"] < med["hat"]["centroid"]
    # Noise-based voices against the sine-based ones (a Karplus-Strong pluck
    # starts as a noise burst, so it sits in between and is left out).
    noisy, tonal = ("snare", "clap", "hat"), ("kick", "tom", "bell")
    assert min(med[c]["flatness"] for c in noisy) > 10 * max(med[c]["flatness"] for c in tonal)
    assert min(med, key=lambda c: med[c]["length"]) == "rim"  # the driest sound in the kit


def test_each_category_has_its_own_spectrum(features):
    # Leave-one-out nearest class mean on the mel-band energy profiles: sounds
    # of one category resemble each other more than any other category.
    cats = sorted(features)
    X = np.concatenate([features[c]["mel_db"] for c in cats])
    lab = np.concatenate([[c] * len(features[c]["mel_db"]) for c in cats])
    right = 0
    for i in range(len(X)):
        keep = np.arange(len(X)) != i
        dist = [np.linalg.norm(X[i] - X[keep & (lab == c)].mean(axis=0)) for c in cats]
        right += cats[int(np.argmin(dist))] == lab[i]
    assert right / len(X) >= 0.9, right / len(X)


def test_cli_regenerates_and_refuses_to_overwrite(tmp_path, capsys):
    out = tmp_path / "kit"
    assert demo.main(["--out", str(out), "--per-category", "2"]) == 0
    assert "16 written" in capsys.readouterr().out
    assert demo.main(["--out", str(out), "--per-category", "2"]) == 0
    assert "0 written, 16 unchanged" in capsys.readouterr().out
    victim = out / "kick" / "kick_01.wav"
    original = victim.read_bytes()
    victim.write_bytes(b"not the kit")
    (out / "hat" / "hat_02.wav").unlink()
    with pytest.raises(OutputError, match="kick_01.wav"):
        demo.synthesize_kit(out, per_category=2)
    assert not (out / "hat" / "hat_02.wav").exists()  # nothing written before the refusal
    assert demo.main(["--out", str(out), "--per-category", "2"]) == 1
    assert "--overwrite" in capsys.readouterr().err
    assert demo.main(["--out", str(out), "--per-category", "2", "--overwrite"]) == 0
    assert victim.read_bytes() == original
    assert not list(out.rglob(".*tmp*"))


def test_seed_changes_every_sound():
    a = demo.kit_files(per_category=1)
    b = demo.kit_files(per_category=1, seed=demo.KIT_SEED + 1)
    assert a.keys() == b.keys() and all(a[k] != b[k] for k in a)
    assert demo.kit_files(per_category=1) == a
