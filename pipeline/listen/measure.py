"""Per-sound figures for the listening page: BS.1770 loudness and a spectrogram thumbnail.

Both are computed once and cached in a hidden folder beside the manifest
(``.shotsmith-listen/``), keyed by each file's size and modification time; the WAVs
and the manifest are never touched. A folder that cannot be written to still works:
the figures are then kept in memory for the session.
"""

from __future__ import annotations

import hashlib
import io
import json
import math
import threading
from pathlib import Path
from typing import Any

import numpy as np
import soundfile as sf

from pipeline.errors import OutputError
from pipeline.files import reason, write_atomic
from pipeline.finish import BS1770_BLOCK_S, integrated_loudness

CACHE_DIR = ".shotsmith-listen"
LOUDNESS_FILE = "loudness.json"
THUMB_STYLE = "v2"  # part of every thumbnail's cache name: a new drawing style redraws
DB_RANGE = (-100.0, 0.0)  # one colour scale for every thumbnail, dB re full scale
THUMB_SIZE_IN = (3.2, 1.45)
THUMB_DPI = 100
FACE, INK = "#1f2226", "#e9e6df"  # the page's panel and text colours

_draw_lock = threading.Lock()


def read_mono(path: Path) -> tuple[np.ndarray, int]:
    """Samples of a WAV as float64 ``(n,)`` (channels averaged) and its rate."""
    y, sr = sf.read(str(path), dtype="float64", always_2d=True)
    return y.mean(axis=1), int(sr)


def padded_loudness(y: np.ndarray, sr: int) -> tuple[float | None, bool]:
    """BS.1770 integrated loudness (LUFS) of ``y``, zero-padded to one 400 ms block if shorter.

    ITU-R BS.1770-4 gates 400 ms blocks, so a shorter clip has no loudness of its own;
    measured padded with silence, its energy is spread over 400 ms, which reads lower
    than the clip sounds, in the same way for every short clip. Returns the loudness
    (None for digital silence, which every block's absolute gate removes) and whether
    the clip was padded.
    """
    y = np.asarray(y, dtype=np.float64)
    need = math.ceil(BS1770_BLOCK_S * sr)
    padded = len(y) < need
    if padded:
        y = np.concatenate([y, np.zeros(need - len(y))])
    lufs = integrated_loudness(y, sr)
    return (lufs if lufs is not None and math.isfinite(lufs) else None), padded


def _fingerprint(path: Path) -> tuple[int, int]:
    st = path.stat()
    return st.st_size, st.st_mtime_ns


def _write_cache(path: Path, data: bytes) -> bool:
    """Best effort: write ``data`` to ``path`` whole (:func:`pipeline.files.write_atomic`);
    False where the folder cannot be written (the figures then stay in memory)."""
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        write_atomic(path, data)
    except (OSError, OutputError):
        return False
    return True


def measure_folder(root: Path, files: list[tuple[str, Path]]) -> dict[str, dict[str, Any]]:
    """Loudness, duration and rate of each ``(name, path)`` in one folder, through the cache.

    Returns ``{name: {"lufs", "padded", "duration_s", "sample_rate"}}``; a file that
    cannot be decoded gets ``{"error": reason}``.
    """
    cache_path = root / CACHE_DIR / LOUDNESS_FILE
    try:
        cache = json.loads(cache_path.read_text(encoding="utf-8"))
        cache = cache if isinstance(cache, dict) else {}
    except (OSError, UnicodeDecodeError, ValueError):
        cache = {}
    out, changed = {}, False
    for name, path in files:
        try:
            size, mtime = _fingerprint(path)
        except OSError as exc:
            out[name] = {"error": reason(exc)}
            continue
        hit = cache.get(name)
        if isinstance(hit, dict) and hit.get("size") == size and hit.get("mtime_ns") == mtime:
            out[name] = {k: hit.get(k) for k in ("lufs", "padded", "duration_s", "sample_rate")}
            continue
        try:
            y, sr = read_mono(path)
        except (OSError, sf.SoundFileError, RuntimeError) as exc:
            out[name] = {"error": str(exc)}
            continue
        lufs, padded = padded_loudness(y, sr) if len(y) else (None, False)
        entry = {"lufs": None if lufs is None else round(lufs, 3), "padded": padded,
                 "duration_s": len(y) / sr, "sample_rate": sr}
        cache[name] = {"size": size, "mtime_ns": mtime, **entry}
        out[name], changed = entry, True
    if changed:
        _write_cache(cache_path, json.dumps(cache, indent=1).encode("utf-8"))
    return out


def loudness_target(values: list[float | None], *, percentile: float = 10.0) -> float | None:
    """The level the page turns louder sounds down to: a low percentile of the set's loudness.

    A low percentile rather than the minimum, so one nearly silent sound does not pull
    every other one down to inaudibility; sounds quieter than the target play as written
    (the page only attenuates).
    """
    finite = [v for v in values if v is not None and math.isfinite(v)]
    return float(np.percentile(finite, percentile)) if finite else None


def matching_gain_db(lufs: float | None, target: float | None) -> float:
    """Gain (dB, never above 0) that brings ``lufs`` down to ``target``."""
    if lufs is None or target is None:
        return 0.0
    return min(0.0, target - lufs)


def draw_spectrogram_png(y: np.ndarray, sr: int) -> bytes:
    """A small PNG of the log-magnitude STFT of ``y``: time in ms, frequency in kHz.

    About 32 ms Hann windows with 75 % overlap, magnitudes scaled so a full-scale sine
    reads 0 dB (:mod:`pipeline.spectra`), colours fixed to ``DB_RANGE`` for every sound.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    from pipeline.spectra import magnitude

    n_fft = int(2 ** round(math.log2(max(sr * 0.032, 64))))
    hop = n_fft // 4
    S = magnitude(np.asarray(y, dtype=np.float64), n_fft=n_fft, hop_length=hop)
    db = 20.0 * np.log10(np.maximum(S, 10 ** (DB_RANGE[0] / 20)))
    extent = (0.0, 1000.0 * len(y) / sr, 0.0, sr / 2000.0)
    with _draw_lock:
        fig = Figure(figsize=THUMB_SIZE_IN, dpi=THUMB_DPI, facecolor=FACE)
        FigureCanvasAgg(fig)
        ax = fig.add_axes((0.13, 0.27, 0.84, 0.68))
        ax.imshow(db, origin="lower", aspect="auto", extent=extent, cmap="magma",
                  vmin=DB_RANGE[0], vmax=DB_RANGE[1], interpolation="nearest")
        ax.set_xlabel("time (ms)", fontsize=7, labelpad=1, color=INK)
        ax.set_ylabel("kHz", fontsize=7, labelpad=1, color=INK)
        _ink(ax)
        buf = io.BytesIO()
        fig.savefig(buf, format="png", dpi=THUMB_DPI, facecolor=FACE)
    return buf.getvalue()


def _ink(ax) -> None:
    ax.tick_params(labelsize=6, length=2, pad=1, colors=INK)
    for spine in ax.spines.values():
        spine.set_color(INK)


def draw_legend_png() -> bytes:
    """The colour scale shared by every thumbnail, as a small horizontal bar."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.cm import ScalarMappable
    from matplotlib.colors import Normalize
    from matplotlib.figure import Figure

    with _draw_lock:
        fig = Figure(figsize=(3.2, 0.55), dpi=THUMB_DPI, facecolor=FACE)
        FigureCanvasAgg(fig)
        ax = fig.add_axes((0.05, 0.62, 0.9, 0.3))
        bar = fig.colorbar(ScalarMappable(Normalize(*DB_RANGE), "magma"), cax=ax,
                           orientation="horizontal")
        bar.set_label("dB re full scale", fontsize=7, labelpad=1, color=INK)
        _ink(bar.ax)
        buf = io.BytesIO()
        fig.savefig(buf, format="png", dpi=THUMB_DPI, facecolor=FACE)
    return buf.getvalue()


def thumbnail(root: Path, name: str, path: Path) -> bytes:
    """The cached spectrogram PNG of ``root/name``, drawn on first use."""
    size, mtime = _fingerprint(path)
    key = hashlib.sha256(f"{name}\0{size}\0{mtime}\0{THUMB_STYLE}".encode()).hexdigest()[:24]
    cached = root / CACHE_DIR / "thumbs" / f"{key}.png"
    try:
        return cached.read_bytes()
    except OSError:
        pass
    y, sr = read_mono(path)
    png = draw_spectrogram_png(y, sr)
    _write_cache(cached, png)
    return png
