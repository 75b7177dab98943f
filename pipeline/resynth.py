"""Resynthesis: the whole audio path without a model.

Every usable file under SOURCE goes through ingest's decode path
(:mod:`pipeline.decode`: the front end and the [0, 1] spectrogram, in worker
processes, clips named by the same rule as a bank's), fast Griffin-Lim and the
renderer. What comes out is the best a model trained on these settings could
sound, so a user hears the ceiling of spectrogram resynthesis before training. The
manifest records each file's spectral convergence in dB against its target magnitudes
and its source path; skipped files are listed with reasons. SOURCE is only read.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import numpy as np

from pipeline.config import Settings
from pipeline.decode import category_of, check_jobs, clip_names, decode_files, plan_decode
from pipeline.errors import OutputError, ShotsmithError
from pipeline.render import loudness_shortfall, render_spectra
from pipeline.scan import is_inside, scan_folder, source_folder

__all__ = ["resynth_folder"]


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
    t0 = time.perf_counter()
    src, out = source_folder(source), Path(out_dir).expanduser()
    if is_inside(out, src):
        raise OutputError(
            f"{out_dir}: the output folder must not be inside the source folder {source}")
    jobs = check_jobs(jobs)
    audio, render = settings.audio, settings.render
    scan = scan_folder(src)
    files = plan_decode(scan.files).decode  # no previous bank: every file
    names = clip_names([f.rel for f in files])
    skipped: list[dict[str, Any]] = list(scan.skipped)
    extra = {
        "settings": settings.to_dict(),
        "source": str(src.resolve()),
        "skipped": skipped,  # grows while files are decoded; the manifest re-reads it
        "ignored": scan.ignored,
        "hidden": scan.hidden,
    }
    total = len(files)
    decoded = 0
    # a batch ahead: the workers decode the next batch while this one is rendered
    results = decode_files([f.path for f in files], audio, jobs=jobs, ahead=2 * render.batch_size)

    def batches() -> Iterator[tuple[np.ndarray, list[dict[str, Any]]]]:
        nonlocal decoded
        bs = render.batch_size
        units, items = [], []
        for k, (f, name, (unit, info)) in enumerate(zip(files, names, results)):
            if unit is None:
                skipped.append({"path": f.rel, "reason": info})
            else:
                decoded += 1
                units.append(unit)
                items.append({
                    "stem": name, "kind": "resynth", "z": None, "seed": k,
                    "sources": [f.rel], "nearest": None, "source": f.rel, "name": name,
                    "category": category_of(f.rel),
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
        results.close()  # stops the decoder processes if rendering ended early
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
        "loudness_unmet": loudness_shortfall(written, render),
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
