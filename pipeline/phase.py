"""Phase reconstruction: fast Griffin-Lim, batched over many spectrograms on the CPU.

Magnitudes are on the :func:`pipeline.spectra.stft` scale (centred frames, zero
padding, periodic Hann, ``2 / sum(window)`` scaling). The STFT pair used inside
the loop is the same transform as ``spectra.stft`` / ``spectra.istft``, laid out
for speed (measured on a 2-core CPU, see tests/benchmarks/bench_phase.py):

* frames are kept frame-major, ``(clips, frames, bins)``, so every FFT runs along
  contiguous memory. ``scipy.fft`` ran the batched transforms twice as fast as
  ``numpy.fft``; ``torch.fft`` in the same loop gained at most 13 % at n_fft 2048
  and costs a second of import, so torch is not used;
* the batch is split into chunks of a few clips (about 1 MB of spectrogram each).
  A chunk's buffers are allocated once and updated in place (``out=``); the
  FFT outputs, which scipy.fft allocates, stay chunk-sized, so glibc reuses its
  free memory for them. Whole-batch temporaries of tens of MB would be handed
  back to the kernel and page-faulted in again on every iteration;
* chunks run on a small thread pool (numpy and scipy.fft release the GIL), which
  also spreads the element-wise work over the cores, not only the FFTs;
* the element-wise work between the transforms is two compiled (numba) passes:
  the overlap-add with the synthesis window and the LSEE gain, and the magnitude
  projection with the momentum step. Each reads and writes every value once where
  numpy needed five to seven array passes. The overlap-add sums in the order the
  numpy version used (the same bits); the magnitude is ``sqrt(re^2 + im^2)`` in
  float32, within an ulp or two of numpy's ``abs``.
"""

from __future__ import annotations

import os
import warnings
from collections.abc import Sequence
from concurrent.futures import ThreadPoolExecutor

import numba
import numpy as np
import scipy.fft

from pipeline import spectra
from pipeline.errors import ParameterError
from pipeline.pghi import pghi_phase

__all__ = ["griffin_lim", "griffin_lim_trace", "random_phase", "reconstruct"]

INITS = ("pghi", "random", "zeros")
_CHUNK_BYTES = 1 << 20  # target size of one chunk's complex spectrogram buffer
_EPS = np.float32(1e-30)  # added to |c| before dividing; S / 1e-30 stays finite in float32


def random_phase(
    n_bins: int, n_frames: int, *, seed: int | Sequence[int], start: int = 0, count: int = 1
) -> np.ndarray:
    """Seeded initial phases, ``(count, n_bins, n_frames)`` angles in radians (float64).

    With an integer seed this equals ``2 * pi * np.random.default_rng(seed).random((B,
    n_bins, n_frames))[start:start + count]``, the draw ``librosa.griffinlim`` makes
    with ``random_state=np.random.default_rng(seed)``, for any split of the batch.
    With a sequence of seeds, clip ``i`` uses ``default_rng(seed[i])`` alone, so its
    phase does not depend on which batch it is in.
    """
    size = n_bins * n_frames
    if isinstance(seed, (int, np.integer)):
        bitgen = np.random.PCG64(int(seed))  # what default_rng(seed) wraps
        bitgen.advance(start * size)  # one 64-bit draw per double
        u = np.random.Generator(bitgen).random((count, n_bins, n_frames))
    else:
        seeds = seed[start : start + count]
        u = np.stack([np.random.default_rng(int(s)).random((n_bins, n_frames)) for s in seeds])
    return 2.0 * np.pi * u


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _overlap_add(frames, w, gain, y, hop):  # pragma: no cover - compiled
    """``y[c] = gain * sum_t w * frames[c, t]`` placed at ``t * hop`` (the ISTFT's sum);
    ``frames`` is windowed in place.

    Output block ``j`` adds frame ``j`` (its first hop), then ``j - 1`` (its second)...,
    as the strided numpy additions did, so float32 rounding is the same. Windowing in
    a pass of its own lets both loops vectorise (3x faster than one fused loop).
    """
    b, T, n_fft = frames.shape
    R = n_fft // hop
    acc = np.empty(hop, np.float32)
    for c in range(b):
        for t in range(T):
            fr = frames[c, t]
            for n in range(n_fft):
                fr[n] *= w[n]
        for j in range(T - 1 + R):
            acc[:] = 0.0
            for r in range(R):
                t = j - r
                if 0 <= t < T:
                    fr = frames[c, t, r * hop : (r + 1) * hop]
                    for n in range(hop):
                        acc[n] += fr[n]
            o = j * hop
            for n in range(hop):
                y[c, o + n] = acc[n] * gain[o + n]


@numba.njit(cache=True, nogil=True, error_model="numpy")
def _project(C, S, prev, beta, eps, F, track):  # pragma: no cover - compiled
    """In place: ``t = S exp(i angle C)``; with momentum (``prev`` not empty)
    ``C = t - beta prev`` and ``prev = t``, else ``C = t``; ``F = |C|`` first if ``track``.

    Complex values are read as float32 pairs, and ``error_model="numpy"`` drops
    Python's zero-division check: both are needed for the loop to vectorise (4x).
    """
    c = C.view(np.float32).reshape(-1)
    p = prev.view(np.float32).reshape(-1)
    s, f = S.reshape(-1), F.reshape(-1)
    fast = p.size > 0
    for i in range(s.size):
        re, im = c[2 * i], c[2 * i + 1]
        a = np.sqrt(re * re + im * im)
        if track:
            f[i] = a
        g = s[i] / (a + eps)
        tr, ti = re * g, im * g
        if fast:
            c[2 * i] = tr - beta * p[2 * i]
            c[2 * i + 1] = ti - beta * p[2 * i + 1]
            p[2 * i], p[2 * i + 1] = tr, ti
        else:
            c[2 * i], c[2 * i + 1] = tr, ti


class _Plan:
    """Windows and overlap-add gains for one (n_fft, hop_length, length)."""

    def __init__(self, n_fft: int, hop_length: int, length: int, n_frames: int) -> None:
        self.n_fft, self.hop, self.length, self.n_frames = n_fft, hop_length, length, n_frames
        self.overlap = n_fft // hop_length
        self.n_bins = n_fft // 2 + 1
        # padded signal: frame t covers [t * hop, t * hop + n_fft)
        self.padded = hop_length * (n_frames - 1 + self.overlap)
        w = spectra.hann_window(n_fft)
        scale = spectra.stft_scale(n_fft)
        self.w_analysis = (w * scale).astype(np.float32)
        self.w_synthesis = (w / scale).astype(np.float32)
        wss = np.zeros(self.padded)
        for r in range(self.overlap):  # window sum-square, same strided layout as the overlap-add
            seg = wss.reshape(-1, hop_length)[r : r + n_frames]
            seg += (w * w).reshape(self.overlap, hop_length)[r]
        # LSEE inverse (Griffin & Lim 1984, eq. 6) divides by the window sum-square; samples
        # outside the clip are zero, as spectra.stft's centre padding expects.
        start = n_fft // 2
        inner = wss[start : start + length]
        tiny = np.finfo(np.float32).tiny
        gain = np.zeros(self.padded)
        gain[start : start + length] = np.where(inner > tiny, 1.0 / np.maximum(inner, tiny), 1.0)
        self.gain = gain.astype(np.float32)


class _Chunk:
    """Work buffers for ``b`` clips, allocated once and reused every iteration."""

    def __init__(self, plan: _Plan, S_t: np.ndarray) -> None:
        b = S_t.shape[0]
        self.plan, self.S = plan, S_t
        self.F = np.empty(S_t.shape, np.float32)
        self.y = np.zeros((b, plan.padded), np.float32)
        stride = self.y.strides[-1]
        self.view = np.lib.stride_tricks.as_strided(
            self.y, (b, plan.n_frames, plan.n_fft), (self.y.strides[0], plan.hop * stride, stride),
            writeable=False,
        )

    def istft(self, C: np.ndarray) -> np.ndarray:
        """``spectra.istft`` into ``self.y`` (padded); returns the frame buffer it used."""
        p = self.plan
        frames = scipy.fft.irfft(C, n=p.n_fft, axis=-1, overwrite_x=True, workers=1)
        _overlap_add(frames, p.w_synthesis, p.gain, self.y, p.hop)
        return frames

    def stft(self, frames: np.ndarray) -> np.ndarray:
        """``spectra.stft`` of ``self.y``, frame-major ``(b, frames, bins)``."""
        np.multiply(self.view, self.plan.w_analysis, out=frames)
        return scipy.fft.rfft(frames, axis=-1, overwrite_x=True, workers=1)

    def sc(self, F: np.ndarray, tmp: np.ndarray, scale: float = 1.0) -> np.ndarray:
        np.multiply(F, np.float32(scale), out=tmp)
        np.subtract(tmp, self.S, out=tmp)
        np.square(tmp, out=tmp)
        num = tmp.sum(axis=(1, 2), dtype=np.float64)
        den = np.square(self.S, dtype=np.float64).sum(axis=(1, 2))
        return np.sqrt(num / np.maximum(den, np.finfo(np.float64).tiny))

    def run(self, C: np.ndarray, n_iter: int, momentum: float, track: bool):
        """Fast Griffin-Lim on this chunk; returns (clip samples, SC trace or None)."""
        p, S, F = self.plan, self.S, self.F
        trace = np.empty((S.shape[0], n_iter + 1)) if track else None
        tmp = np.empty_like(F) if track else None
        # Perraudin et al. 2013: c = t_n + a (t_n - t_{n-1}). The next projection uses only
        # the phase of c, so c / (1 + a) = t_n - a / (1 + a) t_{n-1} serves.
        beta = np.float32(momentum / (1.0 + momentum))
        fast = momentum > 0
        # t_0: the initial estimate (as ltfat gla.m)
        prev = C.copy() if fast else np.empty(0, np.complex64)
        for i in range(n_iter):
            C = self.stft(self.istft(C))  # c = STFT(ISTFT(c))
            # |c| + eps: a no-op for |c| above 1e-23; then t_n = S exp(i angle(c)) and the step
            _project(C, S, prev, beta, _EPS, F, track)
            if track:  # iterates after the first are stored divided by (1 + a)
                trace[:, i] = self.sc(F, tmp, 1.0 + momentum if i and fast else 1.0)
        if fast:
            C = prev  # output the last magnitude-true estimate t_n, not the extrapolation
        self.istft(C)
        y = self.y[:, p.n_fft // 2 : p.n_fft // 2 + p.length].copy()
        if track:
            np.abs(self.stft(np.empty((S.shape[0], p.n_frames, p.n_fft), np.float32)), out=F)
            trace[:, n_iter] = self.sc(F, tmp)
        return y, trace


def _check(S, n_fft, hop_length, length, n_iter, momentum, init, seed):
    S = np.asarray(S)
    single = S.ndim == 2
    if single:
        S = S[None]
    if S.ndim != 3:
        raise ParameterError(f"S must be shaped (bins, frames) or (B, bins, frames), not {S.shape}")
    if not np.issubdtype(S.dtype, np.floating):
        raise ParameterError(f"S must be real magnitudes, got dtype {S.dtype}")
    if n_fft < 2 or n_fft % 2 or hop_length < 1 or n_fft % hop_length:
        raise ParameterError(f"hop_length={hop_length} must divide the even n_fft={n_fft}")
    if S.shape[1] != n_fft // 2 + 1:
        raise ParameterError(f"S has {S.shape[1]} bins; n_fft={n_fft} needs {n_fft // 2 + 1}")
    if length < 1 or S.shape[2] != 1 + length // hop_length:
        raise ParameterError(
            f"S has {S.shape[2]} frames; length={length} with hop_length={hop_length} "
            f"gives {1 + max(length, 0) // hop_length} centred frames"
        )
    if n_iter < 0:
        raise ParameterError(f"n_iter={n_iter} must be a non-negative integer")
    if momentum < 0:
        raise ParameterError(f"griffin_lim momentum={momentum} must not be negative")
    if momentum > 1:
        warnings.warn(
            f"Griffin-Lim with momentum={momentum} > 1 may not converge", UserWarning, stacklevel=3
        )
    if init not in INITS:
        raise ParameterError(f"init={init!r} must be one of {', '.join(INITS)}")
    if not isinstance(seed, (int, np.integer)) and len(seed) != S.shape[0]:
        raise ParameterError(f"{len(seed)} seeds given for {S.shape[0]} spectrograms")
    S = S.astype(np.float32, copy=False)
    if S.size and not (np.isfinite(S).all() and S.min() >= 0):
        raise ParameterError("S must hold finite, non-negative magnitudes")
    return S, single


def _run(S, *, n_fft, hop_length, length, n_iter, momentum, init, seed, jobs, track):
    S, single = _check(S, n_fft, hop_length, length, n_iter, momentum, init, seed)
    B, n_bins, n_frames = S.shape
    plan = _Plan(n_fft, hop_length, length, n_frames)
    jobs = max(1, int(jobs or os.cpu_count() or 1))
    per_clip = n_bins * n_frames * 8
    b = max(1, min(_CHUNK_BYTES // per_clip, -(-B // jobs)))
    y = np.empty((B, length), np.float32)
    trace = np.empty((B, n_iter + 1)) if track else None

    def work(s: int) -> None:
        e = min(s + b, B)
        S_t = np.ascontiguousarray(S[s:e].transpose(0, 2, 1))  # (b, frames, bins)
        if init in ("random", "pghi"):
            if init == "random":
                angles = random_phase(n_bins, n_frames, seed=seed, start=s, count=e - s)
            else:
                clip_seeds = (seed[s:e] if not isinstance(seed, (int, np.integer))
                              else [int(seed) + i for i in range(s, e)])
                angles = pghi_phase(S[s:e], n_fft=n_fft, hop_length=hop_length, seed=clip_seeds)
            angles = angles.transpose(0, 2, 1).astype(np.float32)
            C = np.empty(S_t.shape, np.complex64)
            np.cos(angles, out=C.real)  # float32 cos/sin: a complex128 exp cost 10 % of the run
            np.sin(angles, out=C.imag)
            C *= S_t
        else:
            C = S_t.astype(np.complex64)
        y[s:e], tr = _Chunk(plan, S_t).run(C, n_iter, float(momentum), track)
        if track:
            trace[s:e] = tr

    starts = range(0, B, b)
    if jobs == 1 or len(starts) == 1:
        for s in starts:
            work(s)
    else:
        with ThreadPoolExecutor(min(jobs, len(starts))) as pool:
            for f in [pool.submit(work, s) for s in starts]:
                f.result()
    if single:
        return y[0], (None if trace is None else trace[0])
    return y, trace


def griffin_lim(
    S: np.ndarray,
    *,
    n_fft: int,
    hop_length: int,
    length: int,
    n_iter: int = 32,
    momentum: float = 0.99,
    init: str = "pghi",
    seed: int | Sequence[int] = 0,
    jobs: int | None = None,
) -> np.ndarray:
    """Waveforms whose STFT magnitudes approximate ``S``, by fast Griffin-Lim.

    Each iteration projects onto consistent spectrograms, ``c = STFT(ISTFT(c))``
    (the least-squares ISTFT of Griffin & Lim 1984, eq. 6), restores the target
    magnitude, ``t_n = S exp(i angle(c))``, and extrapolates,
    ``c = t_n + momentum * (t_n - t_{n-1})`` (Perraudin, Balazs & Sondergaard 2013).
    ``momentum=0`` is plain Griffin-Lim. The output is ``ISTFT(t_N)``.

    Parameters
    ----------
    S : np.ndarray [shape=(B, 1 + n_fft // 2, frames) or (1 + n_fft // 2, frames)]
        Magnitudes (>= 0) on the ``spectra.stft`` scale; ``frames = 1 + length // hop_length``.
    n_fft, hop_length : int
        STFT size and hop; ``hop_length`` must divide ``n_fft``.
    length : int
        Samples per output clip.
    n_iter : int >= 0
        Iterations.
    momentum : float >= 0
        Fast Griffin-Lim extrapolation; above 1 warns (may not converge).
    init : {"pghi", "random", "zeros"}
        Initial phase: phase gradient heuristic integration (:mod:`pipeline.pghi`,
        Průša et al. 2017), seeded uniform random, or zero.
    seed : int or sequence of int
        One seed for the batch (see :func:`random_phase`; with "pghi", clip ``i`` uses
        ``seed + i`` for its quietest coefficients) or one per spectrogram.
    jobs : int, optional
        Worker threads; default all cores.

    Returns
    -------
    y : np.ndarray [shape=(B, length) or (length,)], float32

    Examples
    --------
    >>> S = spectra.magnitude(y, n_fft=1024, hop_length=256).astype(np.float32)
    >>> y_hat = griffin_lim(S, n_fft=1024, hop_length=256, length=len(y))
    """
    y, _ = _run(S, n_fft=n_fft, hop_length=hop_length, length=length, n_iter=n_iter,
                momentum=momentum, init=init, seed=seed, jobs=jobs, track=False)
    return y


def griffin_lim_trace(
    S: np.ndarray,
    *,
    n_fft: int,
    hop_length: int,
    length: int,
    n_iter: int = 32,
    momentum: float = 0.99,
    init: str = "pghi",
    seed: int | Sequence[int] = 0,
    jobs: int | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """:func:`griffin_lim` that also returns the spectral convergence of every iterate.

    Returns
    -------
    y : np.ndarray, as :func:`griffin_lim`
    sc : np.ndarray [shape=(B, n_iter + 1) or (n_iter + 1,)], float64
        ``sc[..., i]`` is ``||STFT(ISTFT(c_i))| - S||_F / ||S||_F`` (Arik et al. 2018)
        for the estimate entering iteration ``i``; ``sc[..., n_iter]`` is that of ``y``.
    """
    return _run(S, n_fft=n_fft, hop_length=hop_length, length=length, n_iter=n_iter,
                momentum=momentum, init=init, seed=seed, jobs=jobs, track=True)


def reconstruct(
    S: np.ndarray, audio, *, n_iter: int, momentum: float = 0.99, init: str = "pghi",
    seed: int | Sequence[int] = 0, jobs: int | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Clips from magnitudes made by :func:`pipeline.spectra.clip_to_unit`, pad removed.

    Parameters
    ----------
    S : np.ndarray [shape=(B, audio.n_bins, audio.n_frames)]
        Magnitudes of clips analysed after ``audio.analysis_pad`` samples of silence.
    audio : AudioSpec
    n_iter, momentum, init, seed, jobs : as :func:`griffin_lim`.

    Returns
    -------
    y : np.ndarray [shape=(B, audio.n_samples)], float32; the attack at its first samples
    sc_db : np.ndarray [shape=(B,)]
        Spectral convergence (dB) of the kept clip (analysed with its pad again) against ``S``.
    """
    pad = audio.analysis_pad
    y, trace = _run(S, n_fft=audio.n_fft, hop_length=audio.hop_length,
                    length=audio.n_samples + pad, n_iter=n_iter, momentum=momentum, init=init,
                    seed=seed, jobs=jobs, track=False)
    y = np.ascontiguousarray(np.atleast_2d(y)[:, pad:])
    # measured on the clip as it is kept: anything reconstructed inside the pad is dropped
    A = spectra.magnitude(spectra.pad_for_analysis(y.astype(np.float64), audio),
                          n_fft=audio.n_fft, hop_length=audio.hop_length)
    sc_db = spectra.spectral_convergence_db(np.atleast_3d(S).reshape(A.shape), A)
    return y, sc_db
