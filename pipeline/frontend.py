"""The audio front end: one file in, one fitted clip out.

Read only the frames the clip needs, mix to mono, resample with soxr, align the
onset keeping a pre-roll, fit to the preset's length with a raised-cosine fade
at the crop point, normalise the peak. :func:`load_clip` is the path every
user file takes, in ingest and in interpolate/vary. Pure functions first,
file reading last.
"""

from __future__ import annotations

import math
import os
import stat
from pathlib import Path
from typing import Any

import numpy as np
import soundfile as sf
import soxr

from pipeline import files
from pipeline.config import AudioSpec
from pipeline.dsp import raised_cosine
from pipeline.errors import AudioError
from pipeline.scan import sound_path

ONSET_SEARCH_S = 2.0  # leading quiet audio up to this long is read and trimmed by onset alignment
_EDGE_MARGIN_S = 0.05  # read past the clip's end so the resampler's edge falls outside the clip
RESAMPLE_QUALITY = "HQ"  # soxr's default high-quality preset


# --- pure functions: arrays in, arrays out ---------------------------------------------------


def mix_to_mono(y: np.ndarray) -> np.ndarray:
    """Mean of the channels: ``(n,)`` or ``(n, channels)`` to ``(n,)`` float32."""
    y = np.asarray(y, dtype=np.float32)
    if y.ndim == 1:
        return y
    # A running sum over columns: several times faster than y.mean(axis=1) on (n, 2).
    out = y[:, 0].copy()
    for c in range(1, y.shape[1]):
        out += y[:, c]
    if y.shape[1] > 1:
        out *= np.float32(1.0 / y.shape[1])
    return out


def resample(y: np.ndarray, *, orig_sr: int, target_sr: int) -> np.ndarray:
    """Band-limited resampling with soxr (``quality="HQ"``); a no-op at equal rates."""
    y = np.ascontiguousarray(y, dtype=np.float32)
    if orig_sr == target_sr or y.size == 0:
        return y
    return soxr.resample(y, orig_sr, target_sr, quality=RESAMPLE_QUALITY).astype(np.float32)


def peak_dbfs(y: np.ndarray) -> float:
    """Sample peak in dBFS; ``-inf`` for digital silence."""
    peak = float(np.max(np.abs(y))) if np.size(y) else 0.0
    return 20.0 * math.log10(peak) if peak > 0 else -math.inf


def onset_index(y: np.ndarray, *, onset_db: float) -> int:
    """First sample whose magnitude reaches ``peak + onset_db`` (0 for silence)."""
    mag = np.abs(y)
    peak = float(mag.max()) if mag.size else 0.0
    if peak <= 0:
        return 0
    return int(np.argmax(mag >= peak * 10.0 ** (onset_db / 20.0)))


def align_onset(y: np.ndarray, *, sr: int, onset_db: float, preroll_ms: float) -> np.ndarray:
    """Drop leading audio below ``peak + onset_db``, keeping ``preroll_ms`` before the onset.

    A fixed relative threshold with a few ms of pre-roll keeps the attack intact
    (common practice).
    """
    preroll = int(round(preroll_ms * sr / 1000.0))
    return y[max(0, onset_index(y, onset_db=onset_db) - preroll) :]


def fit_length(y: np.ndarray, *, n_samples: int, sr: int, fade_ms: float) -> np.ndarray:
    """Crop to ``n_samples`` with a raised-cosine fade-out ending at the crop point, or zero-pad."""
    y = np.asarray(y, dtype=np.float32)
    if len(y) <= n_samples:
        return np.pad(y, (0, n_samples - len(y)))
    out = y[:n_samples].copy()
    n_fade = min(n_samples, int(round(fade_ms * sr / 1000.0)))
    if n_fade:
        out[-n_fade:] *= raised_cosine(n_fade, rising=False).astype(np.float32)
    return out


def normalise_peak(y: np.ndarray, *, peak_db: float) -> np.ndarray:
    """Scale so the sample peak is ``peak_db`` dBFS; silence stays silence."""
    y = np.asarray(y, dtype=np.float32)
    peak = float(np.max(np.abs(y))) if y.size else 0.0
    if peak <= 0:
        return y.copy()
    return (y * np.float32(10.0 ** (peak_db / 20.0) / peak)).astype(np.float32)


def prepare_clip(y: np.ndarray, sr: int, spec: AudioSpec) -> np.ndarray:
    """Mono audio at ``sr`` to the fitted, normalised clip ``(spec.n_samples,)`` float32."""
    y = resample(mix_to_mono(y), orig_sr=sr, target_sr=spec.sample_rate)
    y = align_onset(y, sr=spec.sample_rate, onset_db=spec.onset_db, preroll_ms=spec.preroll_ms)
    y = fit_length(y, n_samples=spec.n_samples, sr=spec.sample_rate, fade_ms=spec.fade_ms)
    return normalise_peak(y, peak_db=spec.peak_db)


# --- one file -------------------------------------------------------------------------------


def _libsndfile_reason(exc: Exception) -> str:
    msg = str(getattr(exc, "error_string", "") or exc).strip().rstrip(".")
    msg = msg.split(": ", 1)[1] if msg.startswith("Error opening") and ": " in msg else msg
    msg = msg[:1].lower() + msg[1:]
    return f"not a readable audio file: {msg[:120]}"


def within_full_scale(data: np.ndarray) -> np.ndarray:
    """Finite float samples scaled by an exact power of two so the peak is at most 1.

    Float files may go far past full scale (up to about 3.4e38); summing channels or
    resampling such values overflows to inf, and normalising inf gives NaN. A power-of-two
    gain changes no mantissa, so the normalised clip is the same as without it.
    """
    big = float(np.max(np.abs(data))) if data.size else 0.0
    if big <= 1.0:
        return data
    return data * np.float32(2.0 ** -math.ceil(math.log2(big)))


def _read_needed(f: sf.SoundFile, spec: AudioSpec) -> tuple[np.ndarray, bool]:
    """Read what the clip can use: its length plus the onset search, never the whole file.

    Returns the ``(frames, channels)`` data and whether the file was read to its end.
    """
    sr = f.samplerate
    need = math.ceil((spec.duration + spec.preroll_ms / 1000.0 + _EDGE_MARGIN_S) * sr)
    first = need + math.ceil(ONSET_SEARCH_S * sr)
    data = f.read(first, dtype="float32", always_2d=True)
    if len(data) < first:
        return data, True
    # A late onset: read on until the clip after it is complete, and no further.
    if np.all(np.isfinite(data)):
        mono = mix_to_mono(within_full_scale(data))
        want = onset_index(mono, onset_db=spec.onset_db) + need
        if want > len(data):
            more = f.read(want - len(data), dtype="float32", always_2d=True)
            data = np.concatenate([data, more])
            if len(more) < want - first:
                return data, True
    return data, False


# File sample rates read (common practice: telephone-band 8 kHz recordings and 768 kHz
# converters are the extremes in use). A header claiming 1 Hz made a 0.25 s hit hours long.
MIN_FILE_RATE, MAX_FILE_RATE = 4000, 768000


def _open_sound(path: str | Path) -> sf.SoundFile:
    """libsndfile keeps a path in a 1024-byte buffer ("System error." beyond it): a longer
    path is opened here and handed over as a file descriptor (short ones keep the path,
    from which libsndfile also guesses formats by extension)."""
    name = sound_path(path)
    if len(os.fsencode(os.path.abspath(path))) < 1000:
        return sf.SoundFile(name)
    fd = os.open(name, os.O_RDONLY)
    try:
        return sf.SoundFile(fd, closefd=True)
    except BaseException:
        os.close(fd)
        raise


def decode_file(path: str | Path, spec: AudioSpec) -> tuple[np.ndarray, dict[str, Any]]:
    """Decode one file to its fitted clip and metadata.

    Raises
    ------
    AudioError
        With the bare reason (no path), e.g. ``"silent: peak -inf dBFS"``.
    """
    try:
        st = os.stat(path)
        if stat.S_ISDIR(st.st_mode):
            raise AudioError("is a folder, not an audio file")
        if not stat.S_ISREG(st.st_mode):  # opening a FIFO would block until a writer comes
            raise AudioError("not a regular file (device, pipe or socket)")
        size = st.st_size
        with open(path, "rb"):
            pass
    except OSError as exc:
        raise AudioError(f"cannot be read: {files.reason(exc).lower()}") from None
    if size == 0:
        raise AudioError("empty file (0 bytes)")
    try:
        f = _open_sound(path)
    except OSError as exc:
        raise AudioError(f"cannot be read: {files.reason(exc).lower()}") from None
    except (sf.SoundFileError, RuntimeError, TypeError, ValueError) as exc:
        raise AudioError(_libsndfile_reason(exc)) from None
    with f:
        sr, channels = int(f.samplerate), int(f.channels)
        if not MIN_FILE_RATE <= sr <= MAX_FILE_RATE:  # a damaged header, not a recording
            side = "below" if sr < MIN_FILE_RATE else "above"
            raise AudioError(f"sample rate {sr} Hz is {side} the {MIN_FILE_RATE}-{MAX_FILE_RATE}"
                             " Hz this tool reads (a damaged header?)")
        try:
            data, to_end = _read_needed(f, spec)
        except (sf.SoundFileError, RuntimeError) as exc:
            raise AudioError(_libsndfile_reason(exc)) from None
        n_file = len(data) if to_end else max(int(f.frames), len(data))
    if n_file == 0:
        raise AudioError("no audio frames (header only)")
    ms = 1000.0 * n_file / sr
    if ms < spec.min_ms:
        frames = f"{n_file} sample{'s' if n_file != 1 else ''}"
        raise AudioError(f"too short: {frames} ({ms:.2f} ms; the minimum is {spec.min_ms:g} ms)")
    if not np.all(np.isfinite(data)):
        raise AudioError("corrupt samples: contains NaN or infinite values")
    where = "" if to_end else f" in the first {len(data) / sr:.1f} s"
    peak = peak_dbfs(data)
    if peak < spec.silence_db:
        shown = "-inf" if math.isinf(peak) else f"{peak:.1f}"
        raise AudioError(
            f"silent: peak {shown} dBFS{where} (threshold {spec.silence_db:g} dBFS)"
        )
    scaled = within_full_scale(data)
    mono = mix_to_mono(scaled)
    if peak_dbfs(mono) + (peak - peak_dbfs(scaled)) < spec.silence_db:  # in the file's scale
        raise AudioError(f"silent after mixing to mono{where}: the channels cancel out")
    clip = prepare_clip(mono, sr, spec)
    meta = {
        "sample_rate": sr,
        "channels": channels,
        "duration": round(n_file / sr, 6),
        "peak_dbfs": round(peak, 2),
    }
    return clip, meta


def load_clip(path: str | Path, spec: AudioSpec) -> np.ndarray:
    """A user's audio file as the model sees it: float32 ``(spec.n_samples,)``, fitted, normalised.

    Raises
    ------
    AudioError
        ``"<path>: <reason>"`` for a file that cannot be used.
    """
    try:
        return decode_file(path, spec)[0]
    except AudioError as exc:
        raise AudioError(f"{path}: {exc}") from None
