"""Latent-space math and latent health, checked against published formulas and scipy."""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy import stats
from scipy.spatial.transform import Rotation, Slerp

from pipeline import latent
from pipeline import latent_health as health
from pipeline.errors import ParameterError


def _unit(rng: np.random.Generator, n: int, d: int) -> np.ndarray:
    x = rng.standard_normal((n, d))
    return x / np.linalg.norm(x, axis=1, keepdims=True)


# ---------------------------------------------------------------- slerp / lerp


def test_slerp_matches_scipy_quaternion_slerp():
    # Reference: scipy.spatial.transform.Slerp (constant angular velocity on the
    # shortest arc; quaternions scalar-last), as in tests/references.md section 8.
    rng = np.random.default_rng(1)
    t = np.linspace(0.0, 1.0, 9)
    for _ in range(40):
        q0, q1 = _unit(rng, 2, 4)
        if q0 @ q1 < 0:  # scipy takes the shortest path; quaternions q and -q are one rotation
            q1 = -q1
        ref = Slerp([0.0, 1.0], Rotation.from_quat([q0, q1], scalar_first=False))(t)
        ref = ref.as_quat(canonical=False, scalar_first=False)
        ours = latent.slerp(q0, q1, t)
        err = np.minimum(np.abs(ours - ref).max(axis=1), np.abs(ours + ref).max(axis=1))
        assert err.max() < 1e-12, err.max()


def test_slerp_endpoints_norm_and_constant_angle():
    # Shoemake 1985: slerp moves along the great circle at constant angular speed,
    # so the angle to the start is t * Omega and the norm stays 1.
    rng = np.random.default_rng(2)
    a, b = _unit(rng, 2, 16)
    t = np.linspace(0.0, 1.0, 21)
    path = latent.slerp(a, b, t)
    assert np.array_equal(path[0], a) and np.array_equal(path[-1], b)
    np.testing.assert_allclose(np.linalg.norm(path, axis=1), 1.0, atol=1e-12)
    omega = np.arccos(np.clip(a @ b, -1, 1))
    angle = np.arccos(np.clip(path @ a, -1, 1))
    np.testing.assert_allclose(angle, t * omega, atol=1e-7)
    assert latent.slerp(a, b, 0.3).shape == (16,)


def test_slerp_keeps_equal_norms_of_unnormalised_codes():
    rng = np.random.default_rng(3)
    a, b = 3.7 * _unit(rng, 2, 12)
    path = latent.slerp(a, b, np.linspace(0, 1, 11))
    np.testing.assert_allclose(np.linalg.norm(path, axis=1), 3.7, rtol=1e-12)
    assert np.array_equal(path[0], a) and np.array_equal(path[-1], b)


def test_lerp_midpoints_are_shorter_than_slerp_midpoints():
    # White 2016 ("Sampling Generative Networks"): for a Gaussian prior in high
    # dimension, lerp midpoints have too small a norm; slerp keeps the prior's norm.
    rng = np.random.default_rng(4)
    d, pairs = 16, 2000
    a, b = rng.standard_normal((2, pairs, d))
    lin = np.array([np.linalg.norm(latent.lerp(a[i], b[i], 0.5)) for i in range(pairs)])
    sph = np.array([np.linalg.norm(latent.slerp(a[i], b[i], 0.5)) for i in range(pairs)])
    assert np.all(lin < sph)
    ends = 0.5 * (np.linalg.norm(a, axis=1) + np.linalg.norm(b, axis=1))
    # (a + b) / 2 ~ N(0, I/2): its norm is about sqrt(d / 2), 1/sqrt(2) of the prior's.
    assert abs(lin.mean() / ends.mean() - 1 / np.sqrt(2)) < 0.03
    assert abs(sph.mean() / ends.mean() - 1.0) < 0.03


def test_lerp_is_linear():
    a, b = np.array([0.0, 2.0]), np.array([4.0, -2.0])
    np.testing.assert_allclose(latent.lerp(a, b, [0, 0.25, 1]), [[0, 2], [1, 1], [4, -2]])


def test_slerp_degenerate_cases_fall_back_to_lerp():
    a = np.array([1.0, 2.0, 3.0])
    np.testing.assert_allclose(latent.slerp(a, 2 * a, 0.5), 1.5 * a)  # Omega = 0
    np.testing.assert_allclose(latent.slerp(np.zeros(3), a, 0.5), 0.5 * a)
    with pytest.warns(UserWarning, match="opposite"):
        np.testing.assert_allclose(latent.slerp(a, -a, 0.25), 0.5 * a)


def test_latent_path_passes_through_every_waypoint():
    rng = np.random.default_rng(5)
    w = rng.standard_normal((4, 12))
    for kind in ("slerp", "lerp"):
        path = latent.latent_path(w, 25, kind=kind)
        idx = latent.waypoint_steps(w, 25)
        assert path.shape == (25, 12)
        assert idx[0] == 0 and idx[-1] == 24 and np.all(np.diff(idx) >= 1)
        for k, i in enumerate(idx):
            assert np.array_equal(path[i], w[k])
    # Steps follow segment lengths, so the pace is roughly even along a lerp path.
    path = latent.latent_path(w, 40, kind="lerp")
    hop = np.linalg.norm(np.diff(path, axis=0), axis=1)
    total = np.linalg.norm(np.diff(w, axis=0), axis=1).sum()
    assert hop.max() < 2 * total / 39


def test_latent_path_edge_cases():
    w = np.array([[0.0, 1.0], [1.0, 0.0], [0.0, -1.0]])
    assert np.array_equal(latent.latent_path(w, 3), w)  # every step a waypoint
    assert np.array_equal(latent.latent_path(np.zeros((3, 2)), 5), np.zeros((5, 2)))
    two = latent.latent_path(w[:2], 2, kind="lerp")
    assert np.array_equal(two, w[:2])
    with pytest.raises(ParameterError, match="steps"):
        latent.latent_path(w, 2)
    with pytest.raises(ParameterError, match="kind"):
        latent.latent_path(w, 5, kind="cubic")


# ---------------------------------------------------------------- sampling


def test_sample_prior_is_n0_t2():
    z = latent.sample_prior(20000, 4, temperature=0.5, rng=0)
    assert z.shape == (20000, 4)
    np.testing.assert_allclose(z.std(axis=0), 0.5, rtol=0.03)
    assert stats.kstest(z[:, 0] / 0.5, "norm").pvalue > 1e-3  # scipy.stats: normality
    assert np.array_equal(latent.sample_prior(3, 2, temperature=0.0, rng=1), np.zeros((3, 2)))
    with pytest.raises(ParameterError, match="temperature"):
        latent.sample_prior(3, 2, temperature=-1.0, rng=0)


def test_seeded_reproducibility():
    mu, logvar = np.arange(6.0), np.full(6, -2.0)
    mean, cov = np.zeros(6), np.eye(6)
    for f in (
        lambda r: latent.sample_prior(5, 6, rng=r),
        lambda r: latent.sample_near(mean, cov, 5, rng=r),
        lambda r: latent.variations(mu, logvar, 5, amount=1.0, rng=r),
    ):
        assert np.array_equal(f(7), f(np.random.default_rng(7)))
        assert not np.array_equal(f(7), f(8))
    codes = np.random.default_rng(0).standard_normal((50, 6))
    cats = ["a"] * 25 + ["b"] * 25
    r1 = health.health_report(codes, None, cats, n_samples=300, rng=3)
    r2 = health.health_report(codes, None, cats, n_samples=300, rng=3)
    assert r1 == r2


def test_variations():
    mu, logvar = np.array([0.5, -1.0, 2.0]), np.log(np.array([0.04, 0.25, 1.0]))
    assert np.array_equal(latent.variations(mu, logvar, 4, amount=0.0, rng=0), np.tile(mu, (4, 1)))
    # Kingma & Welling 2014, section 2.4: z = mu + sigma * eps samples the posterior.
    z = latent.variations(mu, logvar, 40000, amount=1.0, rng=1)
    np.testing.assert_allclose(z.mean(axis=0), mu, atol=0.02)
    np.testing.assert_allclose(z.std(axis=0), [0.2, 0.5, 1.0], rtol=0.03)
    z2 = latent.variations(mu, logvar, 40000, amount=2.0, rng=1)
    np.testing.assert_allclose(z2.std(axis=0), [0.4, 1.0, 2.0], rtol=0.03)
    with pytest.raises(ParameterError, match="amount"):
        latent.variations(mu, logvar, 2, amount=-0.1)


def test_category_gaussian_and_sample_near():
    rng = np.random.default_rng(6)
    mu = np.concatenate([rng.normal(-2, 0.3, (40, 12)), rng.normal(2, 0.5, (3, 12)),
                         rng.normal(0, 1, (1, 12))])
    cats = ["kick"] * 40 + ["snare"] * 3 + ["hat"]
    for name, sel in (("kick", slice(0, 40)), ("snare", slice(40, 43)), ("hat", slice(43, 44))):
        mean, cov = latent.category_gaussian(mu, cats, name)
        np.testing.assert_allclose(mean, mu[sel].mean(axis=0), rtol=0, atol=1e-12)
        np.testing.assert_allclose(cov, cov.T)
        np.linalg.cholesky(cov)  # positive definite even for 1 or 3 clips
    mean, cov = latent.category_gaussian(mu, cats, "kick")
    # With 40 clips the sample covariance dominates (weight 40 / 44).
    np.testing.assert_allclose(np.diag(cov).mean(), 0.09, rtol=0.2)
    z = latent.sample_near(mean, cov, 20000, temperature=1.0, rng=0)
    np.testing.assert_allclose(z.mean(axis=0), mean, atol=0.02)
    np.testing.assert_allclose(np.cov(z, rowvar=False), cov, atol=0.01)
    z0 = latent.sample_near(mean, cov, 3, temperature=0.0, rng=0)
    assert np.array_equal(z0, np.tile(mean, (3, 1)))
    idx, _ = latent.nearest_codes(latent.sample_near(mean, cov, 200, rng=1), mu)
    assert np.all(idx < 40)  # samples near kicks are nearest to kicks


def test_unknown_category_lists_known_ones():
    mu = np.zeros((3, 2)) + np.arange(3)[:, None]
    with pytest.raises(ParameterError, match=r"'clap'.*hat, kick"):
        latent.category_gaussian(mu, ["kick", "hat", None], "clap")
    with pytest.raises(ParameterError, match="no category"):
        latent.category_gaussian(mu, [None] * 3, "kick")


# ---------------------------------------------------------------- neighbours


def test_nearest_codes_and_spacing_match_brute_force():
    rng = np.random.default_rng(7)
    codes, z = rng.standard_normal((300, 8)), rng.standard_normal((50, 8))
    idx, dist = latent.nearest_codes(z, codes)
    full = np.linalg.norm(z[:, None] - codes[None], axis=2)
    assert np.array_equal(idx, full.argmin(axis=1))
    np.testing.assert_allclose(dist, full.min(axis=1), rtol=1e-12)
    self_d = np.linalg.norm(codes[:, None] - codes[None], axis=2)
    np.fill_diagonal(self_d, np.inf)
    spacing = latent.typical_spacing(codes)
    assert spacing == pytest.approx(np.median(self_d.min(axis=1)), rel=1e-12)
    np.testing.assert_allclose(latent.distance_ratio(dist, spacing), dist / spacing)
    _, d0 = latent.nearest_codes(codes[:5], codes)
    assert np.all(d0 == 0)  # a training code is its own nearest clip, ratio 0


def test_typical_spacing_with_duplicates():
    codes = np.array([[0.0, 0], [0, 0], [0, 0], [3, 0], [0, 4]])
    assert latent.typical_spacing(codes) == pytest.approx(3.5)  # median of 3 and 4
    with pytest.raises(ParameterError, match="identical"):
        latent.typical_spacing(np.ones((4, 3)))


# ---------------------------------------------------------------- health


def test_active_units_counts_dimensions_that_vary():
    # Burda et al. 2016: unit u is active when Var_x(E[z_u | x]) > 0.01.
    rng = np.random.default_rng(8)
    d, k = 10, 3
    mu = rng.standard_normal((400, d))
    mu[:, :k] = 0.7  # constant in k dimensions
    au = health.active_units(mu)
    assert (au["active"], au["total"]) == (d - k, d)
    mu[:, k] = rng.normal(0, np.sqrt(0.003), 400)  # varies, but below the threshold
    assert health.active_units(mu)["active"] == d - k - 1
    assert health.active_units(np.zeros((20, 4)))["rating"] == "poor"


def test_prior_match_of_prior_draws_is_near_zero():
    rng = np.random.default_rng(9)
    pm = health.prior_match(rng.standard_normal((5000, 8)))
    assert pm["kl_gaussian_to_prior"] < 0.01 and pm["mean_norm"] < 0.1
    assert pm["rating"] == "good"
    # Mixture moments: means with variance 0.5 plus posteriors of variance 0.5
    # make an aggregate posterior of variance 1, i.e. the prior.
    mu = rng.normal(0, np.sqrt(0.5), (5000, 8))
    pm = health.prior_match(mu, np.full_like(mu, np.log(0.5)))
    assert pm["kl_gaussian_to_prior"] < 0.01
    assert health.prior_match(mu)["kl_gaussian_to_prior"] > 0.5  # means alone are too narrow


def test_prior_match_of_shifted_squeezed_cluster_is_large():
    rng = np.random.default_rng(10)
    d, s = 8, 0.1
    mu = rng.normal(3.0, s, (4000, d))
    pm = health.prior_match(mu)
    # Closed form for N(3·1, s² I) against N(0, I): ½ D (s² + 9 - 1 - log s²).
    expected = 0.5 * d * (s**2 + 9.0 - 1.0 - np.log(s**2))
    assert pm["kl_gaussian_to_prior"] == pytest.approx(expected, rel=0.02)
    assert pm["mean_norm"] == pytest.approx(3.0 * np.sqrt(d), rel=0.01)
    assert pm["rating"] == "poor" and "far from the origin" in pm["verdict"]


def test_prior_match_kl_agrees_with_monte_carlo():
    # Reference: E_q[log q(z) - log p(z)] with scipy.stats.multivariate_normal
    # log-densities, within 4 standard errors of the Monte Carlo mean.
    rng = np.random.default_rng(11)
    a = rng.normal(0, 0.6, (4, 4))
    mu = rng.standard_normal((3000, 4)) @ a + np.array([0.5, -0.2, 0.1, 0.3])
    m, cov = mu.mean(axis=0), np.cov(mu, rowvar=False, ddof=0)
    q, p = stats.multivariate_normal(m, cov), stats.multivariate_normal(np.zeros(4), np.eye(4))
    z = q.rvs(size=100000, random_state=12)
    diff = q.logpdf(z) - p.logpdf(z)
    se = diff.std(ddof=1) / np.sqrt(len(diff))
    kl = health.prior_match(mu)["kl_gaussian_to_prior"]
    assert abs(kl - diff.mean()) < 4 * se


def test_holes_near_five_percent_when_codes_fill_the_prior():
    rng = np.random.default_rng(13)
    codes = rng.standard_normal((2000, 6))
    h = health.holes(latent.sample_prior(20000, 6, rng=14), codes)
    assert 0.035 < h["share"] < 0.065, h["share"]
    assert h["expected_share"] == pytest.approx(0.05) and h["rating"] == "good"
    # Two tight clusters far apart leave the prior's middle empty.
    clusters = np.concatenate([rng.normal(-3, 0.1, (1000, 6)), rng.normal(3, 0.1, (1000, 6))])
    h = health.holes(latent.sample_prior(5000, 6, rng=15), clusters)
    assert h["share"] > 0.9 and h["rating"] == "poor"


def test_near_duplicate_codes_do_not_make_every_new_sample_a_hole():
    # every clip twice, a hair apart (velocity layers): the nearest code would be a
    # twin, so only the fifth-nearest measures how far a sample is from the library
    rng = np.random.default_rng(17)
    codes = rng.standard_normal((400, 6))
    twins = np.concatenate([codes, codes + 1e-4 * rng.standard_normal(codes.shape)])
    h = health.holes(latent.sample_prior(20000, 6, rng=18), twins)
    assert h["share"] < 0.1 and h["neighbour"] == 5


def _two_clusters(n_a: int, n_b: int) -> tuple[np.ndarray, list[str]]:
    rng = np.random.default_rng(16)
    a = rng.normal(0, 0.1, (n_a, 3)) + [-4, 0, 0]
    b = rng.normal(0, 0.1, (n_b, 3)) + [4, 0, 0]
    return np.concatenate([a, b]), ["a"] * n_a + ["b"] * n_b


@pytest.mark.parametrize(
    ("library", "prior", "tv"),
    [((50, 50), (900, 100), 0.4), ((50, 50), (500, 500), 0.0), ((90, 10), (500, 500), 0.4),
     ((90, 10), (900, 100), 0.0)],
)
def test_category_balance_total_variation(library, prior, tv):
    # Total-variation distance 0.5 * sum |p - q| between prior shares and library shares.
    codes, cats = _two_clusters(*library)
    rng = np.random.default_rng(17)
    samples = np.concatenate([rng.normal(0, 0.5, (prior[0], 3)) + [-4, 0, 0],
                              rng.normal(0, 0.5, (prior[1], 3)) + [4, 0, 0]])
    cb = health.category_balance(samples, codes, cats)
    assert cb["total_variation"] == pytest.approx(tv, abs=1e-12)
    shares = {s["category"]: s for s in cb["shares"]}
    assert shares["a"]["prior_share"] == pytest.approx(prior[0] / sum(prior))
    assert shares["a"]["library_share"] == pytest.approx(library[0] / sum(library))
    assert cb["rating"] == ("poor" if tv > 0.25 else "good")


def test_category_balance_symmetric_library_under_the_prior():
    codes, cats = _two_clusters(60, 60)
    cb = health.category_balance(latent.sample_prior(4000, 3, rng=18), codes, cats)
    assert cb["total_variation"] < 0.03
    cb = health.category_balance(np.zeros((5, 3)), codes[:3], [None, None, None])
    assert cb["shares"] == [{"category": "(none)", "prior_share": 1.0, "library_share": 1.0}]


def test_health_report_is_json_with_every_key():
    rng = np.random.default_rng(19)
    mu, logvar = rng.standard_normal((120, 8)), rng.normal(-3, 0.1, (120, 8))
    cats = ["kick", "snare", "hat", None] * 30
    rep = health.health_report(mu, logvar, cats, n_samples=500, rng=0)
    assert set(rep) == {"active_units", "prior_match", "category_balance", "holes", "sampler"}
    assert rep.pop("sampler") == "500 samples from the prior N(0, I)"
    json.dumps(rep, allow_nan=False)
    for part in rep.values():
        assert part["verdict"].startswith(part["rating"] + ": ")
        assert part["rating"] in ("good", "fair", "poor")


def test_bad_input_is_a_parameter_error():
    with pytest.raises(ParameterError, match="mu"):
        health.active_units(np.zeros(5))
    with pytest.raises(ParameterError, match="non-finite"):
        health.prior_match(np.array([[0.0, np.nan], [1.0, 2.0]]))
    with pytest.raises(ParameterError, match="latent size"):
        latent.nearest_codes(np.zeros((2, 3)), np.zeros((4, 2)))
    with pytest.raises(ParameterError, match="shape"):
        latent.slerp(np.zeros(3), np.zeros(4), 0.5)
