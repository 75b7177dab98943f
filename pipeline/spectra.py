"""STFT log-magnitude spectra on a fixed absolute dB scale, and the [0, 1] mapping.

The STFT is centred (frame t is centred on sample t * hop, zero padding at the
edges, as ``librosa.stft(center=True, pad_mode="constant")``) with a periodic
Hann window. Magnitudes are scaled by ``2 / sum(window)`` so that a full-scale
sine centred on a bin reads 1.0 (0 dB): the dB scale means the same for every
clip and every model, with no per-clip statistics. Pure functions only.
"""

from __future__ import annotations

from functools import lru_cache
from typing import TYPE_CHECKING

import numpy as np
import scipy.fft

if TYPE_CHECKING:
    from pipeline.config import AudioSpec


@lru_cache(maxsize=16)
def hann_window(n_fft: int, dtype: str = "float64") -> np.ndarray:
    """Periodic (DFT-even) Hann window, the one scipy's COLA check accepts at hop n_fft/4."""
    # closed form of scipy.signal.get_window("hann", n_fft, fftbins=True), without importing
    # scipy.signal (half a second of start-up)
    w = (0.5 - 0.5 * np.cos(2.0 * np.pi * np.arange(n_fft) / n_fft)).astype(dtype)
    w.setflags(write=False)
    return w


def stft_scale(n_fft: int) -> float:
    """Factor that makes a full-scale bin-centred sine read magnitude 1.0."""
    return 2.0 / float(hann_window(n_fft).sum())


def frame_signal(y: np.ndarray, *, n_fft: int, hop_length: int) -> np.ndarray:
    """Centred frames of ``y`` (shape ``(..., n)``) as a read-only view ``(..., frames, n_fft)``."""
    pad = [(0, 0)] * (y.ndim - 1) + [(n_fft // 2, n_fft // 2)]
    padded = np.pad(y, pad, mode="constant")
    frames = np.lib.stride_tricks.sliding_window_view(padded, n_fft, axis=-1)
    return frames[..., ::hop_length, :]


def stft(y: np.ndarray, *, n_fft: int, hop_length: int) -> np.ndarray:
    """Scaled complex STFT.

    Parameters
    ----------
    y : np.ndarray [shape=(..., n)], real
    n_fft, hop_length : int

    Returns
    -------
    X : np.ndarray [shape=(..., 1 + n_fft // 2, 1 + n // hop_length)], complex
    """
    y = np.asarray(y)
    w = hann_window(n_fft, "float32" if y.dtype == np.float32 else "float64")
    frames = frame_signal(y, n_fft=n_fft, hop_length=hop_length) * w
    X = scipy.fft.rfft(frames, axis=-1) * stft_scale(n_fft)
    return np.swapaxes(X, -1, -2)


def istft(X: np.ndarray, *, n_fft: int, hop_length: int, length: int) -> np.ndarray:
    """Least-squares inverse of :func:`stft` (Griffin & Lim 1984, eq. 6).

    Overlap-adds the windowed inverse frames and divides by the window sum-square.
    """
    w = hann_window(n_fft, "float32" if X.dtype == np.complex64 else "float64")
    frames = scipy.fft.irfft(np.swapaxes(X, -1, -2), n=n_fft, axis=-1) * (w / stft_scale(n_fft))
    n_frames = frames.shape[-2]
    total = n_fft + hop_length * (n_frames - 1)
    out = np.zeros(frames.shape[:-2] + (total,), dtype=frames.dtype)
    wss = np.zeros(total, dtype=frames.dtype)
    for t in range(n_frames):
        s = t * hop_length
        out[..., s : s + n_fft] += frames[..., t, :]
        wss[s : s + n_fft] += w * w
    start = n_fft // 2
    out = out[..., start : start + length]
    wss = wss[start : start + length]
    tiny = np.finfo(out.dtype).tiny
    out = np.where(wss > tiny, out / np.maximum(wss, tiny), out)
    if out.shape[-1] < length:  # a signal shorter than the centred frames cover
        pad = [(0, 0)] * (out.ndim - 1) + [(0, length - out.shape[-1])]
        out = np.pad(out, pad)
    return out


def magnitude(y: np.ndarray, *, n_fft: int, hop_length: int) -> np.ndarray:
    """Scaled STFT magnitude ``|stft(y)|``."""
    return np.abs(stft(y, n_fft=n_fft, hop_length=hop_length))


def amplitude_to_db(S: np.ndarray, *, db_floor: float, db_ceiling: float) -> np.ndarray:
    """``20 log10(max(S, amin))`` with amin = 10^(floor/20), clipped to [floor, ceiling]."""
    amin = 10.0 ** (db_floor / 20.0)
    return np.clip(20.0 * np.log10(np.maximum(S, amin)), db_floor, db_ceiling)


def db_to_amplitude(D: np.ndarray) -> np.ndarray:
    return np.power(10.0, np.asarray(D) / 20.0)


def db_to_unit(D: np.ndarray, *, db_floor: float, db_ceiling: float) -> np.ndarray:
    """Linear map of [floor, ceiling] dB to [0, 1]."""
    return (np.asarray(D) - db_floor) / (db_ceiling - db_floor)


def unit_to_db(U: np.ndarray, *, db_floor: float, db_ceiling: float) -> np.ndarray:
    return db_floor + np.clip(np.asarray(U), 0.0, 1.0) * (db_ceiling - db_floor)


def magnitude_to_unit(S: np.ndarray, spec: AudioSpec) -> np.ndarray:
    """Magnitudes to the bank's [0, 1] scale, float32."""
    D = amplitude_to_db(S, db_floor=spec.db_floor, db_ceiling=spec.db_ceiling)
    return db_to_unit(D, db_floor=spec.db_floor, db_ceiling=spec.db_ceiling).astype(np.float32)


def unit_to_magnitude(U: np.ndarray, spec: AudioSpec) -> np.ndarray:
    """The bank's [0, 1] scale back to magnitudes, float32. Values at 0 map to silence."""
    U = np.asarray(U, dtype=np.float32)
    S = db_to_amplitude(unit_to_db(U, db_floor=spec.db_floor, db_ceiling=spec.db_ceiling))
    return np.where(U <= 0.0, 0.0, S).astype(np.float32)


def gate_quiet_bins(U: np.ndarray, spec: AudioSpec, gate_db: float) -> np.ndarray:
    """``U`` ([0, 1] scale) with every bin quieter than ``gate_db`` set to 0 (silence).

    A decoder is a regression with a sigmoid output: where its training clips were silent
    (0, the ``spec.db_floor``) it predicts values just above the floor instead. One such
    bin is inaudible, but hundreds of them in every frame sum to a bed of noise near 60 dB
    below the peak that never ends, where real one-shots fall to digital silence. The
    presets gate 1 dB above the -100 dB floor (DEVELOPERS.md, "Session-ready audio", has
    the sweep).
    """
    if gate_db <= spec.db_floor:
        return U
    level = float(db_to_unit(gate_db, db_floor=spec.db_floor, db_ceiling=spec.db_ceiling))
    return np.where(U < level, np.float32(0.0), U).astype(np.float32, copy=False)


def pad_for_analysis(y: np.ndarray, spec: AudioSpec) -> np.ndarray:
    """``spec.analysis_pad`` zeros before a clip (or a batch ``(..., n)``)."""
    y = np.asarray(y)
    return np.pad(y, [(0, 0)] * (y.ndim - 1) + [(spec.analysis_pad, 0)])


def clip_to_unit(y: np.ndarray, spec: AudioSpec) -> np.ndarray:
    """A fitted clip (or a batch ``(..., n_samples)``) to its [0, 1] log-magnitude spectrogram.

    The clip is analysed after ``spec.analysis_pad`` samples of silence (see
    :attr:`~pipeline.config.AudioSpec.analysis_pad`), so the spectrogram has
    ``spec.n_frames`` frames; :func:`pipeline.phase.reconstruct` removes the pad again.
    """
    y = pad_for_analysis(np.asarray(y, dtype=np.float64), spec)
    S = magnitude(y, n_fft=spec.n_fft, hop_length=spec.hop_length)
    return magnitude_to_unit(S, spec)


def spectral_convergence(S_ref: np.ndarray, S_est: np.ndarray, axis=(-2, -1)) -> np.ndarray:
    """Linear spectral convergence ``||S - S^||_F / ||S||_F`` (Arik et al. 2018)."""
    num = np.sqrt(np.sum((np.asarray(S_ref) - S_est) ** 2, axis=axis))
    den = np.sqrt(np.sum(np.asarray(S_ref) ** 2, axis=axis))
    return num / np.maximum(den, np.finfo(np.float64).tiny)


def spectral_convergence_db(S_ref: np.ndarray, S_est: np.ndarray, axis=(-2, -1)) -> np.ndarray:
    """Spectral convergence in dB, ``20 log10(SC)``, as ltfat's ``magnitudeerrdb``."""
    return 20.0 * np.log10(np.maximum(spectral_convergence(S_ref, S_est, axis), 1e-12))


def log_spectral_distance(
    P: np.ndarray, P_hat: np.ndarray, *, eps: float = 1e-10
) -> np.ndarray:
    """Log-spectral distance in dB between power spectrograms ``(..., bins, frames)``.

    Per frame ``sqrt(mean_k (10 log10(P_k / P^_k))^2)``, averaged over frames.
    """
    d = 10.0 * np.log10((np.asarray(P) + eps) / (np.asarray(P_hat) + eps))
    return np.mean(np.sqrt(np.mean(d**2, axis=-2)), axis=-1)
