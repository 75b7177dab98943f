"""Latent-space math: prior samples, paths, category regions, variations, neighbours.

Pure numpy (no torch): codes in, codes or plain dicts out. Every function that
draws takes ``rng`` (a :class:`numpy.random.Generator` or an int seed; ``None``
draws fresh, non-reproducible entropy). Results are float64; callers cast for
the decoder.
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from typing import Any, Literal

import numpy as np
from scipy.spatial import cKDTree

from pipeline.errors import ParameterError

RngLike = np.random.Generator | int | None

# Shrinkage toward an isotropic target, in pseudo-clips: a category of n clips
# gets weight n / (n + _SHRINK_CLIPS) on its own sample covariance.
_SHRINK_CLIPS = 4.0
NO_CATEGORY = "(none)"


def _rng(rng: RngLike) -> np.random.Generator:
    return rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)


def _vector(x: Any, name: str) -> np.ndarray:
    a = np.asarray(x, dtype=np.float64)
    if a.ndim != 1 or a.size == 0:
        raise ParameterError(f"{name} must be a non-empty 1-D latent code, got shape {a.shape}")
    if not np.all(np.isfinite(a)):
        raise ParameterError(f"{name} contains non-finite values")
    return a


def check_codes(x: Any, name: str, *, min_rows: int = 1) -> np.ndarray:
    """``x`` as float64 ``(n, latent_dim)`` codes, finite, at least ``min_rows`` of them."""
    a = np.asarray(x, dtype=np.float64)
    if a.ndim != 2 or a.shape[1] == 0:
        raise ParameterError(f"{name} must be a 2-D array (n, latent_dim), got shape {a.shape}")
    if a.shape[0] < min_rows:
        raise ParameterError(f"{name} needs at least {min_rows} codes, got {a.shape[0]}")
    if not np.all(np.isfinite(a)):
        raise ParameterError(f"{name} contains non-finite values")
    return a


def check_count(n: Any, name: str, *, low: int = 0) -> int:
    """``n`` as an int, refused unless a whole number of at least ``low``."""
    if isinstance(n, bool) or int(n) != n or n < low:
        raise ParameterError(f"{name}={n!r} must be an integer >= {low}")
    return int(n)


# The widest spread (temperature, vary's amount): 100 times the fitted spread is already far
# outside anything the decoder saw; beyond it codes overflow to infinity (1e300 * sigma).
MAX_SPREAD = 100.0


def check_spread(t: Any, name: str = "temperature") -> float:
    """A temperature or amount: finite, between 0 and :data:`MAX_SPREAD`."""
    if isinstance(t, bool) or not isinstance(t, (int, float, np.number)) or not np.isfinite(t) \
            or not 0 <= t <= MAX_SPREAD:
        raise ParameterError(f"{name}={t!r} must be a number between 0 and {MAX_SPREAD:g}")
    return float(t)


def _temperature(t: float) -> float:
    return check_spread(t, "temperature")


def _t_values(t: Any) -> tuple[np.ndarray, bool]:
    ta = np.asarray(t, dtype=np.float64)
    if ta.ndim > 1 or not np.all(np.isfinite(ta)):
        raise ParameterError("t must be a finite number or a 1-D array of numbers")
    return np.atleast_1d(ta), ta.ndim == 0


# ---------------------------------------------------------------- sampling


def sample_prior(n: int, dim: int, *, temperature: float = 1.0, rng: RngLike = None) -> np.ndarray:
    """Draw ``n`` codes from the prior, z ~ N(0, T² I).

    Parameters
    ----------
    n, dim : int
        Number of codes and latent size.
    temperature : float >= 0
        Standard deviation T; below 1 stays nearer the well-trained centre.
    rng : Generator, int or None

    Returns
    -------
    z : np.ndarray [shape=(n, dim)]
    """
    n, dim = check_count(n, "n"), check_count(dim, "dim", low=1)
    return _temperature(temperature) * _rng(rng).standard_normal((n, dim))


def _cholesky(cov: np.ndarray) -> np.ndarray:
    try:
        return np.linalg.cholesky(cov)
    except np.linalg.LinAlgError:
        w, v = np.linalg.eigh(cov)
        return v * np.sqrt(np.clip(w, 0.0, None))


def sample_near(
    mean: np.ndarray, cov: np.ndarray, n: int, *, temperature: float = 1.0, rng: RngLike = None
) -> np.ndarray:
    """Draw ``n`` codes from N(mean, T² cov), as fitted by :func:`category_gaussian`.

    Returns
    -------
    z : np.ndarray [shape=(n, D)]
    """
    mean = _vector(mean, "mean")
    cov = np.asarray(cov, dtype=np.float64)
    if cov.shape != (mean.size, mean.size) or not np.all(np.isfinite(cov)):
        raise ParameterError(f"cov must be a finite ({mean.size}, {mean.size}) matrix")
    n, t = check_count(n, "n"), _temperature(temperature)
    eps = _rng(rng).standard_normal((n, mean.size))
    return mean + t * (eps @ _cholesky(cov).T)


def category_gaussian(
    mu: np.ndarray, categories: Sequence[str | None], category: str
) -> tuple[np.ndarray, np.ndarray]:
    """Fit a Gaussian to one category's posterior means.

    The mean is the category's mean code exactly. The covariance is shrunk
    toward an isotropic target so it is positive definite even for a handful of
    clips: ``w S + (1 - w) v I`` with ``w = n / (n + 4)``, S the unbiased sample
    covariance (zero for one clip) and v the average per-dimension variance of
    the clips around their own category means (pooled over every category; the
    whole library's variance when no category has two clips; 1 for one clip).

    Parameters
    ----------
    mu : np.ndarray [shape=(N, D)]
        Posterior means of the training clips.
    categories : sequence of str or None, length N
    category : str

    Returns
    -------
    mean : np.ndarray [shape=(D,)]
    cov : np.ndarray [shape=(D, D)]

    Raises
    ------
    ParameterError
        For a category the model does not know; the message lists the known ones.
    """
    mu = check_codes(mu, "mu")
    labels = list(categories)
    if len(labels) != mu.shape[0]:
        raise ParameterError(f"categories has {len(labels)} entries for {mu.shape[0]} codes")
    known = sorted({c for c in labels if c is not None})
    if category not in known:
        listed = ", ".join(known) if known else "none (its clips had no category folders)"
        raise ParameterError(f"unknown category {category!r}; known categories: {listed}")
    lab = np.array([NO_CATEGORY if c is None else c for c in labels], dtype=object)
    sel = mu[lab == category]
    mean = sel.mean(axis=0)
    dim = mu.shape[1]

    ss, dof = 0.0, 0
    for c in sorted(set(lab)):
        group = mu[lab == c]
        if len(group) > 1:
            ss += float(((group - group.mean(axis=0)) ** 2).sum())
            dof += len(group) - 1
    if dof:
        v = ss / dof / dim
    elif len(mu) > 1:
        v = float(mu.var(axis=0, ddof=1).mean())
    else:
        v = 1.0
    v = v if v > 0 else 1.0

    n = len(sel)
    s = np.cov(sel, rowvar=False, ddof=1).reshape(dim, dim) if n > 1 else np.zeros((dim, dim))
    w = n / (n + _SHRINK_CLIPS)
    cov = w * s + (1.0 - w) * v * np.eye(dim)
    return mean, cov


def variations(
    mu: np.ndarray, logvar: np.ndarray, n: int, *, amount: float = 1.0, rng: RngLike = None
) -> np.ndarray:
    """Codes around one sound: z = mu + amount · σ ⊙ ε, σ = exp(logvar / 2), ε ~ N(0, I).

    ``amount`` scales the standard deviation of the sound's own posterior
    q(z|x): 1 samples the posterior itself (the reparameterisation of Kingma &
    Welling 2014, §2.4), 0 returns ``mu`` exactly, ``n`` times (its
    reconstruction), 2 spreads twice as wide.

    Returns
    -------
    z : np.ndarray [shape=(n, D)]
    """
    mu, logvar = _vector(mu, "mu"), _vector(logvar, "logvar")
    if logvar.shape != mu.shape:
        raise ParameterError(f"logvar has shape {logvar.shape}, mu has {mu.shape}")
    n = check_count(n, "n")
    amount = check_spread(amount, "amount")
    if amount == 0:
        return np.repeat(mu[None], n, axis=0)
    eps = _rng(rng).standard_normal((n, mu.size))
    return mu + amount * np.exp(0.5 * logvar) * eps


# ---------------------------------------------------------------- paths


def lerp(a: np.ndarray, b: np.ndarray, t: float | np.ndarray) -> np.ndarray:
    """Linear interpolation (1 - t) a + t b.

    Returns shape (D,) for a scalar ``t``, (len(t), D) for a 1-D ``t``.
    """
    a, b = _vector(a, "a"), _vector(b, "b")
    if a.shape != b.shape:
        raise ParameterError(f"a and b differ in shape: {a.shape} and {b.shape}")
    ta, scalar = _t_values(t)
    out = (1.0 - ta)[:, None] * a + ta[:, None] * b
    out[ta == 0.0], out[ta == 1.0] = a, b
    return out[0] if scalar else out


def slerp(a: np.ndarray, b: np.ndarray, t: float | np.ndarray) -> np.ndarray:
    """Spherical linear interpolation (Shoemake 1985).

    slerp(a, b; t) = sin((1-t)Ω)/sin Ω · a + sin(tΩ)/sin Ω · b, with Ω the angle
    between a/|a| and b/|b|. For unnormalised latents the weights come from the
    normalised directions and apply to the raw vectors, as White 2016
    ("Sampling Generative Networks") does (from memory of its code): endpoints
    stay exact, equal-norm endpoints keep that norm along the whole path, and
    the path does not sag toward the origin as lerp does. Unlike quaternion
    slerp, ``b`` is never negated: a latent and its negation are different
    sounds. When Ω ≈ 0 (or a code is zero) this is lerp; when Ω ≈ π the great
    circle is undefined and it falls back to lerp with a warning.

    Returns shape (D,) for a scalar ``t``, (len(t), D) for a 1-D ``t``.
    """
    a, b = _vector(a, "a"), _vector(b, "b")
    if a.shape != b.shape:
        raise ParameterError(f"a and b differ in shape: {a.shape} and {b.shape}")
    na, nb = np.linalg.norm(a), np.linalg.norm(b)
    if na == 0 or nb == 0:
        return lerp(a, b, t)
    ua, ub = a / na, b / nb
    # Angle by 2·atan2(|ua-ub|, |ua+ub|): accurate near 0 and π, unlike arccos.
    omega = 2.0 * np.arctan2(np.linalg.norm(ua - ub), np.linalg.norm(ua + ub))
    so = np.sin(omega)
    if so < 1e-9:
        if omega > 1.0:
            warnings.warn(
                "slerp between opposite codes is undefined; using lerp", UserWarning, stacklevel=2
            )
        return lerp(a, b, t)
    ta, scalar = _t_values(t)
    # Shoemake 1985: sin((1-t)Ω)/sin Ω and sin(tΩ)/sin Ω.
    wa = np.sin((1.0 - ta) * omega) / so
    wb = np.sin(ta * omega) / so
    out = wa[:, None] * a + wb[:, None] * b
    out[ta == 0.0], out[ta == 1.0] = a, b
    return out[0] if scalar else out


def waypoint_steps(waypoints: np.ndarray, steps: int) -> np.ndarray:
    """Step index of each waypoint on a path of ``steps`` codes.

    Steps go to each segment in proportion to its Euclidean length, so the path
    moves at a roughly even pace through latent space (equal shares when every
    waypoint is the same code); each waypoint gets its own step, the first is
    step 0 and the last is step ``steps - 1``.

    Returns
    -------
    index : np.ndarray [shape=(K,), int]
    """
    w = check_codes(waypoints, "waypoints", min_rows=2)
    k = len(w)
    steps = check_count(steps, "steps", low=k)
    seg = np.linalg.norm(np.diff(w, axis=0), axis=1)
    cum = np.concatenate([[0.0], np.cumsum(seg)])
    frac = cum / cum[-1] if cum[-1] > 0 else np.linspace(0.0, 1.0, k)
    idx = np.rint(frac * (steps - 1)).astype(np.int64)
    idx[0], idx[-1] = 0, steps - 1
    for j in range(1, k - 1):
        idx[j] = min(max(idx[j], idx[j - 1] + 1), steps - 1 - (k - 1 - j))
    return idx


def latent_path(
    waypoints: np.ndarray, steps: int, *, kind: Literal["slerp", "lerp"] = "slerp"
) -> np.ndarray:
    """One continuous path of ``steps`` codes through every waypoint, in order.

    Waypoint k sits exactly at step ``waypoint_steps(waypoints, steps)[k]``;
    the steps between two waypoints are evenly spaced in t on that segment.

    Parameters
    ----------
    waypoints : np.ndarray [shape=(K, D)], K >= 2
    steps : int >= K
    kind : "slerp" or "lerp"

    Returns
    -------
    z : np.ndarray [shape=(steps, D)]
    """
    if kind not in ("slerp", "lerp"):
        raise ParameterError(f"kind={kind!r} must be 'slerp' or 'lerp'")
    w = check_codes(waypoints, "waypoints", min_rows=2)
    idx = waypoint_steps(w, steps)
    step = slerp if kind == "slerp" else lerp
    out = np.empty((int(steps), w.shape[1]))
    for j in range(len(w) - 1):
        i0, i1 = idx[j], idx[j + 1]
        t = (np.arange(i0, i1 + 1) - i0) / (i1 - i0)
        out[i0 : i1 + 1] = step(w[j], w[j + 1], t)
    out[idx] = w
    return out


# ---------------------------------------------------------------- neighbours


def nearest_codes(z: np.ndarray, codes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Nearest training code (Euclidean) to each of ``z``.

    Returns
    -------
    index : np.ndarray [shape=(M,), int64]
    distance : np.ndarray [shape=(M,), float64]
    """
    z, codes = check_codes(z, "z", min_rows=0), check_codes(codes, "codes")
    if z.shape[1] != codes.shape[1]:
        raise ParameterError(f"z has latent size {z.shape[1]}, codes have {codes.shape[1]}")
    if len(z) == 0:
        return np.zeros(0, np.int64), np.zeros(0)
    dist, index = cKDTree(codes).query(z, k=1)
    return np.asarray(index, np.int64), np.asarray(dist, np.float64)


def nearest_other_distances(codes: np.ndarray) -> np.ndarray:
    """Each code's distance to its nearest *other* code."""
    dist, _ = cKDTree(codes).query(codes, k=2)
    return dist[:, 1]


def typical_spacing(codes: np.ndarray) -> float:
    """Median distance from each training code to its nearest other code.

    Exact duplicates are left out when they would make the median zero.
    """
    codes = check_codes(codes, "codes", min_rows=2)
    d = nearest_other_distances(codes)
    med = float(np.median(d))
    if med > 0:
        return med
    pos = d[d > 0]
    if pos.size == 0:
        raise ParameterError("all training codes are identical; there is no spacing to measure")
    return float(np.median(pos))


def distance_ratio(distance: np.ndarray | float, spacing: float) -> np.ndarray:
    """Distance to the nearest training code in units of :func:`typical_spacing`.

    Well below 1, an output sits closer to a training clip than the training
    clips sit to each other: a near-copy (our rule of thumb).
    """
    if not np.isfinite(spacing) or spacing <= 0:
        raise ParameterError(f"spacing={spacing!r} must be a positive number")
    return np.asarray(distance, np.float64) / spacing
