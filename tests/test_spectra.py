"""Reference checks of pipeline.spectra: the STFT, its inverse, the dB scale and the metrics."""

from __future__ import annotations

import librosa
import numpy as np
import pytest
import scipy.signal

from pipeline import spectra
from pipeline.config import load_settings

RNG_SEED = 20240611  # conftest's rng fixture: the draws these tests were written with

PRESETS = ["tiny", "drums", "long"]
STFTS = [(512, 128), (1024, 256), (2048, 512)]


def _signal(rng, n):
    t = np.arange(n) / 22050
    return 0.5 * np.sin(2 * np.pi * 440 * t) * np.exp(-3 * t) + 0.1 * rng.standard_normal(n)


@pytest.mark.parametrize(("n_fft", "hop"), STFTS)
def test_stft_matches_librosa_times_our_scale(rng, n_fft, hop):
    y = _signal(rng, 5000)
    X = spectra.stft(y, n_fft=n_fft, hop_length=hop)
    # librosa.stft with every option pinned (its pad_mode default changed between versions)
    ref = librosa.stft(y, n_fft=n_fft, hop_length=hop, win_length=n_fft, window="hann",
                       center=True, pad_mode="constant")
    assert X.shape == ref.shape == (1 + n_fft // 2, 1 + len(y) // hop)
    np.testing.assert_allclose(np.abs(X), np.abs(ref) * spectra.stft_scale(n_fft),
                               rtol=1e-6, atol=1e-9)


@pytest.mark.parametrize(("n_fft", "hop"), STFTS)
def test_stft_matches_naive_framed_rfft(rng, n_fft, hop):
    y = _signal(rng, 4321)
    # naive re-implementation (librosa's own test approach): pad n_fft/2 zeros, frame, window, rfft
    padded = np.concatenate([np.zeros(n_fft // 2), y, np.zeros(n_fft // 2)])
    n = np.arange(n_fft)
    window = 0.5 - 0.5 * np.cos(2 * np.pi * n / n_fft)  # periodic Hann
    cols = [np.fft.rfft(padded[t * hop : t * hop + n_fft] * window)
            for t in range(1 + len(y) // hop)]
    ref = np.stack(cols, axis=1) * 2.0 / window.sum()
    np.testing.assert_allclose(spectra.stft(y, n_fft=n_fft, hop_length=hop), ref, atol=1e-9)


@pytest.mark.parametrize("k", [3, 40, 200])
def test_bin_centred_sine_peaks_in_bin_k_at_0_db(k):
    sr, n_fft, hop = 22050, 1024, 256
    t = np.arange(sr) / sr
    y = np.sin(2 * np.pi * k * sr / n_fft * t)  # f_k = k sr / n_fft (librosa.fft_frequencies)
    S = spectra.magnitude(y, n_fft=n_fft, hop_length=hop)
    mid = S[:, 10:-10]  # frames away from the zero-padded edges
    assert np.all(np.argmax(mid, axis=0) == k)
    # the scale's promise: a full-scale bin-centred sine reads 1.0 = 0 dB
    np.testing.assert_allclose(mid[k], 1.0, atol=1e-6)
    # unscaled, a periodic Hann gives A N / 4 (coherent gain 0.5;
    # tests/references.md section 3, derived)
    np.testing.assert_allclose(mid[k] / spectra.stft_scale(n_fft), n_fft / 4, rtol=1e-6)


@pytest.mark.parametrize("preset", PRESETS)
def test_window_and_hop_satisfy_cola_and_nola(preset):
    a = load_settings(preset).audio
    overlap = a.n_fft - a.hop_length
    w = spectra.hann_window(a.n_fft)
    # scipy.signal.check_COLA docs: Hann is COLA at 3/4 overlap (DFT-even window)
    assert scipy.signal.check_COLA(w, a.n_fft, overlap)
    assert scipy.signal.check_NOLA(w, a.n_fft, overlap)
    # our closed form is scipy's periodic Hann to the last bit of float64 rounding
    np.testing.assert_allclose(
        w, scipy.signal.get_window("hann", a.n_fft, fftbins=True), rtol=0, atol=4e-16
    )
    # the pitfall tests/references.md section 3 notes: a symmetric Hann window is not COLA here
    assert not scipy.signal.check_COLA(scipy.signal.windows.hann(a.n_fft, sym=True),
                                       a.n_fft, overlap)


@pytest.mark.parametrize(("n_fft", "hop"), STFTS)
@pytest.mark.parametrize("n", [3000, 4096, 4097])
def test_istft_of_stft_round_trip(rng, n_fft, hop, n):
    y = rng.uniform(-1, 1, n)
    X = spectra.stft(y, n_fft=n_fft, hop_length=hop)
    y2 = spectra.istft(X, n_fft=n_fft, hop_length=hop, length=n)
    assert np.max(np.abs(y2 - y)) < 1e-6  # tests/references.md section 3 (LSEE inverse)
    # and librosa's inverse of our (rescaled) STFT gives the same signal
    ref = librosa.istft(X / spectra.stft_scale(n_fft), n_fft=n_fft, hop_length=hop,
                        window="hann", center=True, length=n)
    assert np.max(np.abs(ref - y)) < 1e-6


def test_istft_is_the_least_squares_inverse_of_an_inconsistent_spectrogram(rng):
    # Griffin & Lim 1984 eq. 6 equals librosa.istft (which divides by window_sumsquare)
    n_fft, hop, n = 512, 128, 3000
    X = rng.standard_normal((257, 1 + n // hop)) + 1j * rng.standard_normal((257, 1 + n // hop))
    X[0].imag = 0
    X[-1].imag = 0
    ours = spectra.istft(X, n_fft=n_fft, hop_length=hop, length=n)
    ref = librosa.istft(X / spectra.stft_scale(n_fft), n_fft=n_fft, hop_length=hop,
                        window="hann", center=True, length=n)
    np.testing.assert_allclose(ours, ref, atol=1e-9)


def test_amplitude_to_db_matches_librosa_then_clipped(rng):
    floor, ceiling = -100.0, 0.0
    S = np.concatenate([10 ** rng.uniform(-7, 0.5, 500), [0.0, 1.0, 3.0]])
    amin = 10 ** (floor / 20)
    # librosa.amplitude_to_db: 20 log10(max(S, amin) / ref); top_db=None leaves it unclipped
    ref = np.clip(librosa.amplitude_to_db(S, ref=1.0, amin=amin, top_db=None), floor, ceiling)
    got = spectra.amplitude_to_db(S, db_floor=floor, db_ceiling=ceiling)
    np.testing.assert_allclose(got, ref, atol=1e-9)
    assert got[-2] == 0.0 and got[-3] == floor  # 1.0 is 0 dB; silence is the floor


def test_unit_scale_round_trip_and_range(rng):
    a = load_settings("tiny").audio
    S = 10 ** rng.uniform(-4.9, -0.01, (3, a.n_bins, a.n_frames))
    U = spectra.magnitude_to_unit(S, a)
    assert U.dtype == np.float32 and U.min() >= 0 and U.max() <= 1
    np.testing.assert_allclose(spectra.unit_to_magnitude(U, a), S, rtol=1e-5)
    assert spectra.unit_to_magnitude(np.zeros(3, np.float32), a).max() == 0.0


def test_clip_to_unit_shape_matches_the_audio_spec(rng):
    a = load_settings("tiny").audio
    U = spectra.clip_to_unit(0.5 * rng.uniform(-1, 1, a.n_samples), a)
    assert U.shape == (a.n_bins, a.n_frames)


def test_spectral_convergence_and_log_spectral_distance(rng):
    S = rng.random((2, 5, 7)) + 0.1
    E = S + 0.01 * rng.standard_normal(S.shape)
    # Arik et al. 2018: ||S - S^||_F / ||S||_F, per spectrogram
    want = np.linalg.norm((S - E).reshape(2, -1), axis=1) / np.linalg.norm(S.reshape(2, -1), axis=1)
    np.testing.assert_allclose(spectra.spectral_convergence(S, E), want)
    np.testing.assert_allclose(spectra.spectral_convergence_db(S, E), 20 * np.log10(want))
    # log-spectral distance (Wikipedia "Log-spectral distance"): zero, gain, symmetry
    P, Q = S**2, E**2
    assert np.allclose(spectra.log_spectral_distance(P, P), 0.0)
    np.testing.assert_allclose(spectra.log_spectral_distance(P, 4.0 * P, eps=0.0),
                               10 * np.log10(4.0))
    np.testing.assert_allclose(spectra.log_spectral_distance(P, Q),
                               spectra.log_spectral_distance(Q, P))
