"""Latent health: is a model safe to sample from? (the figures of ``shotsmith inspect``).

Pure numpy over the training clips' posterior means (and log-variances). Each
metric returns a JSON-able dict with a ``rating`` (good / fair / poor) and a
one-line ``verdict`` in plain words for a sound designer; the rating thresholds
are our own rule of thumb. This module imports :mod:`pipeline.latent` (the sampler
``generate`` uses); nothing there imports it back.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

from pipeline.errors import ParameterError
from pipeline.latent import (
    NO_CATEGORY,
    RngLike,
    check_codes,
    check_count,
    nearest_codes,
    sample_prior,
)

_EIG_FLOOR = 1e-6  # smallest covariance eigenvalue kept, so log det stays finite


def _verdict(rating: str, text: str) -> dict[str, str]:
    return {"rating": rating, "verdict": f"{rating}: {text}"}


def active_units(mu: np.ndarray, threshold: float = 0.01) -> dict[str, Any]:
    """Latent dimensions whose posterior mean varies across clips (Burda et al. 2016).

    A_u = Var_x(E_q(z|x)[z_u]) with the unbiased (n - 1) variance; unit u is
    active when A_u > ``threshold`` (0.01 in the paper).

    Returns
    -------
    dict with ``active``, ``total``, ``threshold``, ``variances`` (per dimension),
    ``rating`` and ``verdict``.
    """
    mu = check_codes(mu, "mu", min_rows=2)
    var = mu.var(axis=0, ddof=1)  # Burda et al. 2016: Cov_x of the posterior mean
    k, d = int(np.sum(var > threshold)), mu.shape[1]
    if k == 0:
        v = _verdict("poor", "no latent dimension varies across clips, every code decodes "
                     "to the same sound; try a smaller beta, KL warm-up or free bits")
    elif k < max(2, d / 4):
        v = _verdict("fair", f"only {k} of {d} latent dimensions carry information, so "
                     "sounds vary in few ways; try a smaller beta or free bits")
    else:
        v = _verdict("good", f"{k} of {d} latent dimensions carry information")
    return {"active": k, "total": d, "threshold": float(threshold),
            "variances": [float(x) for x in var], **v}


def prior_match(mu: np.ndarray, logvar: np.ndarray | None = None) -> dict[str, Any]:
    """How far the aggregate posterior sits from the prior N(0, I).

    The aggregate posterior, the equal mixture of every clip's N(mu_i,
    diag exp(logvar_i)), is replaced by its moment-matched Gaussian: mean m =
    mean(mu) and covariance Σ = cov(mu) + mean_i diag(exp(logvar_i)) (both
    population moments, so they are the mixture's exact moments; Σ = cov(mu)
    when ``logvar`` is None). Its KL to the prior has the closed form
    KL = ½ (tr Σ + mᵀm - D - log det Σ) (the Gaussian KL; the diagonal case is
    Kingma & Welling 2014, Appendix B). Eigenvalues of Σ below 1e-6 are raised
    to 1e-6 so a collapsed dimension gives a large, finite figure.

    Returns
    -------
    dict with ``mean_norm``, ``kl_gaussian_to_prior``, ``kl_per_dim``,
    ``rating`` and ``verdict``. The rating thresholds are our own rule of thumb.
    """
    mu = check_codes(mu, "mu", min_rows=2)
    n, d = mu.shape
    m = mu.mean(axis=0)
    dev = mu - m
    cov = dev.T @ dev / n
    if logvar is not None:
        lv = check_codes(logvar, "logvar")
        if lv.shape != mu.shape:
            raise ParameterError(f"logvar has shape {lv.shape}, mu has {mu.shape}")
        cov = cov + np.diag(np.exp(lv).mean(axis=0))
    eig = np.clip(np.linalg.eigvalsh(cov), _EIG_FLOOR, None)
    kl = 0.5 * (float(eig.sum()) + float(m @ m) - d - float(np.log(eig).sum()))
    kl = max(kl, 0.0)
    norm, per_dim = float(np.linalg.norm(m)), kl / d
    # generate samples the mixture fitted to the codes by default; only --prior normal
    # draws from N(0, I), so that is what this figure speaks for
    if per_dim <= 0.1 and norm <= 0.5:
        v = _verdict("good", "codes are centred and spread like the prior; even "
                     "--prior normal samples land where the training sounds are")
    elif per_dim <= 0.5 and norm <= 1.5:
        v = _verdict("fair", "codes are a little off the prior; most --prior normal samples "
                     "will be usable (the default sampler follows the codes)")
    elif norm > 1.5:
        v = _verdict("poor", "codes sit far from the origin: --prior normal samples will be "
                     "off (the default sampler follows the codes; use it)")
    else:
        v = _verdict("poor", "codes are squeezed or stretched compared with the prior: "
                     "--prior normal samples will be off (the default sampler follows the "
                     "codes; use it)")
    return {"mean_norm": norm, "kl_gaussian_to_prior": kl, "kl_per_dim": per_dim, **v}


def category_balance(
    prior_samples: np.ndarray, codes: np.ndarray, categories: Sequence[str | None]
) -> dict[str, Any]:
    """Each category's share of prior samples (by nearest training code) against the library.

    The total-variation distance is ½ Σ_c |p_c - q_c| with p the prior-sample
    shares and q the library shares: 0 when sampling is as varied as the
    library, 1 when it never reaches the categories the library has.
    Uncategorised clips count as the category ``"(none)"``.

    Returns
    -------
    dict with ``shares`` (list of {category, prior_share, library_share}),
    ``total_variation``, ``rating`` and ``verdict``.
    """
    codes = check_codes(codes, "codes")
    labels = [NO_CATEGORY if c is None else str(c) for c in categories]
    if len(labels) != len(codes):
        raise ParameterError(f"categories has {len(labels)} entries for {len(codes)} codes")
    names = sorted(set(labels))
    pos = {c: i for i, c in enumerate(names)}
    lab = np.array([pos[c] for c in labels], dtype=np.int64)
    idx, _ = nearest_codes(prior_samples, codes)
    if len(idx) == 0:
        raise ParameterError("prior_samples is empty")
    p = np.bincount(lab[idx], minlength=len(names)) / len(idx)
    q = np.bincount(lab, minlength=len(names)) / len(lab)
    tv = 0.5 * float(np.abs(p - q).sum())
    shares = [{"category": c, "prior_share": float(p[i]), "library_share": float(q[i])}
              for i, c in enumerate(names)]
    if len(names) == 1:
        v = _verdict("good", "the library has a single category, nothing to balance")
    else:
        hi, lo = int(np.argmax(p - q)), int(np.argmin(p - q))
        detail = (f"{names[hi]} gets {p[hi]:.0%} of random samples against {q[hi]:.0%} of the "
                  f"library, {names[lo]} {p[lo]:.0%} against {q[lo]:.0%}")
        if tv <= 0.1:
            v = _verdict("good", "each category gets about its share of random samples")
        elif tv <= 0.25:
            v = _verdict("fair", f"{detail}; use --near for the rarer ones")
        else:
            v = _verdict("poor", f"{detail}; balance the library, train longer, or use --near")
    return {"shares": shares, "total_variation": tv, **v}


HOLE_NEIGHBOUR = 5  # which nearest training code measures a sample's distance to the library


def holes(prior_samples: np.ndarray, codes: np.ndarray, percentile: float = 95) -> dict[str, Any]:
    """Share of samples that fall in empty regions between the training codes.

    A sample is in a hole when its ``HOLE_NEIGHBOUR``-th nearest training code is
    farther than the ``percentile``-th percentile of the training codes' own
    distances to their ``HOLE_NEIGHBOUR``-th nearest other code (fewer neighbours
    for a library of fewer codes). When the samples follow the codes' own
    distribution this is about 1 - percentile/100 (5% by default). The fifth
    neighbour, not the first, so that near-duplicate clips (velocity layers, small
    variations of one sound) do not make every new sound look like a hole.

    Returns
    -------
    dict with ``share``, ``expected_share``, ``threshold``, ``percentile``,
    ``neighbour``, ``rating`` and ``verdict``.
    """
    from scipy.spatial import cKDTree

    codes = check_codes(codes, "codes", min_rows=2)
    if not 0 < percentile < 100:
        raise ParameterError(f"percentile={percentile!r} must be between 0 and 100")
    samples = check_codes(prior_samples, "samples")
    k = min(HOLE_NEIGHBOUR, len(codes) - 1)
    tree = cKDTree(codes)
    own = tree.query(codes, k=k + 1)[0].reshape(len(codes), -1)[:, k]
    threshold = float(np.percentile(own, percentile))
    dist = tree.query(samples, k=k)[0].reshape(len(samples), -1)[:, k - 1]
    share, expected = float(np.mean(dist > threshold)), round(1.0 - percentile / 100.0, 12)
    if share <= 2 * expected:
        v = _verdict("good", f"{share:.0%} of random samples land away from the training "
                     f"sounds (about {expected:.0%} is normal)")
    elif share <= 5 * expected:
        v = _verdict("fair", f"{share:.0%} of random samples land in gaps between training "
                     "sounds; a lower --temperature helps")
    else:
        v = _verdict("poor", f"{share:.0%} of random samples land in gaps between training "
                     "sounds and may decode to mush; try more epochs or a lower --temperature")
    return {"share": share, "expected_share": expected, "threshold": threshold,
            "percentile": float(percentile), "neighbour": k, **v}


def health_report(
    mu: np.ndarray,
    logvar: np.ndarray | None,
    categories: Sequence[str | None],
    *,
    n_samples: int = 2000,
    rng: RngLike = 0,
    samples: np.ndarray | None = None,
    sampler: str = "the prior N(0, I)",
) -> dict[str, Any]:
    """Every latent health metric in one JSON-able dict.

    Keys: ``active_units``, ``prior_match``, ``category_balance``, ``holes`` and
    ``sampler`` (what the last two drew from). Those two are measured on ``samples``,
    the codes ``generate`` would draw, or else on ``n_samples`` draws from the prior
    (seeded by ``rng``).
    """
    mu = check_codes(mu, "mu", min_rows=2)
    if samples is None:
        samples = sample_prior(check_count(n_samples, "n_samples", low=1), mu.shape[1], rng=rng)
    z = check_codes(samples, "samples")
    return {
        "active_units": active_units(mu),
        "prior_match": prior_match(mu, logvar),
        "category_balance": category_balance(z, mu, categories),
        "holes": holes(z, mu),
        "sampler": f"{len(z)} samples from {sampler}",
    }
