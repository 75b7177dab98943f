"""Finishing a reconstructed clip for a session: measure, then transform, then quantise.

Measuring (pure, no side effects): :func:`true_peak` (ITU-R BS.1770-4 Annex 2),
:func:`integrated_loudness` (BS.1770 via pyloudnorm), :func:`sound_end` (where the
sound falls silent for good). Transforming: :func:`apply_fades` (DC, fade-in, a
fade to digital silence at the end), :func:`quantise` (the bit depth's grid, TPDF
dither for 16-bit only where there is sound). :func:`finish_audio` chains them:
the gain comes from the measurements, the peak ceiling is a true-peak ceiling, and
it is checked again on the quantised samples.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from pipeline.config import RenderSpec
from pipeline.dsp import raised_cosine
from pipeline.errors import AudioError

BS1770_BLOCK_S = 0.4  # gating block length, ITU-R BS.1770-4 Annex 1
END_DB = -60.0  # a sound has ended once its envelope stays this far below its peak
ENVELOPE_MS = 10.0  # frame of the RMS envelope that sound_end reads
# oversample to at least this rate: 4x at 44.1 and 48 kHz, as BS.1770-4 Annex 2 asks at 48 kHz
TRUE_PEAK_RATE = 176400
_HALF_TAPS = 24  # interpolation filter: 48 taps per phase, Kaiser-windowed sinc
_PCM_BITS = {"16": 16, "24": 24}


# --- measuring -----------------------------------------------------------------------------


def integrated_loudness(y: np.ndarray, sr: int) -> float | None:
    """BS.1770 integrated loudness in LUFS (pyloudnorm), or None for clips under one 400 ms block.

    ``-inf`` when every block is gated out (silence).
    """
    import pyloudnorm

    y = np.asarray(y, dtype=np.float64)
    if len(y) < BS1770_BLOCK_S * sr:
        return None
    return float(pyloudnorm.Meter(sr, block_size=BS1770_BLOCK_S).integrated_loudness(y))


def oversampling(sr: int) -> int:
    """The true-peak oversampling factor at ``sr``: 4 at 44.1 and 48 kHz, 2 at 96 kHz."""
    return max(2, math.ceil(TRUE_PEAK_RATE / sr))


def true_peak(y: np.ndarray, sr: int) -> float:
    """Largest absolute value of ``y`` oversampled to at least 176.4 kHz (linear, not dB).

    ITU-R BS.1770-4 Annex 2 estimates the true peak by oversampling (4x at 48 kHz)
    and taking the largest magnitude; here each intermediate phase is a 48-tap
    Kaiser-windowed sinc (beta 8), and the original samples count too, so the true
    peak is never below the sample peak.
    """
    y = np.asarray(y, dtype=np.float64).reshape(-1)
    if y.size == 0:
        return 0.0
    peak = float(np.max(np.abs(y)))
    k = oversampling(sr)
    i = np.arange(-_HALF_TAPS + 1, _HALF_TAPS + 1)
    window = np.kaiser(2 * _HALF_TAPS + 1, 8.0)
    padded = np.pad(y, (_HALF_TAPS, _HALF_TAPS))
    for j in range(1, k):
        d = j / k  # value at sample m + d from x[m + i], i = -23..24
        taps = np.sinc(d - i) * np.interp(d - i, np.arange(-_HALF_TAPS, _HALF_TAPS + 1), window)
        # correlate: out[m] = sum_i y[m + i] taps[i]
        vals = np.convolve(padded, taps[::-1], mode="valid")[: len(y)]
        peak = max(peak, float(np.max(np.abs(vals))))
    return peak


def sound_end(y: np.ndarray, sr: int, *, end_db: float = END_DB) -> int:
    """Samples until the sound ends: its RMS envelope (10 ms frames) stays more than
    ``-end_db`` dB below the envelope's peak from there to the end of the clip.

    Returns ``len(y)`` when the sound is still going at the end, 0 for silence. The
    threshold is relative to the sound's own peak, so it does not depend on level.
    """
    from scipy.signal import lfilter

    # a DC offset is not sound: measure after a one-pole DC blocker at 10 Hz
    r = 1.0 - 2.0 * np.pi * 10.0 / sr
    y = lfilter([1.0, -1.0], [1.0, -r], np.asarray(y, dtype=np.float64).reshape(-1))
    frame = max(1, int(round(ENVELOPE_MS * sr / 1000.0)))
    n_frames = -(-len(y) // frame)
    frames = np.pad(y, (0, n_frames * frame - len(y))).reshape(n_frames, frame)
    env = np.sqrt(np.mean(frames**2, axis=1))
    if not np.any(env > 0):
        return 0
    above = np.flatnonzero(env > env.max() * 10.0 ** (end_db / 20.0))
    return min(len(y), int(above[-1] + 1) * frame)


def _db(x: float) -> float | None:
    return round(20.0 * math.log10(x), 3) if x > 0 else None


# --- transforming ---------------------------------------------------------------------------


def apply_fades(y: np.ndarray, sr: int, *, fade_in_ms: float, fade_out_ms: float,
                end: int) -> np.ndarray:
    """DC removed, a fade-in, and a fade-out that reaches digital silence at ``end``.

    The DC is the mean of the sounding part ``y[:end]``; everything from ``end`` on is
    exactly zero.
    """
    y = np.array(y, dtype=np.float64).reshape(-1)
    end = max(0, min(end, len(y)))
    if end:
        y[:end] -= y[:end].mean()
    n_in = min(int(round(fade_in_ms * sr / 1000.0)), len(y) // 2)
    n_out = min(int(round(fade_out_ms * sr / 1000.0)), end // 2 if end < len(y) else len(y) // 2)
    y[:n_in] *= raised_cosine(n_in)
    y[end - n_out : end] *= raised_cosine(n_out, rising=False)
    y[end:] = 0.0
    return y


def quantise(y: np.ndarray, bit_depth: str, *, end: int,
             rng: np.random.Generator | None = None) -> np.ndarray:
    """``y`` on the bit depth's grid, float32: 24-bit rounded, 16-bit with TPDF dither
    (+-1 LSB, the sum of two uniform draws: common practice) up to ``end`` only, so
    digital silence stays digital silence; "32f" unchanged."""
    bits = _PCM_BITS.get(bit_depth)
    if bits is None:
        return y.astype(np.float32)
    scale = 2.0 ** (bits - 1)
    codes = y * scale
    if bits == 16:
        rng = rng if rng is not None else np.random.default_rng(0)
        n = max(0, min(end, len(y)))
        codes[:n] += rng.random(n) - rng.random(n)
    return (np.clip(np.rint(codes), -scale, scale - 1) / scale).astype(np.float32)


# --- the chain ------------------------------------------------------------------------------


def _gain(y: np.ndarray, sr: int, spec: RenderSpec, ceiling: float) -> tuple[float, str]:
    """The gain and how it was chosen: loudness target (BS.1770) or else the ceiling."""
    tp = true_peak(y, sr)
    if tp == 0:
        return 1.0, "none (silent)"
    gain, note = ceiling / tp, "peak"
    if spec.loudness is None:
        return gain, note
    measured = integrated_loudness(y, sr)
    if measured is None:
        return gain, f"peak (shorter than a {BS1770_BLOCK_S * 1000:.0f} ms BS.1770 block)"
    if not math.isfinite(measured):
        return gain, "peak (too quiet for BS.1770 gating)"
    gain = 10.0 ** ((spec.loudness - measured) / 20.0)
    # the absolute gate makes loudness not exactly linear in gain: correct once
    again = integrated_loudness(y * gain, sr)
    if again is not None and math.isfinite(again):
        gain *= 10.0 ** ((spec.loudness - again) / 20.0)
    note = f"loudness {spec.loudness:g} LUFS"
    if tp * gain > ceiling:
        gain, note = ceiling / tp, note + " (lowered to fit the peak ceiling)"
    return gain, note


def finish_audio(
    y: np.ndarray, sr: int, spec: RenderSpec, *, rng: np.random.Generator | None = None
) -> tuple[np.ndarray, dict[str, Any]]:
    """Finish one clip for writing at ``spec.bit_depth``.

    Removes DC, fades in, finds where the sound ends (:func:`sound_end`) and fades to
    digital silence there (``spec.trim``: the clip stops there), normalises to
    ``spec.loudness`` LUFS (BS.1770) or else to the ceiling, and holds the true peak
    (:func:`true_peak`) at or below ``spec.peak_db`` dBTP on the quantised samples. A
    loudness target that would push the true peak over the ceiling is lowered to fit.

    Returns
    -------
    y : np.ndarray, float32, on the bit depth's grid
    info : dict with ``peak_dbfs`` (sample peak), ``true_peak_dbtp``, ``loudness_lufs``
        (None under 0.4 s), ``gain_db``, ``normalisation``, ``natural_length_s``

    Raises
    ------
    AudioError
        Non-finite samples: such audio is never written.
    """
    y = np.asarray(y, dtype=np.float64).reshape(-1)
    if not np.all(np.isfinite(y)):
        raise AudioError("non-finite samples (NaN or Inf); not written")
    if y.size == 0:
        raise AudioError("empty audio; not written")
    end = sound_end(y, sr)
    y = apply_fades(y, sr, fade_in_ms=spec.fade_in_ms, fade_out_ms=spec.fade_out_ms, end=end)
    if spec.trim:
        y = y[: max(end, 1)]
    ceiling = 10.0 ** (spec.peak_db / 20.0)
    gain, note = _gain(y, sr, spec, ceiling)
    dither_seed = int((rng if rng is not None else np.random.default_rng(0)).integers(2**63))
    bits = _PCM_BITS.get(spec.bit_depth)
    step = 2.0 ** (1 - bits) if bits else 1e-7  # one quantisation step
    for _ in range(8):  # rounding and dither can lift the true peak a hair: back off
        out = quantise(y * gain, spec.bit_depth, end=end,
                       rng=np.random.default_rng(dither_seed))
        tp = true_peak(out, sr)
        if tp <= ceiling:
            break
        gain *= max(ceiling - 2.0 * step, 0.5 * ceiling) / tp
    loud = integrated_loudness(out, sr)
    info = {
        "peak_dbfs": _db(float(np.max(np.abs(out)))),
        "true_peak_dbtp": _db(tp),
        "loudness_lufs": round(loud, 3) if loud is not None and math.isfinite(loud) else None,
        "gain_db": _db(gain),
        "normalisation": note,
        "natural_length_s": round(end / sr, 4),
    }
    return out, info
