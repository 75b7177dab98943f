"""The fitted latent sampler (pipeline.sampler) against scikit-learn and the mixture's moments."""

from __future__ import annotations

import numpy as np
import pytest

from pipeline import sampler
from pipeline.errors import ParameterError

RNG_SEED = 1977  # conftest's rng fixture: the draws these tests were written with


def _mixture(rng: np.random.Generator, d: int = 4) -> sampler.Mixture:
    A = rng.standard_normal((2, d, d))
    covs = A @ np.swapaxes(A, 1, 2) / d + 0.2 * np.eye(d)
    means = np.stack([np.full(d, -3.0), np.full(d, 3.0)])
    return sampler.check_mixture([0.3, 0.7], means, covs)


def test_samples_reproduce_the_mixture_moments(rng):
    mix = _mixture(rng)
    z = sampler.sample_mixture(mix, 200_000, rng=rng)
    w, m, c = mix.weights, mix.means, mix.covs
    mean = w @ m
    cov = np.einsum("k,kij->ij", w, c + np.einsum("ki,kj->kij", m, m)) - np.outer(mean, mean)
    se = np.sqrt(np.diag(cov) / len(z))
    assert np.all(np.abs(z.mean(0) - mean) < 4 * se)  # 4 standard errors
    np.testing.assert_allclose(np.cov(z, rowvar=False), cov, atol=0.05 * np.abs(cov).max())


def test_temperature_scales_the_spread_around_each_component(rng):
    mix = _mixture(rng)
    at_zero = sampler.sample_mixture(mix, 50, temperature=0.0, rng=1)
    assert {tuple(r) for r in at_zero} <= {tuple(r) for r in mix.means}
    one = mix.means[1] - sampler.sample_mixture(
        sampler.check_mixture([1.0], mix.means[1:], mix.covs[1:]), 20_000, temperature=1.0, rng=2)
    half = mix.means[1] - sampler.sample_mixture(
        sampler.check_mixture([1.0], mix.means[1:], mix.covs[1:]), 20_000, temperature=0.5, rng=2)
    np.testing.assert_allclose(half, 0.5 * one, atol=1e-12)


def test_log_density_agrees_with_scikit_learn(rng):
    # sklearn.mixture.GaussianMixture.score_samples as the outside reference
    from sklearn.mixture import GaussianMixture

    mix = _mixture(rng)
    ref = GaussianMixture(n_components=2, covariance_type="full")
    ref.weights_, ref.means_, ref.covariances_ = mix.weights, mix.means, mix.covs
    ref.precisions_cholesky_ = np.linalg.inv(np.linalg.cholesky(mix.covs)).transpose(0, 2, 1)
    X = rng.standard_normal((500, 4)) * 3
    np.testing.assert_allclose(sampler.log_density(mix, X), ref.score_samples(X), rtol=1e-10)


def test_fit_finds_the_clusters_and_matches_scikit_learn_likelihood(rng):
    from sklearn.mixture import GaussianMixture

    true = _mixture(rng)
    X = sampler.sample_mixture(true, 1200, rng=rng)
    fitted = sampler.fit_mixture(X, seed=0)
    assert fitted.n_components == 2  # chosen by BIC from 1..8
    order = np.argsort(fitted.means[:, 0])
    np.testing.assert_allclose(fitted.means[order], true.means, atol=0.25)
    np.testing.assert_allclose(fitted.weights[order], true.weights, atol=0.05)
    ref = GaussianMixture(n_components=2, covariance_type="full", random_state=0).fit(X)
    # our covariances are shrunk a little toward isotropic: within 0.02 nats per code
    assert sampler.log_density(fitted, X).mean() == pytest.approx(ref.score(X), abs=0.02)


def test_few_codes_give_one_regularised_component(rng):
    X = rng.standard_normal((12, 16))  # fewer codes than a full covariance has parameters
    mix = sampler.fit_mixture(X)
    assert mix.n_components == 1 and np.all(np.linalg.eigvalsh(mix.covs[0]) > 0)
    one = sampler.fit_mixture(X[:1])
    np.testing.assert_allclose(one.means[0], X[0], rtol=1e-9)


def test_fit_samplers_per_category(rng):
    mu = np.concatenate([rng.standard_normal((40, 3)) - 4, rng.standard_normal((40, 3)) + 4])
    cats = ["kick"] * 40 + ["hat"] * 40
    library, per = sampler.fit_samplers(mu, cats)
    assert set(per) == {"hat", "kick"}
    assert per["kick"].means.mean() < -3 and per["hat"].means.mean() > 3
    # the library's kernels: one at every code, the codes' covariance scaled by the bandwidth
    np.testing.assert_array_equal(library.means, mu)
    assert library.covs.shape == (1, 3, 3)
    spread = np.trace(np.cov(mu.T, bias=True)) * sampler.LIBRARY_BANDWIDTH**2
    assert np.trace(library.covs[0]) == pytest.approx(spread, rel=0.1)


@pytest.mark.parametrize(("weights", "means", "covs", "match"), [
    ([np.nan, 1.0], np.zeros((2, 2)), np.stack([np.eye(2)] * 2), "non-finite"),
    ([0.5, 0.6], np.zeros((2, 2)), np.stack([np.eye(2)] * 2), "sum to 1"),
    ([1.0], np.zeros((1, 2)), np.array([[[1.0, 2.0], [2.0, 1.0]]]), "positive definite"),
    ([1.0], np.zeros((1, 2)), np.array([[[1.0, 0.5], [0.0, 1.0]]]), "symmetric"),
    ([1.0], np.zeros((1, 3)), np.stack([np.eye(2)]), "shapes"),
])
def test_crafted_mixtures_are_refused_in_one_line(weights, means, covs, match):
    with pytest.raises(ParameterError, match=match) as err:
        sampler.check_mixture(weights, means, covs)
    assert "\n" not in str(err.value)


def test_category_kernels_sit_on_the_codes_with_a_shared_scaled_covariance(rng):
    codes = rng.standard_normal((30, 5)) @ np.diag([3.0, 2.0, 1.0, 0.5, 0.2])
    mix = sampler.fit_kernels(codes, bandwidth=0.4)
    np.testing.assert_array_equal(mix.means, codes)
    assert mix.covs.shape == (1, 5, 5) and np.allclose(mix.weights, 1 / 30)
    # the shared covariance follows the codes' own spread (shrunk a little toward isotropic)
    var = np.diag(mix.covs[0]) / 0.4**2
    assert var[0] > 4 and var[-1] < 0.3 * var[0]
    z = sampler.sample_mixture(mix, 50_000, rng=rng)
    # a kernel mixture's covariance: the codes' (biased) covariance plus the kernels'
    expected = np.cov(codes, rowvar=False, ddof=0) + mix.covs[0]
    np.testing.assert_allclose(np.cov(z, rowvar=False), expected, atol=0.06 * expected.max())


def test_tied_mixture_density_agrees_with_scikit_learn(rng):
    # sklearn's covariance_type="tied" as the outside reference for a shared covariance
    from sklearn.mixture import GaussianMixture

    mix = sampler.fit_kernels(rng.standard_normal((12, 3)), bandwidth=0.5)
    ref = GaussianMixture(n_components=12, covariance_type="tied")
    ref.weights_, ref.means_, ref.covariances_ = mix.weights, mix.means, mix.covs[0]
    ref.precisions_cholesky_ = np.linalg.inv(np.linalg.cholesky(mix.covs[0])).T
    X = rng.standard_normal((200, 3)) * 2
    np.testing.assert_allclose(sampler.log_density(mix, X), ref.score_samples(X), rtol=1e-10)
