"""Rendering: [0, 1] spectra to finished WAV files and a manifest.

Phase reconstruction (:func:`pipeline.phase.reconstruct`), then an optional
resampling to the session's rate (``render.output_rate``, soxr), then
:func:`pipeline.finish.finish_audio` (DC, fades, the end of the sound, loudness or
true-peak normalisation, quantisation with dither; re-exported here).
:func:`render_spectra`, which every command that writes audio calls with decoded
spectra and per-item metadata, runs these and hands each clip to the output folder's
writer (:class:`pipeline.outputs.OutputFolder`: names, WAV files, manifest).
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable, Iterable, Iterator
from pathlib import Path
from typing import Any

import numpy as np

from pipeline import spectra
from pipeline.config import AudioSpec, RenderSpec
from pipeline.errors import AudioError, ParameterError
from pipeline.finish import (  # noqa: F401 - re-exported: the finishing stage of rendering
    BS1770_BLOCK_S,
    finish_audio,
    integrated_loudness,
)
from pipeline.frontend import resample
from pipeline.outputs import OutputFolder
from pipeline.phase import reconstruct

_FIRST_KEYS = ("kind", "z", "seed", "sources", "nearest")
_NAMING = ("stem", "suffix")  # how an item asks for its file name; not recorded


@dataclasses.dataclass
class Finished:
    """One rendered item: what a manifest records of it and its finished clip, or why not."""

    index: int  # its place in the run (0, 1, ...)
    item: dict[str, Any]  # as the caller gave it (``stem``, ``suffix``, metadata)
    meta: dict[str, Any]  # the metadata to record, the finishing measurements added
    audio: np.ndarray | None  # float32 on the bit depth's grid; None if it failed
    reason: str | None = None  # why it failed


def finish_batches(
    batches: Iterable[tuple[np.ndarray, list[dict[str, Any]]]],
    audio: AudioSpec,
    render: RenderSpec,
    *,
    seed: int = 0,
) -> Iterator[list[Finished]]:
    """Phase-reconstruct, resample and finish batches of [0, 1] spectra; no files.

    Yields one list of :class:`Finished` per ``render.batch_size`` clips, in order. The
    clips are at ``render.output_rate or audio.sample_rate``. Items and seeds as in
    :func:`render_spectra`; a clip that cannot be finished (non-finite) has ``audio``
    None and its ``reason``.
    """
    out_sr = render.output_rate or audio.sample_rate
    done = 0
    for U, items in batches:
        U = np.asarray(U, dtype=np.float32)
        if U.ndim != 3 or U.shape[1:] != (audio.n_bins, audio.n_frames):
            raise ParameterError(f"spectra of shape {U.shape} do not match the audio settings "
                                 f"(B, {audio.n_bins}, {audio.n_frames})")
        if len(items) != len(U):
            raise ParameterError(f"{len(items)} items for {len(U)} spectra")
        for s in range(0, len(U), render.batch_size):
            its = items[s : s + render.batch_size]
            seeds = [int(it.get("seed", seed + done + j)) for j, it in enumerate(its)]
            S = spectra.unit_to_magnitude(U[s : s + len(its)], audio)
            y, sc = reconstruct(S, audio, n_iter=render.iterations, momentum=render.momentum,
                                init=render.phase_init, seed=seeds)
            if out_sr != audio.sample_rate:
                y = [resample(yj, orig_sr=audio.sample_rate, target_sr=out_sr) for yj in y]
            batch = []
            for j, (it, sd, yj, scj) in enumerate(zip(its, seeds, y, sc)):
                meta = {k: it.get(k) for k in _FIRST_KEYS} | {"seed": sd}
                meta |= {k: v for k, v in it.items() if k not in meta and k not in _NAMING}
                try:
                    out, info = finish_audio(yj, out_sr, render,
                                             rng=np.random.default_rng([sd, 0xD17]))
                except AudioError as exc:
                    batch.append(Finished(done + j, it, meta, None, str(exc)))
                    continue
                meta |= {"sc_db": round(float(scj), 3), **info}
                batch.append(Finished(done + j, it, meta, out))
            done += len(its)
            yield batch


def render_spectra(
    batches: Iterable[tuple[np.ndarray, list[dict[str, Any]]]],
    out_dir: str | Path,
    audio: AudioSpec,
    render: RenderSpec,
    *,
    overwrite: bool = False,
    seed: int = 0,
    progress: Callable[..., None] | None = None,
    total: int | None = None,
    manifest_extra: dict[str, Any] | None = None,
) -> list[dict[str, Any]]:
    """Phase-reconstruct, finish and write batches of [0, 1] spectra; keep the manifest current.

    Parameters
    ----------
    batches : iterable of ``(U, items)``
        ``U`` [shape=(B, audio.n_bins, audio.n_frames)] on the bank's [0, 1] scale; ``items``
        B dicts: ``stem`` (wanted file stem; cut to fit, with a hash of the whole when cut),
        ``suffix`` (kept whole after the stem, such as a step number ``-03``), ``seed`` (phase
        and dither; default ``seed + index``) and any metadata to record (``kind``, ``z``,
        ``sources``, ``nearest``...).
    out_dir : output folder (created).
    audio, render : the spectrogram scale and the render settings.
    overwrite : replace existing files of the same name.
    progress : ``callable(done, total)`` after each batch.
    manifest_extra : the run's manifest fields (``model``, ``settings``, ``request``...). Lists
        in it are followed after each batch, so a caller may extend them (for example skipped
        files) while it produces batches.

    Returns
    -------
    The manifest entries of the files written, in order: ``file``, the metadata, and
    ``sc_db`` (spectral convergence of the reconstruction against the target magnitudes),
    ``peak_dbfs``, ``loudness_lufs``, ``gain_db``, ``normalisation``.
    """
    folder = OutputFolder(out_dir, overwrite=overwrite)
    settings = {"audio": dataclasses.asdict(audio), "render": dataclasses.asdict(render)}
    extra = manifest_extra if manifest_extra is not None else {}
    out_sr = render.output_rate or audio.sample_rate
    folder.header = {"settings": settings, "render": settings["render"],
                     "sample_rate": audio.sample_rate, "output_rate": out_sr, **extra}
    done, complete = 0, False
    try:
        for batch in finish_batches(batches, audio, render, seed=seed):
            names = folder.claim([f.item.get("stem") or f"sound-{f.index:04d}" for f in batch],
                                 [f.item.get("suffix", "") for f in batch])
            for f, name in zip(batch, names):
                if f.audio is None:
                    folder.failed.append({"file": name, **f.meta, "reason": f.reason})
                else:
                    folder.write(name, f.audio, out_sr, render.bit_depth, f.meta)
            done += len(batch)
            folder.flush()
            if progress is not None:
                progress(done, total)
        complete = True
    finally:
        folder.close(complete=complete)
    return folder.items


def loudness_shortfall(items: list[dict[str, Any]], render: RenderSpec) -> dict[str, Any] | None:
    """Sounds whose loudness target could not be met under the peak ceiling: how many, and
    the one furthest below it (``file``, ``loudness_lufs``, ``short_by_lu``); None if all
    met it (or no target was set)."""
    if render.loudness is None:
        return None
    short = [it for it in items if "lowered to fit" in str(it.get("normalisation", ""))
             and it.get("loudness_lufs") is not None]
    if not short:
        return None
    worst = min(short, key=lambda it: it["loudness_lufs"])
    return {"count": len(short), "of": len(items), "target_lufs": render.loudness,
            "peak_db": render.peak_db, "file": worst.get("file"),
            "loudness_lufs": worst["loudness_lufs"],
            "short_by_lu": round(render.loudness - worst["loudness_lufs"], 2)}
