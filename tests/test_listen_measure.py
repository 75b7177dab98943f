"""Loudness matching, thumbnails and picks.json for the listening page."""

from __future__ import annotations

import json
import math
import subprocess
import sys

import numpy as np
import pyloudnorm
import pytest
import soundfile as sf

from pipeline.errors import OutputError, ParameterError
from pipeline.listen import load_picks, set_pick
from pipeline.listen.measure import (
    CACHE_DIR,
    DB_RANGE,
    draw_spectrogram_png,
    loudness_target,
    matching_gain_db,
    measure_folder,
    padded_loudness,
    thumbnail,
)

SR = 48000


def _sine(seconds: float, amp: float, f: float = 997.0, sr: int = SR) -> np.ndarray:
    t = np.arange(int(round(seconds * sr))) / sr
    return amp * np.sin(2 * np.pi * f * t)


@pytest.mark.parametrize("seconds,amp", [(0.2, 0.5), (0.1, 1.0), (0.05, 0.25)])
def test_short_clips_are_measured_padded_to_one_block(seconds, amp):
    # ITU-R BS.1770-4 Annex 1: a full-scale 997 Hz sine reads -3.01 LKFS; one 400 ms block
    # holding d seconds of it at amplitude A has mean square (A^2/2)(d/0.4), so the padded
    # clip reads -3.01 + 20 log10 A + 10 log10(d / 0.4). pyloudnorm reads the anchor as
    # -3.05 (tests/references.md section 1), and the K-filter rings at the edges: 0.1 LU tolerance.
    lufs, padded = padded_loudness(_sine(seconds, amp), SR)
    expected = -3.01 + 20 * math.log10(amp) + 10 * math.log10(seconds / 0.4)
    assert padded
    assert lufs == pytest.approx(expected, abs=0.1)


def test_clips_of_a_block_or_more_are_measured_as_they_are():
    y = _sine(1.5, 0.3) * np.exp(-np.arange(int(1.5 * SR)) / SR)
    lufs, padded = padded_loudness(y, SR)
    assert not padded
    assert lufs == pytest.approx(pyloudnorm.Meter(SR).integrated_loudness(y), abs=1e-9)


def test_digital_silence_has_no_loudness():
    assert padded_loudness(np.zeros(1000), SR) == (None, True)


def test_matching_only_attenuates_down_to_a_low_percentile():
    values = [-30.0, -25.0, -20.0, -15.0, -10.0, None]
    target = loudness_target(values)
    assert target == pytest.approx(np.percentile([-30, -25, -20, -15, -10], 10))
    gains = [matching_gain_db(v, target) for v in values]
    assert all(g <= 0 for g in gains)
    assert gains[0] == 0.0 and gains[-1] == 0.0  # quieter than the target, silent: as written
    assert -10.0 + gains[4] == pytest.approx(target)
    assert loudness_target([None]) is None and matching_gain_db(-12.0, None) == 0.0


def test_loudness_is_measured_once_and_cached(tmp_path):
    sf.write(tmp_path / "a.wav", _sine(0.6, 0.5), SR, subtype="PCM_24")
    sf.write(tmp_path / "b.wav", _sine(0.1, 0.5), SR, subtype="PCM_24")
    (tmp_path / "c.wav").write_bytes(b"not audio")
    files = [(n, tmp_path / n) for n in ("a.wav", "b.wav", "c.wav")]
    first = measure_folder(tmp_path, files)
    assert first["a.wav"]["padded"] is False and first["b.wav"]["padded"] is True
    assert first["a.wav"]["duration_s"] == pytest.approx(0.6)
    assert "error" in first["c.wav"]
    cache = tmp_path / CACHE_DIR / "loudness.json"
    stored = json.loads(cache.read_text())
    assert set(stored) == {"a.wav", "b.wav"}
    stored["a.wav"]["lufs"] = -99.0  # a cached value is used while the file is unchanged
    cache.write_text(json.dumps(stored))
    assert measure_folder(tmp_path, files)["a.wav"]["lufs"] == -99.0
    sf.write(tmp_path / "a.wav", _sine(0.7, 0.5), SR, subtype="PCM_24")  # changed: measured again
    assert measure_folder(tmp_path, files)["a.wav"]["lufs"] != -99.0


def _plot_brightness(png: bytes) -> float:
    from io import BytesIO

    from matplotlib.image import imread

    img = imread(BytesIO(png))
    h, w = img.shape[:2]
    return float(img[int(0.1 * h) : int(0.65 * h), int(0.2 * w) : int(0.9 * w), :3].mean())


def test_thumbnails_share_one_colour_scale():
    noise = np.random.default_rng(0).uniform(-0.5, 0.5, 8000)
    loud, quiet = draw_spectrogram_png(noise, 16000), draw_spectrogram_png(0.01 * noise, 16000)
    # a per-sound colour scale would draw these two identically; a fixed dB scale cannot
    assert _plot_brightness(loud) > _plot_brightness(quiet) + 0.1
    assert DB_RANGE == (-100.0, 0.0)


def test_thumbnail_is_drawn_once_and_cached(tmp_path, monkeypatch):
    from matplotlib.image import imread

    import pipeline.listen.measure as measure

    path = tmp_path / "x.wav"
    sf.write(path, _sine(0.3, 0.5, 440.0, 16000), 16000)
    png = thumbnail(tmp_path, "x.wav", path)
    assert imread(__import__("io").BytesIO(png)).shape[:2] == (145, 320)
    monkeypatch.setattr(measure, "draw_spectrogram_png", lambda *a: pytest.fail("redrawn"))
    assert thumbnail(tmp_path, "x.wav", path) == png
    assert len(list((tmp_path / CACHE_DIR / "thumbs").glob("*.png"))) == 1


def test_picks_follow_the_file_content(tmp_path):
    a, b = tmp_path / "a.wav", tmp_path / "b.wav"
    a.write_bytes(b"one")
    b.write_bytes(b"two")
    set_pick(tmp_path, "a.wav", "keep")
    set_pick(tmp_path, "b.wav", "reject")
    assert load_picks(tmp_path) == {"a.wav": "keep", "b.wav": "reject"}
    b.write_bytes(b"another sound under the same name")
    assert load_picks(tmp_path) == {"a.wav": "keep"}
    set_pick(tmp_path, "a.wav", None)
    assert load_picks(tmp_path) == {}
    data = json.loads((tmp_path / "picks.json").read_text())
    assert data["tool"] == "shotsmith" and set(data["picks"]) == {"b.wav"}
    with pytest.raises(ParameterError, match="maybe"):
        set_pick(tmp_path, "a.wav", "maybe")
    with pytest.raises(ParameterError, match="missing.wav"):
        set_pick(tmp_path, "missing.wav", "keep")


def test_an_unwritable_picks_file_is_one_clear_error(tmp_path):
    (tmp_path / "a.wav").write_bytes(b"one")
    (tmp_path / "picks.json").mkdir()  # stands in for a file that cannot be replaced
    with pytest.raises(OutputError, match="picks.json: cannot write"):
        set_pick(tmp_path, "a.wav", "keep")
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".picks")]


def test_unreadable_picks_mean_no_marks(tmp_path):
    (tmp_path / "picks.json").write_text("{not json")
    assert load_picks(tmp_path) == {}
    (tmp_path / "picks.json").write_text(json.dumps({"tool": "other", "picks": {"a": "keep"}}))
    assert load_picks(tmp_path) == {}


@pytest.mark.slow
def test_the_page_server_never_imports_torch(tmp_path):
    code = (
        "import sys\n"
        f"sys.path.insert(0, {str(__import__('pathlib').Path(__file__).parent)!r})\n"
        "from listenkit import make_listen_kit\n"
        "from pipeline.listen.server import ListenServer\n"
        f"k = make_listen_kit({str(tmp_path)!r})\n"
        "srv = ListenServer([k.long, k.short], bank=k.bank)\n"
        "s = srv.records()['sounds'][0]\n"
        "from pipeline.listen.measure import thumbnail\n"
        "thumbnail(k.long, s['file'], k.long / s['file'])\n"
        "srv.references.get('kick_01', None)\n"
        "srv.stop()\n"
        "print('torch' in sys.modules)\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"
