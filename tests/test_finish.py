"""Finishing (pipeline.finish): true peak, the end of a sound, silence after it, trimming."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.signal

from pipeline import finish
from pipeline.config import RenderSpec

RNG_SEED = 177042  # conftest's rng fixture: the draws these tests were written with

SR = 48000


def _db(x):
    return 20 * np.log10(x)


def test_true_peak_of_a_quarter_rate_sine_at_45_degrees_is_full_scale():
    # BS.1770-4 Annex 2 (tests/references.md section 13): sample peak 0.707 (-3.01 dBFS),
    # true peak 1.0 (0 dBTP), which 4x oversampling with scipy's resample_poly also reads
    n = np.arange(SR)
    y = np.sin(2 * np.pi * n / 4 + np.pi / 4)
    ramp = np.sin(0.5 * np.pi * np.arange(2000) / 2000) ** 2  # no edge overshoot
    y[:2000] *= ramp
    y[-2000:] *= ramp[::-1]
    assert _db(np.max(np.abs(y))) == pytest.approx(-3.01, abs=0.01)
    assert _db(finish.true_peak(y, SR)) == pytest.approx(0.0, abs=0.05)
    assert _db(np.max(np.abs(scipy.signal.resample_poly(y, 4, 1)))) == pytest.approx(0, abs=0.05)


@pytest.mark.parametrize("sr", [44100, 48000])
def test_true_peak_agrees_with_scipy_resample_poly(rng, sr):
    # scipy.signal.resample_poly (Kaiser-windowed polyphase FIR) as the outside reference
    for _ in range(5):
        b, a = scipy.signal.butter(6, 0.8)
        y = scipy.signal.lfilter(b, a, rng.standard_normal(4000)) * np.hanning(4000)
        ours = _db(finish.true_peak(y, sr))
        k = finish.oversampling(sr)  # the same factor: 4, as Annex 2 asks at 44.1/48 kHz
        ref = _db(np.max(np.abs(scipy.signal.resample_poly(y, k, 1))))
        assert ours == pytest.approx(ref, abs=0.1)
        assert finish.true_peak(y, sr) >= np.max(np.abs(y))


@pytest.mark.parametrize("bit_depth", ["16", "24", "32f"])
def test_finished_true_peak_never_exceeds_the_ceiling(rng, bit_depth):
    # a clip whose inter-sample peaks rise above its samples: a sample-peak ceiling
    # would let them clip a converter
    n = np.arange(SR // 2)
    y = np.sin(2 * np.pi * n * 0.2499 + np.pi / 4) * np.exp(-n / 8000)
    y += 0.01 * rng.standard_normal(len(n))
    out, info = finish.finish_audio(y, SR, RenderSpec(peak_db=-1.0, bit_depth=bit_depth), rng=rng)
    assert finish.true_peak(out, SR) <= 10 ** (-1.0 / 20)
    assert info["true_peak_dbtp"] <= -1.0 and info["true_peak_dbtp"] >= -1.1
    assert info["peak_dbfs"] < info["true_peak_dbtp"] - 1.0  # the overs were real


@pytest.mark.parametrize("tau", [0.03, 0.08])
def test_sound_end_of_an_exponential_decay_over_noise(rng, tau):
    # amplitude exp(-t / tau) over a noise floor 80 dB down: the envelope reaches -60 dB
    # re peak at t = tau ln(1000); found within one 10 ms envelope frame
    n = SR
    t = np.arange(n) / SR
    y = rng.standard_normal(n) * np.exp(-t / tau) + 1e-4 * rng.standard_normal(n)
    end = finish.sound_end(y, SR)
    assert end / SR == pytest.approx(tau * np.log(1000), abs=finish.ENVELOPE_MS / 1000)


def test_sound_end_of_a_sound_that_does_not_end_and_of_silence(rng):
    assert finish.sound_end(rng.standard_normal(SR), SR) == SR
    assert finish.sound_end(np.zeros(SR), SR) == 0


@pytest.mark.parametrize("bit_depth", ["16", "24", "32f"])
def test_after_the_end_every_sample_is_digital_silence(rng, bit_depth):
    t = np.arange(SR) / SR
    y = (np.sin(2 * np.pi * 200 * t) + 0.2 * rng.standard_normal(SR)) * np.exp(-t / 0.04)
    y += 1e-5 * rng.standard_normal(SR)  # a faint bed to the last sample, as decoders leave
    out, info = finish.finish_audio(y, SR, RenderSpec(bit_depth=bit_depth), rng=rng)
    end = int(round(info["natural_length_s"] * SR))
    assert 0.2 * SR < end < 0.4 * SR
    assert np.all(out[end:] == 0)  # 16-bit dither is muted there too
    assert np.any(out[: end // 2] != 0)


def test_trim_writes_only_the_natural_length(rng):
    t = np.arange(SR) / SR
    y = rng.standard_normal(SR) * np.exp(-t / 0.02)
    out, info = finish.finish_audio(y, SR, RenderSpec(trim=True), rng=rng)
    assert len(out) == int(round(info["natural_length_s"] * SR)) < SR // 4
    assert out[-1] == 0.0  # the fade reaches silence at the end


def test_fades_reach_zero_and_dc_is_removed(rng):
    y = 0.3 + 0.1 * rng.standard_normal(SR // 2)
    out = finish.apply_fades(y, SR, fade_in_ms=1.0, fade_out_ms=20.0, end=SR // 2)
    assert out[0] == 0.0 and out[-1] == 0.0
    assert abs(np.mean(out[48:-960])) < 0.01
