"""Where the library lives in latent space: densities fitted to the clips' codes.

A VAE's codes do not fill its prior N(0, I): on small libraries they form a ring
or islands, and prior samples land where no sound lives. After training, a
density is fitted to the codes instead (ex-post density estimation, Ghosh et al.
2020, "From Variational to Deterministic Autoencoders"), and ``generate`` samples it.

The density is a Gaussian kernel density estimate written as a mixture (Parzen 1962):
one component at each code, all sharing the codes' covariance scaled by a bandwidth².
For the library, ``LIBRARY_BANDWIDTH``; for ``--near C``, the category's own codes and
covariance with ``NEAR_BANDWIDTH``. Measured on real drums (tests/benchmarks/
bench_quality.py; DEVELOPERS.md): a full-covariance mixture fitted by
expectation-maximisation (Dempster, Laird & Rubin 1977) with its number of components
chosen by the Bayesian information criterion (Schwarz 1978) takes two components for
300 codes in 16 dimensions and puts many samples between the clusters (2.1x the real
floor against 1.6x); one Gaussian per category put closed hats among the cymbals.
Smaller bandwidths drift toward copies of the clips, larger ones toward the single
Gaussian. The BIC mixture stays available (``fit_mixture``; ``prior="mixture"``).

Small libraries give few codes per component, so every covariance is shrunk
toward an isotropic one, as if ``SHRINK_POINTS`` extra points with the pooled
per-dimension variance were added (a maximum a posteriori M-step; common practice).

Pure numpy; a :class:`Mixture` travels in the model file as plain arrays.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from pipeline.errors import ParameterError

MAX_COMPONENTS = 8
LIBRARY_BANDWIDTH = 0.3  # the library's kernels: this fraction of all codes' spread
NEAR_BANDWIDTH = 0.6  # a category's kernels: this fraction of its codes' spread
SHRINK_POINTS = 4.0
POINTS_PER_PARAMETER_SET = 2  # a component needs about 2 (D + 1) codes of its own
_LOG_2PI = float(np.log(2.0 * np.pi))


@dataclass(frozen=True)
class Mixture:
    """A Gaussian mixture: ``weights (K,)``, ``means (K, D)``, ``covs (K, D, D)``, or
    ``covs (1, D, D)`` for one covariance that every component shares."""

    weights: np.ndarray
    means: np.ndarray
    covs: np.ndarray

    @property
    def n_components(self) -> int:
        return len(self.weights)

    @property
    def dim(self) -> int:
        return self.means.shape[1]

    def to_arrays(self) -> dict[str, np.ndarray]:
        return {"weights": self.weights, "means": self.means, "covs": self.covs}


def check_mixture(weights, means, covs, *, dim: int | None = None) -> Mixture:
    """A :class:`Mixture` from arrays, or ParameterError saying what is wrong with them.

    Weights must be finite, non-negative and sum to 1; means finite ``(K, D)``;
    covariances finite, symmetric and positive definite ``(K, D, D)``.
    """
    try:
        w = np.asarray(weights, dtype=np.float64)
        m = np.asarray(means, dtype=np.float64)
        c = np.asarray(covs, dtype=np.float64)
    except (TypeError, ValueError):
        raise ParameterError("mixture arrays are not numeric") from None
    if w.ndim != 1 or w.size == 0 or m.ndim != 2 or c.ndim != 3:
        raise ParameterError(f"mixture shapes {w.shape}, {m.shape}, {c.shape} are not "
                             "(K,), (K, D), (K, D, D)")
    k, d = m.shape
    if (w.shape != (k,) or c.shape[1:] != (d, d) or c.shape[0] not in (1, k)
            or (dim is not None and d != dim)):
        raise ParameterError(f"mixture shapes {w.shape}, {m.shape}, {c.shape} do not fit "
                             f"{k} components of dimension {dim or d}")
    if not (np.all(np.isfinite(w)) and np.all(np.isfinite(m)) and np.all(np.isfinite(c))):
        raise ParameterError("mixture holds non-finite values")
    if np.any(w < 0) or abs(w.sum() - 1.0) > 1e-6:
        raise ParameterError(f"mixture weights must be >= 0 and sum to 1 (sum {w.sum():.6g})")
    if not np.allclose(c, np.swapaxes(c, 1, 2), rtol=1e-6, atol=1e-9):
        raise ParameterError("mixture covariances are not symmetric")
    try:
        np.linalg.cholesky(c)
    except np.linalg.LinAlgError:
        raise ParameterError("mixture covariances are not positive definite") from None
    return Mixture(w, m, c)


# --------------------------------------------------------------------------- density


def _component_logpdf(X: np.ndarray, means: np.ndarray, covs: np.ndarray) -> np.ndarray:
    """``log N(x_i | m_k, C_k)``, shape ``(N, K)``."""
    n, d = X.shape
    out = np.empty((n, len(means)))
    Ls = np.linalg.cholesky(covs)
    for k, m in enumerate(means):
        L = Ls[k if len(Ls) > 1 else 0]
        sol = np.linalg.solve(L, (X - m).T)  # (D, N)
        out[:, k] = -0.5 * (d * _LOG_2PI + np.sum(sol**2, axis=0)) - np.log(np.diag(L)).sum()
    return out


def log_density(mix: Mixture, X: np.ndarray) -> np.ndarray:
    """Log density of each row of ``X`` under the mixture, ``(N,)``."""
    X = np.atleast_2d(np.asarray(X, dtype=np.float64))
    with np.errstate(divide="ignore"):
        a = _component_logpdf(X, mix.means, mix.covs) + np.log(mix.weights)
    top = a.max(axis=1, keepdims=True)
    return (top + np.log(np.exp(a - top).sum(axis=1, keepdims=True)))[:, 0]


def sample_mixture(mix: Mixture, n: int, *, temperature: float = 1.0,
                   rng: np.random.Generator | int | None = None) -> np.ndarray:
    """``n`` codes: a component by weight, then ``mean + T * chol(cov) eps``, ``(n, D)``.

    ``temperature`` T scales the spread around each component (T = 0 gives its means).
    """
    if not np.isfinite(temperature) or not 0 <= temperature <= 100:  # latent.MAX_SPREAD
        raise ParameterError(f"temperature={temperature!r} must be a number between 0 and 100")
    rng = rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)
    comp = rng.choice(mix.n_components, size=int(n), p=mix.weights)
    eps = rng.standard_normal((int(n), mix.dim))
    L = np.linalg.cholesky(mix.covs)  # (K, D, D) or (1, D, D) shared
    L = L[comp] if len(L) > 1 else np.broadcast_to(L, (int(n),) + L.shape[1:])
    return mix.means[comp] + temperature * np.einsum("nij,nj->ni", L, eps)


# --------------------------------------------------------------------------- fitting


def _kmeanspp(X: np.ndarray, k: int, rng: np.random.Generator) -> np.ndarray:
    """k-means++ seeding (Arthur & Vassilvitskii 2007): the initial means."""
    centres = [X[rng.integers(len(X))]]
    for _ in range(1, k):
        d2 = np.min(((X[:, None, :] - np.array(centres)[None]) ** 2).sum(-1), axis=1)
        total = d2.sum()
        p = d2 / total if total > 0 else None
        centres.append(X[rng.choice(len(X), p=p)])
    return np.array(centres)


def _m_step(X: np.ndarray, resp: np.ndarray, prior_var: float) -> Mixture:
    nk = resp.sum(axis=0) + 1e-12
    means = (resp.T @ X) / nk[:, None]
    d = X.shape[1]
    covs = np.empty((len(nk), d, d))
    for k in range(len(nk)):
        diff = X - means[k]
        scatter = (resp[:, k, None] * diff).T @ diff
        covs[k] = (scatter + SHRINK_POINTS * prior_var * np.eye(d)) / (nk[k] + SHRINK_POINTS)
    return Mixture(nk / nk.sum(), means, covs)


def _em(X: np.ndarray, k: int, rng: np.random.Generator, prior_var: float,
        max_iter: int, tol: float) -> tuple[Mixture, float]:
    """EM from a k-means++ start; the mixture and its total log-likelihood."""
    d2 = ((X[:, None, :] - _kmeanspp(X, k, rng)[None]) ** 2).sum(-1)
    resp = np.zeros((len(X), k))
    resp[np.arange(len(X)), np.argmin(d2, axis=1)] = 1.0
    mix, last = _m_step(X, resp, prior_var), -np.inf
    for _ in range(max_iter):
        a = _component_logpdf(X, mix.means, mix.covs) + np.log(mix.weights)
        top = a.max(axis=1, keepdims=True)
        norm = top + np.log(np.exp(a - top).sum(axis=1, keepdims=True))
        ll = float(norm.sum())
        resp = np.exp(a - norm)
        mix = _m_step(X, resp, prior_var)
        if ll - last < tol * len(X):
            break
        last = ll
    return mix, float(log_density(mix, X).sum())


def bic(mix: Mixture, total_log_likelihood: float, n: int) -> float:
    """Schwarz 1978: ``-2 log L + p log n`` with p free parameters of a full-covariance mixture."""
    k, d = mix.n_components, mix.dim
    p = k * (d + d * (d + 1) // 2) + k - 1
    return -2.0 * total_log_likelihood + p * np.log(n)


def max_components_for(n: int, dim: int, cap: int = MAX_COMPONENTS) -> int:
    """How many components ``n`` codes of dimension ``dim`` can support (at least 1)."""
    return max(1, min(cap, n // (POINTS_PER_PARAMETER_SET * (dim + 1))))


def fit_mixture(codes: np.ndarray, *, max_components: int = MAX_COMPONENTS, seed: int = 0,
                n_init: int = 2, max_iter: int = 200, tol: float = 1e-5) -> Mixture:
    """Fit a full-covariance Gaussian mixture to ``codes`` ``(N, D)``; K by BIC.

    K runs from 1 to :func:`max_components_for` ``(N, D)``; each K is fitted from
    ``n_init`` seeded k-means++ starts and the best likelihood kept. One code gives
    a single component at it with the isotropic prior covariance.
    """
    X = np.asarray(codes, dtype=np.float64)
    if X.ndim != 2 or len(X) == 0 or not np.all(np.isfinite(X)):
        raise ParameterError(f"codes must be a finite (N, D) array with N >= 1, got {X.shape}")
    n, d = X.shape
    prior_var = float(X.var(axis=0).mean()) if n > 1 else 1.0
    prior_var = prior_var if prior_var > 0 else 1.0
    rng = np.random.default_rng(seed)
    best, best_bic = None, np.inf
    for k in range(1, max_components_for(n, d, max_components) + 1):
        for _ in range(n_init if k > 1 else 1):
            mix, ll = _em(X, k, rng, prior_var, max_iter, tol)
            score = bic(mix, ll, n)
            if score < best_bic:
                best, best_bic = mix, score
    return check_mixture(best.weights / best.weights.sum(), best.means, best.covs)


def fit_kernels(codes: np.ndarray, *, bandwidth: float = NEAR_BANDWIDTH,
                prior_var: float | None = None) -> Mixture:
    """A Gaussian kernel density estimate as a mixture: one component at each code, all
    sharing ``bandwidth^2`` times the codes' covariance (shrunk toward isotropic as in
    :func:`fit_mixture`; a single code uses ``prior_var``, default 1, in every dimension)."""
    X = np.asarray(codes, dtype=np.float64)
    if X.ndim != 2 or len(X) == 0 or not np.all(np.isfinite(X)):
        raise ParameterError(f"codes must be a finite (N, D) array with N >= 1, got {X.shape}")
    n, d = X.shape
    own = float(X.var(axis=0).mean()) if n > 1 else 0.0
    iso = own if own > 0 else (prior_var or 1.0)
    scatter = (X - X.mean(0)).T @ (X - X.mean(0))
    cov = (scatter + SHRINK_POINTS * iso * np.eye(d)) / (n + SHRINK_POINTS)
    return check_mixture(np.full(n, 1.0 / n), X, (bandwidth**2 * cov)[None])


def fit_samplers(mu: np.ndarray, categories: Sequence[str | None]
                 ) -> tuple[Mixture, dict[str, Mixture]]:
    """The library's kernel mixture and one per category (:func:`fit_kernels`; clips
    without a category only count toward the library's). Deterministic: no seed."""
    mu = np.asarray(mu, dtype=np.float64)
    pooled = float(mu.var(axis=0).mean()) if len(mu) > 1 else 1.0
    library = fit_kernels(mu, bandwidth=LIBRARY_BANDWIDTH, prior_var=pooled or 1.0)
    per = {}
    for cat in sorted({c for c in categories if c}):
        rows = np.array([c == cat for c in categories])
        per[cat] = fit_kernels(mu[rows], prior_var=pooled or 1.0)
    return library, per


def draw_codes(library: Mixture, per_category: dict[str, Mixture], n: int, *,
               near: str | None = None, temperature: float = 1.0,
               rng: np.random.Generator | int | None = None) -> np.ndarray:
    """``n`` codes from the library's mixture, or from category ``near``'s own."""
    if near is None:
        return sample_mixture(library, n, temperature=temperature, rng=rng)
    if near not in per_category:
        known = ", ".join(sorted(per_category)) or "none (its clips had no category folders)"
        raise ParameterError(f"unknown category {near!r}; known categories: {known}")
    return sample_mixture(per_category[near], n, temperature=temperature, rng=rng)
