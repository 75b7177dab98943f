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
from collections.abc import Callable, Iterable
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
        for U, items in batches:
            U = np.asarray(U, dtype=np.float32)
            if U.ndim != 3 or U.shape[1:] != (audio.n_bins, audio.n_frames):
                raise ParameterError(f"spectra of shape {U.shape} do not match the audio settings "
                                     f"(B, {audio.n_bins}, {audio.n_frames})")
            if len(items) != len(U):
                raise ParameterError(f"{len(items)} items for {len(U)} spectra")
            for s in range(0, len(U), render.batch_size):
                its = items[s : s + render.batch_size]
                names = folder.claim(
                    [it.get("stem") or f"sound-{done + j:04d}" for j, it in enumerate(its)],
                    [it.get("suffix", "") for it in its],
                )
                seeds = [int(it.get("seed", seed + done + j)) for j, it in enumerate(its)]
                S = spectra.unit_to_magnitude(U[s : s + len(its)], audio)
                y, sc = reconstruct(S, audio, n_iter=render.iterations, momentum=render.momentum,
                                    init=render.phase_init, seed=seeds)
                if out_sr != audio.sample_rate:
                    y = [resample(yj, orig_sr=audio.sample_rate, target_sr=out_sr) for yj in y]
                for it, name, sd, yj, scj in zip(its, names, seeds, y, sc):
                    meta = {k: it.get(k) for k in _FIRST_KEYS} | {"seed": sd}
                    meta |= {k: v for k, v in it.items() if k not in meta and k not in _NAMING}
                    try:
                        out, info = finish_audio(yj, out_sr, render,
                                                 rng=np.random.default_rng([sd, 0xD17]))
                    except AudioError as exc:
                        folder.failed.append({"file": name, **meta, "reason": str(exc)})
                        continue
                    meta |= {"sc_db": round(float(scj), 3), **info}
                    folder.write(name, out, out_sr, render.bit_depth, meta)
                done += len(its)
                folder.flush()
                if progress is not None:
                    progress(done, total)
        complete = True
    finally:
        folder.close(complete=complete)
    return folder.items
