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
# coefficients this far below the clip's peak are not integrated through: on the real drums and
# strums of tests/benchmarks/bench_phase.py, -60 dB gave the same median SC after 32 fast
# Griffin-Lim iterations as -100 dB (-30.79 and -25.35 dB) at a third of the integration time
TOL_DB = -60.0


_SORTED_AFTER = 8  # components found by a scan for their largest coefficient before sorting


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _integrate(logs, dx, dw, hop, inv_n, floor, rnd, phase):  # pragma: no cover - compiled
    """Heap integration over one ``(bins, frames)`` grid (Průša et al. 2017, Alg. 1).

    ``dx``: phase derivative along time (rad/sample); ``dw``: along frequency
    (rad per cycle/sample). Coefficients with ``logs > floor`` are integrated, each
    connected region from its largest coefficient (the first on ties); the others keep
    ``rnd``. Writes ``phase`` in place. The next region's start is found by a scan
    while there are few regions (the usual case: one), then from a stable sort.
    """
    K, T = logs.shape
    lf, dxf, dwf = logs.reshape(-1), dx.reshape(-1), dw.reshape(-1)
    ph = phase.reshape(-1)
    ph[:] = rnd.reshape(-1)
    todo = lf > floor
    left = 0
    for i in range(lf.size):
        left += todo[i]
    heap_v = np.empty(left, np.float64)
    heap_i = np.empty(left, np.int64)
    order = np.empty(0, np.int64)
    pos, regions = 0, 0
    while left > 0:
        if regions < _SORTED_AFTER:  # the largest coefficient not yet done
            seed_idx, best = -1, -np.inf
            for i in range(lf.size):
                if todo[i] and lf[i] > best:
                    seed_idx, best = i, lf[i]
        else:
            if order.size == 0:
                rest = np.flatnonzero(todo)
                order = rest[np.argsort(-lf[rest], kind="mergesort")]
            while not todo[order[pos]]:
                pos += 1
            seed_idx = order[pos]
        regions += 1
        todo[seed_idx] = False
        left -= 1
        heap_v[0], heap_i[0] = lf[seed_idx], seed_idx
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
            k = idx // T
            t = idx - k * T
            for step in range(4):
                if step == 0:
                    if t + 1 >= T:
                        continue
                    i2 = idx + 1
                elif step == 1:
                    if t == 0:
                        continue
                    i2 = idx - 1
                elif step == 2:
                    if k + 1 >= K:
                        continue
                    i2 = idx + T
                else:
                    if k == 0:
                        continue
                    i2 = idx - T
                if not todo[i2]:
                    continue
                if step < 2:  # trapezoidal rule along time, +-1 hop
                    ph[i2] = ph[idx] + (i2 - idx) * hop * 0.5 * (dxf[idx] + dxf[i2])
                else:  # along frequency, +-1 bin = 1/n_fft cycles per sample
                    ph[i2] = ph[idx] + (1 if i2 > idx else -1) * inv_n * 0.5 * (dwf[idx] + dwf[i2])
                todo[i2] = False
                left -= 1
                j = n  # push and sift up
                n += 1
                v = lf[i2]
                while j > 0:
                    p = (j - 1) // 2
                    if heap_v[p] >= v:
                        break
                    heap_v[j], heap_i[j] = heap_v[p], heap_i[p]
                    j = p
                heap_v[j], heap_i[j] = v, i2


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
    S = np.ascontiguousarray(S, dtype=np.float64)  # the compiled integration reads it flat
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
        floor = logs.max() + tol_db * np.log(10.0) / 20.0
        phase = np.empty((K, T))
        _integrate(logs, dx, dw, float(hop_length), 1.0 / n_fft, floor, rnd, phase)
        out[b] = phase + np.pi * np.arange(K)[:, None]  # centre-referenced to frame-start
    return out
