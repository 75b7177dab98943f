"""Descriptors and set distances (pipeline.quality) against closed forms and physics."""

from __future__ import annotations

import numpy as np
import pytest

from pipeline import quality

RNG_SEED = 20261202  # conftest's rng fixture: the draws these tests were written with

SR = quality.DESCRIPTOR_SR


def _sqrtm_psd(C: np.ndarray) -> np.ndarray:
    w, v = np.linalg.eigh(C)
    return (v * np.sqrt(np.clip(w, 0, None))) @ v.T


def _random_cov(rng: np.random.Generator, d: int) -> np.ndarray:
    A = rng.standard_normal((d, d))
    return A @ A.T / d + 0.1 * np.eye(d)


def test_frechet_of_a_set_with_itself_is_zero(rng):
    X = rng.standard_normal((200, 6)) @ rng.standard_normal((6, 6))
    assert quality.frechet_distance(X, X) == pytest.approx(0.0, abs=1e-8)


def test_frechet_one_dimension_matches_the_closed_form():
    # Dowson & Landau 1982: in 1-D the squared distance is (m1 - m2)^2 + (s1 - s2)^2
    d = quality.gaussian_frechet(np.array([1.5]), np.array([[4.0]]), np.array([-0.5]),
                                 np.array([[0.25]]))
    assert d == pytest.approx((1.5 + 0.5) ** 2 + (2.0 - 0.5) ** 2, rel=1e-12)


def test_frechet_of_non_commuting_covariances_matches_the_symmetric_form(rng):
    # Dowson & Landau 1982: Tr(C1 + C2 - 2 (C1^1/2 C2 C1^1/2)^1/2), computed here with
    # eigendecompositions only, against scipy.linalg.sqrtm of C1 C2 inside the module
    d = 5
    m1, m2 = rng.standard_normal(d), rng.standard_normal(d)
    C1, C2 = _random_cov(rng, d), _random_cov(rng, d)
    r1 = _sqrtm_psd(C1)
    expected = (np.sum((m1 - m2) ** 2) + np.trace(C1) + np.trace(C2)
                - 2 * np.trace(_sqrtm_psd(r1 @ C2 @ r1)))
    assert quality.gaussian_frechet(m1, C1, m2, C2) == pytest.approx(expected, rel=1e-8)


def test_frechet_of_samples_approaches_the_gaussians_distance(rng):
    m1, m2 = np.zeros(3), np.array([1.0, 0.0, -1.0])
    C1, C2 = np.diag([1.0, 2.0, 0.5]), np.diag([0.5, 2.0, 2.0])
    X = rng.multivariate_normal(m1, C1, size=40000)
    Y = rng.multivariate_normal(m2, C2, size=40000)
    exact = 2.0 + np.sum((np.sqrt(np.diag(C1)) - np.sqrt(np.diag(C2))) ** 2)
    assert quality.frechet_distance(X, Y) == pytest.approx(exact, rel=0.03)


def test_subsampling_uses_the_reference_size_and_the_whole_of_small_sets(rng):
    ref = rng.standard_normal((30, 3))
    small = rng.standard_normal((20, 3))
    assert quality.subsampled_frechet(small, ref) == quality.frechet_distance(small, ref)
    big = rng.standard_normal((300, 3))
    a = quality.subsampled_frechet(big, ref, rng=1)
    assert a == quality.subsampled_frechet(big, ref, rng=1)  # seeded
    assert a > quality.frechet_distance(big, ref) * 0.5  # same scale as the whole set


def test_knn_recognises_separated_clusters(rng):
    centres = {"kick": np.zeros(4), "hat": np.full(4, 10.0), "tom": np.array([10.0, 0, 0, 0])}
    train = np.concatenate([c + rng.standard_normal((20, 4)) for c in centres.values()])
    labels = [k for k in centres for _ in range(20)]
    queries = np.stack([c + 0.3 * rng.standard_normal(4) for c in centres.values()])
    assert quality.knn_classify(train, labels, queries, k=5) == list(centres)


def test_copy_ratio_is_zero_for_copies_and_near_one_for_new_draws(rng):
    train = rng.standard_normal((200, 5))
    held = rng.standard_normal((60, 5))
    assert quality.copy_ratio(train[:50], train, held) == 0.0
    fresh = rng.standard_normal((60, 5))
    assert 0.7 < quality.copy_ratio(fresh, train, held) < 1.4


def test_paired_ratio_is_zero_for_identical_pairs(rng):
    ref = rng.standard_normal((50, 4))
    a = rng.standard_normal((10, 4))
    spacing = quality.typical_spacing(ref)
    assert 0 < spacing < quality.typical_spacing(ref[::10])  # sparser sets lie farther apart
    assert np.all(quality.paired_distance_ratio(a, a, spacing) == 0)
    np.testing.assert_allclose(quality.paired_distance_ratio(a, a + [3.0, 4.0, 0, 0], 2.5), 2.0)
    assert quality.typical_spacing(ref, ref[:5]) == 0.0  # members of the reference itself


# ---------------------------------------------------------------- descriptors


def _decaying(signal: np.ndarray, tau: float) -> np.ndarray:
    t = np.arange(len(signal)) / SR
    return signal * np.exp(-t / tau)


def test_descriptor_vector_has_the_documented_names(rng):
    x = quality.describe(_decaying(rng.standard_normal(SR), 0.1), SR)
    assert x.shape == (len(quality.DESCRIPTOR_NAMES),) and np.all(np.isfinite(x))


def test_centroid_of_a_tone_is_its_frequency():
    t = np.arange(SR) / SR
    x = quality.describe(np.sin(2 * np.pi * 1000.0 * t), SR)
    centroid_khz = np.exp(x[quality.DESCRIPTOR_NAMES.index("centroid_mean")])
    assert centroid_khz == pytest.approx(1.0, rel=0.03)


def test_noise_is_flatter_than_a_tone(rng):
    t = np.arange(SR) / SR
    tone = quality.describe(np.sin(2 * np.pi * 440.0 * t), SR)
    noise = quality.describe(rng.standard_normal(SR), SR)
    i = quality.DESCRIPTOR_NAMES.index("flatness_mean")
    assert noise[i] > tone[i] + 3.0  # about 0.5 against 1e-3 or less (log units)


def test_floored_flatness_is_librosa_flatness_when_no_bin_is_below_the_floor(rng):
    # librosa.feature.spectral_flatness (gmean / mean of the power spectrum) as reference
    import librosa

    P = rng.uniform(0.5, 2.0, size=(1025, 20))
    ref = librosa.feature.spectral_flatness(S=np.sqrt(P), power=2.0, amin=1e-30)[0]
    np.testing.assert_allclose(quality.floored_flatness(P), ref, rtol=1e-9)
    # a frame with an empty band: the floor at -60 dB keeps it from reading near zero
    P[:300] = 0.0
    assert np.all(quality.floored_flatness(P) > 1e-3)


@pytest.mark.parametrize("tau", [0.05, 0.15])
def test_decay_time_of_an_exponential(rng, tau):
    # power falls 20 log10(e) / tau dB per second: -20 dB at t = tau ln(10), -40 at twice that
    y = _decaying(rng.standard_normal(SR), tau)
    x = quality.describe(y, SR)
    for name, drop in (("decay20", 1.0), ("decay40", 2.0)):
        t = np.exp(x[quality.DESCRIPTOR_NAMES.index(name)]) - 0.01
        assert t == pytest.approx(drop * tau * np.log(10), abs=0.035)  # 3 hops of 11.6 ms


def test_descriptors_resample_to_the_descriptor_rate(rng):
    import soxr

    # noise below 15 kHz: both rates carry the whole band (soxr rolls off near Nyquist)
    spectrum = np.fft.rfft(rng.standard_normal(SR))
    spectrum[np.fft.rfftfreq(SR, 1 / SR) > 15000] = 0
    y = _decaying(np.fft.irfft(spectrum, SR), 0.1)
    at_48k = soxr.resample(y, SR, 48000, quality="HQ")
    a, b = quality.describe(y, SR), quality.describe(at_48k, 48000)
    assert np.max(np.abs(a - b)) < 0.25
