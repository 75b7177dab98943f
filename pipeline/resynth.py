"""Resynthesis: the whole audio path without a model.

Every usable file under SOURCE goes through the ingest front end
(:func:`pipeline.frontend.decode_file`, what :func:`pipeline.ingest.load_clip` wraps),
its [0, 1] spectrogram (:func:`pipeline.spectra.clip_to_unit`), fast Griffin-Lim and
the renderer. What comes out is the best a model trained on these settings could
sound, so a user hears the ceiling of spectrogram resynthesis before training. The
manifest records each file's spectral convergence in dB against its target magnitudes
and its source path; skipped files are listed with reasons. SOURCE is only read.
"""

from __future__ import annotations

import posixpath
import sys
import time
from collections import Counter, deque
from collections.abc import Callable, Iterator
from concurrent.futures import Executor, ProcessPoolExecutor
from pathlib import Path
from typing import Any

import numpy as np

from pipeline.config import AudioSpec, Settings
from pipeline.errors import AudioError, OutputError, ParameterError, ShotsmithError
from pipeline.frontend import decode_file
from pipeline.render import render_spectra
from pipeline.scan import FoundFile, scan_folder
from pipeline.spectra import clip_to_unit

__all__ = ["resynth_folder"]


def _decode(task: tuple[str, AudioSpec]) -> tuple[np.ndarray | None, Any]:
    """Worker: ``(unit spectrogram float32, metadata)`` or ``(None, reason)``."""
    path, spec = task
    try:
        clip, meta = decode_file(path, spec)
    except AudioError as exc:
        return None, str(exc)
    except Exception as exc:  # noqa: BLE001 - one odd file must not end the whole run
        return None, f"could not be decoded ({type(exc).__name__}: {exc})"[:200]
    return clip_to_unit(clip, spec), meta


def _stems(rels: list[str]) -> list[str]:
    """The file stem, or the relative path without extension where stems collide."""
    stems = [posixpath.splitext(posixpath.basename(r))[0] for r in rels]
    counts = Counter(stems)
    return [
        posixpath.splitext(r)[0].replace("/", "__") if counts[s] > 1 else s
        for r, s in zip(rels, stems, strict=True)
    ]


def _decoded(files: list[FoundFile], audio: AudioSpec, pool: Executor | None, window: int):
    """``_decode`` of each file in order, at most ``window`` results ahead of the consumer."""
    if pool is None:
        yield from (_decode((f.path, audio)) for f in files)
        return
    ahead: deque = deque()
    for f in files:
        ahead.append(pool.submit(_decode, (f.path, audio)))
        if len(ahead) >= window:
            yield ahead.popleft().result()
    while ahead:
        yield ahead.popleft().result()


def _pool(jobs: int) -> Executor | None:
    if jobs <= 1:
        return None
    import multiprocessing as mp

    # fork reuses the imported modules (as ingest does); not once torch's thread pools exist
    if sys.platform.startswith("linux") and "torch" not in sys.modules:
        return ProcessPoolExecutor(jobs, mp_context=mp.get_context("fork"))
    return ProcessPoolExecutor(jobs)


def resynth_folder(
    source: str | Path,
    out_dir: str | Path,
    settings: Settings,
    *,
    overwrite: bool = False,
    jobs: int | None = None,
    progress: Callable[..., None] | None = None,
) -> dict[str, Any]:
    """Resynthesize every usable audio file under ``source`` into ``out_dir``.

    Parameters
    ----------
    source : folder of one-shots; only read.
    out_dir : output folder for the WAVs and ``manifest.json``; must not be inside ``source``.
    settings : resolved settings (``settings.audio`` front end and STFT, ``settings.render``).
    overwrite : replace existing WAVs of the same name.
    jobs : decoder processes; default all cores (phase reconstruction always uses all cores).
    progress : ``callable(done, total)`` over the files found.

    Returns
    -------
    summary : dict with ``written``, ``skipped``, ``ignored``, ``hidden``, ``failed``,
        ``median_sc_db``, ``worst_sc_db``, ``seconds``, ``out``, ``manifest``.

    Raises
    ------
    ShotsmithError
        No usable audio file in ``source`` (the manifest still lists the reasons).
    """
    from pipeline.ingest import default_jobs

    t0 = time.perf_counter()
    src, out = Path(source).expanduser(), Path(out_dir).expanduser()
    if not src.is_dir():
        raise ParameterError(f"{source}: source folder not found" if not src.exists()
                             else f"{source}: SOURCE must be a folder")
    real_src, real_out = src.resolve(), out.resolve()
    if real_out == real_src or real_out.is_relative_to(real_src):
        raise OutputError(f"{out_dir}: --out must not be inside SOURCE ({source})")
    jobs = default_jobs() if jobs is None else jobs
    if jobs < 1:
        raise ParameterError(f"jobs={jobs} must be at least 1")
    audio, render = settings.audio, settings.render
    scan = scan_folder(src)
    files: list[FoundFile] = scan.files
    stems = dict(zip((f.rel for f in files), _stems([f.rel for f in files]), strict=True))
    skipped: list[dict[str, Any]] = list(scan.skipped)
    extra = {
        "settings": settings.to_dict(),
        "source": str(real_src),
        "skipped": skipped,  # grows while files are decoded; the manifest re-reads it
        "ignored": scan.ignored,
        "hidden": scan.hidden,
    }
    total = len(files)
    decoded = 0
    pool = _pool(min(jobs, max(total, 1)))

    def batches() -> Iterator[tuple[np.ndarray, list[dict[str, Any]]]]:
        nonlocal decoded
        bs = render.batch_size
        units, items = [], []
        for k, (f, (unit, info)) in enumerate(zip(files, _decoded(files, audio, pool, 2 * bs))):
            if unit is None:
                skipped.append({"path": f.rel, "reason": info})
            else:
                decoded += 1
                parts = f.rel.split("/")
                units.append(unit)
                items.append({
                    "stem": stems[f.rel], "kind": "resynth", "z": None, "seed": k,
                    "sources": [f.rel], "nearest": None, "source": f.rel,
                    "category": parts[0] if len(parts) > 1 else None,
                    "source_sample_rate": info["sample_rate"], "source_channels": info["channels"],
                    "source_duration": info["duration"], "source_peak_dbfs": info["peak_dbfs"],
                })
            if len(units) == bs or (k == total - 1 and units):
                yield np.stack(units), items
                units, items = [], []
                if progress:
                    progress(k + 1, total)

    try:
        written = render_spectra(batches(), out, audio, render, overwrite=overwrite,
                                 manifest_extra=extra)
    finally:
        if pool:
            pool.shutdown(cancel_futures=True)
    if progress:
        progress(total, total)
    sc = [it["sc_db"] for it in written]
    summary = {
        "written": len(written),
        "skipped": len(skipped),
        "ignored": scan.ignored,
        "hidden": scan.hidden,
        "failed": decoded - len(written),  # non-finite output, listed under "failed"
        "median_sc_db": round(float(np.median(sc)), 2) if sc else None,
        "worst_sc_db": round(float(np.max(sc)), 2) if sc else None,
        "seconds": round(time.perf_counter() - t0, 3),
        "out": str(out),
        "manifest": str(out / "manifest.json"),
    }
    if not written:
        first = "; ".join(f"{s['path']}: {s['reason']}" for s in skipped[:2])
        raise ShotsmithError(
            f"no usable audio files in {source} ({len(skipped)} skipped"
            + (f", e.g. {first}" if first else "")
            + f"; {scan.ignored} other files ignored)"
        )
    return summary
