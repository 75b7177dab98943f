"""An initial phase from the magnitude alone: Phase Gradient Heuristic Integration.

Průša, Balazs & Søndergaard 2017, "A Noniterative Method for Reconstruction of
Phase From STFT Magnitude", IEEE/ACM TASLP 25(5). For a Gaussian window
``g(n) = exp(-pi n^2 / lam)`` the STFT's phase and log-magnitude ``s`` are tied: with
the phase referenced to each window's centre (time in samples, frequency ``w`` in
cycles per sample),

    dphi/dx = (1 / lam) ds/dw + 2 pi w        (instantaneous frequency)
    dphi/dw = -lam ds/dx                      (local group delay)

(the paper's Sec. II; both follow from the Cauchy-Riemann equations of the
Bargmann transform). The log-magnitude derivatives are taken by central
differences, and the phase is integrated over the time-frequency grid with the
trapezoidal rule, always from the largest coefficient already done to its
undone neighbours (a max-heap, Algorithm 1 of the paper), so errors start where
the estimate is most reliable. Coefficients more than ``tol_db`` below the
clip's largest get a seeded random phase and are not integrated through.

The Hann window is treated as a Gaussian with ``lam = 0.25645 n_fft^2``, the
value the authors' toolbox (ltfat ``pghi.m``) uses for Hann [from memory;
tests/test_pghi.py checks the relations on signals with closed-form phase].

Our STFT (pipeline.spectra) references each frame's phase to the frame's first
sample, half a window before its centre: that multiplies bin ``k`` by
``(-1)^k``, so ``pi k`` is added at the end.
"""

from __future__ import annotations

from collections.abc import Sequence

import numba
import numpy as np

HANN_LAMBDA = 0.25645  # lam / n_fft^2 of the Gaussian that stands in for a Hann window
TOL_DB = -100.0  # coefficients this far below the clip's peak are not integrated through


@numba.njit(cache=True, nogil=True)
def _integrate(logs, dx, dw, hop, inv_n, order, rnd, phase):  # pragma: no cover - compiled
    """Heap integration over one ``(bins, frames)`` grid (Průša et al. 2017, Alg. 1).

    ``dx``: phase derivative along time (rad/sample); ``dw``: along frequency
    (rad per cycle/sample); ``order``: flat indices of the coefficients to integrate,
    largest first. The others keep ``rnd``. Writes ``phase`` in place.
    """
    K, T = logs.shape
    done = np.ones((K, T), np.bool_)
    phase[:] = rnd
    for idx in order:
        done[idx // T, idx % T] = False
    heap_v = np.empty(len(order), np.float64)
    heap_i = np.empty(len(order), np.int64)
    for seed_idx in order:
        sk, st = seed_idx // T, seed_idx % T
        if done[sk, st]:
            continue
        phase[sk, st] = rnd[sk, st]
        done[sk, st] = True
        n = 0
        heap_v[0], heap_i[0] = logs[sk, st], seed_idx
        n = 1
        while n > 0:
            idx = heap_i[0]  # pop the largest
            n -= 1
            v_last, i_last = heap_v[n], heap_i[n]
            j = 0
            while True:  # sift the last element down from the root
                c = 2 * j + 1
                if c >= n:
                    break
                if c + 1 < n and heap_v[c + 1] > heap_v[c]:
                    c += 1
                if heap_v[c] <= v_last:
                    break
                heap_v[j], heap_i[j] = heap_v[c], heap_i[c]
                j = c
            heap_v[j], heap_i[j] = v_last, i_last
            k, t = idx // T, idx % T
            for step in range(4):
                if step == 0:
                    k2, t2 = k, t + 1
                elif step == 1:
                    k2, t2 = k, t - 1
                elif step == 2:
                    k2, t2 = k + 1, t
                else:
                    k2, t2 = k - 1, t
                if k2 < 0 or k2 >= K or t2 < 0 or t2 >= T or done[k2, t2]:
                    continue
                if step < 2:  # trapezoidal rule along time, +-1 hop
                    phase[k2, t2] = phase[k, t] + (t2 - t) * hop * 0.5 * (dx[k, t] + dx[k2, t2])
                else:  # along frequency, +-1 bin = 1/n_fft cycles per sample
                    phase[k2, t2] = phase[k, t] + (k2 - k) * inv_n * 0.5 * (dw[k, t] + dw[k2, t2])
                done[k2, t2] = True
                j = n  # push and sift up
                n += 1
                v = logs[k2, t2]
                while j > 0:
                    p = (j - 1) // 2
                    if heap_v[p] >= v:
                        break
                    heap_v[j], heap_i[j] = heap_v[p], heap_i[p]
                    j = p
                heap_v[j], heap_i[j] = v, k2 * T + t2


def _central(x: np.ndarray, axis: int) -> np.ndarray:
    """Central difference over one step (one-sided at the edges)."""
    return np.gradient(x, axis=axis)


def pghi_phase(
    S: np.ndarray,
    *,
    n_fft: int,
    hop_length: int,
    seed: int | Sequence[int] = 0,
    tol_db: float = TOL_DB,
    lam: float | None = None,
) -> np.ndarray:
    """Phase estimates for magnitudes ``S`` on the :func:`pipeline.spectra.stft` layout.

    Parameters
    ----------
    S : np.ndarray [shape=(B, 1 + n_fft // 2, frames)], non-negative
    n_fft, hop_length : int
    seed : int or sequence of int
        Random phases for the coefficients below ``tol_db``: one seed per clip (a
        sequence) or one for the batch (clip ``i`` uses ``seed + i``).
    tol_db : float
        Coefficients below the clip's peak by more than this get a random phase.
    lam : float, optional
        Gaussian window parameter in samples^2; default ``HANN_LAMBDA * n_fft**2``.

    Returns
    -------
    angles : np.ndarray [shape=S.shape], float64 radians
    """
    S = np.asarray(S, dtype=np.float64)
    B, K, T = S.shape
    lam = HANN_LAMBDA * n_fft**2 if lam is None else float(lam)
    seeds = ([int(seed) + i for i in range(B)] if isinstance(seed, (int, np.integer))
             else [int(s) for s in seed])
    w = np.arange(K)[:, None] / n_fft  # cycles per sample
    out = np.empty_like(S)
    for b in range(B):
        logs = np.log(np.maximum(S[b], 1e-30))
        ds_dw = _central(logs, 0) * n_fft  # per cycle/sample: one bin is 1/n_fft
        ds_dx = _central(logs, 1) / hop_length
        dx = ds_dw / lam + 2.0 * np.pi * w
        dw = -lam * ds_dx
        rnd = 2.0 * np.pi * np.random.default_rng(seeds[b]).random((K, T))
        flat = logs.ravel()
        big = np.flatnonzero(flat > flat.max() + tol_db * np.log(10.0) / 20.0)
        order = big[np.argsort(-flat[big], kind="stable")]
        phase = np.empty((K, T))
        _integrate(logs, dx, dw, float(hop_length), 1.0 / n_fft, order, rnd, phase)
        out[b] = phase + np.pi * np.arange(K)[:, None]  # centre-referenced to frame-start
    return out
