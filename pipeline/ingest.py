"""Ingest: a folder of one-shots in, a bank of [0, 1] log-magnitude spectrograms out.

:func:`ingest_folder` scans SOURCE (:mod:`pipeline.scan`), decodes each new or
changed file through the audio front end (:mod:`pipeline.frontend`, the same
:func:`load_clip` that interpolate/vary use for a user's own sound) in worker
processes, streams the spectrogram rows into the bank, and reuses unchanged
clips (and unchanged rejects) from the previous bank built with the same audio
settings. SOURCE is only ever read.
"""

from __future__ import annotations

import posixpath
import sys
import time
from collections import Counter
from collections.abc import Callable
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from pipeline import __version__, files
from pipeline.bank import (
    BANK_FILES,
    INDEX_FILE,
    REPORT_FILE,
    STAGING_FILE,
    BankWriter,
    RowFile,
    open_bank,
    read_json,
)
from pipeline.config import AudioSpec, Settings, available_cores
from pipeline.errors import AudioError, BankError, ParameterError, ShotsmithError
from pipeline.frontend import (
    align_onset,
    decode_file,
    fit_length,
    load_clip,
    mix_to_mono,
    normalise_peak,
    prepare_clip,
    resample,
)
from pipeline.scan import FoundFile, scan_folder
from pipeline.spectra import clip_to_unit

__all__ = [
    "IngestSummary",
    "align_onset",
    "decode_file",
    "default_jobs",
    "fit_length",
    "ingest_folder",
    "load_clip",
    "mix_to_mono",
    "normalise_peak",
    "prepare_clip",
    "resample",
]

Progress = Callable[[int, int], None]


def _work(task: tuple[int, str, AudioSpec]) -> tuple[int, np.ndarray | None, Any]:
    """Worker: ``(slot, unit spectrogram or None, metadata or reason)``."""
    slot, path, spec = task
    try:
        clip, meta = decode_file(path, spec)
    except AudioError as exc:
        return slot, None, str(exc)
    except Exception as exc:  # noqa: BLE001 - one odd file must not end the whole ingest
        return slot, None, f"could not be decoded ({type(exc).__name__}: {exc})"[:200]
    return slot, clip_to_unit(clip, spec).astype(spec.spectra_dtype), meta


# --- the folder -----------------------------------------------------------------------------


@dataclass(frozen=True)
class IngestSummary:
    """What one ingest run did. ``to_dict`` is the ``--json`` summary."""

    accepted: int
    skipped: int
    ignored: int
    hidden: int
    decoded: int  # files run through the decoder in this run (accepted or not)
    reused: int  # clips copied from the previous bank
    seconds: float
    audio_seconds: float  # total original duration of the accepted files
    bank: str
    report: str
    cache: str
    skipped_files: list[dict[str, Any]] = field(default_factory=list, repr=False)

    def to_dict(self) -> dict[str, Any]:
        d = asdict(self)
        del d["skipped_files"]
        return d


def default_jobs() -> int:
    """The cores this process may run on (the default for ``--jobs``)."""
    return available_cores()


def _check_paths(source: str | Path, bank_dir: str | Path) -> tuple[Path, Path]:
    src = Path(source).expanduser()
    if not src.is_dir():
        raise ParameterError(f"{source}: source folder not found" if not src.exists()
                             else f"{source}: SOURCE must be a folder")
    bank = Path(bank_dir).expanduser()
    real_src, real_bank = src.resolve(), bank.resolve()
    if real_bank == real_src or real_bank.is_relative_to(real_src):
        raise ParameterError(f"{bank_dir}: --bank must not be inside SOURCE ({source})")
    if bank.exists() and not bank.is_dir():
        raise BankError(f"{bank_dir}: --bank exists and is not a folder")
    return src, bank


def _previous(bank: Path, audio: dict[str, Any]):
    """Reusable clips ``{rel: (row, clip)}``, cached rejects ``{rel: entry}``, old bank, note."""
    index_path = bank / INDEX_FILE
    if not index_path.exists():
        return {}, {}, None, "new bank"
    try:
        raw = read_json(index_path, "bank index")
    except BankError:
        raw = {"tool": "shotsmith"}
    if not isinstance(raw, dict) or raw.get("tool") != "shotsmith":
        raise BankError(f"{index_path}: exists and is not a shotsmith bank; choose another --bank")
    if raw.get("audio") != audio:
        changed = sorted(k for k in audio if (raw.get("audio") or {}).get(k) != audio[k])
        return {}, {}, None, f"rebuilt: audio settings changed ({', '.join(changed)})"
    try:
        old = open_bank(bank)
    except BankError as exc:
        return {}, {}, None, f"rebuilt: previous bank unusable ({exc})"
    clips = {c["path"]: (row, c) for row, c in enumerate(old.clips)}
    skips: dict[str, dict[str, Any]] = {}
    try:
        report = read_json(bank / REPORT_FILE, "ingest report")
        if report.get("audio") == audio:
            skips = {s["path"]: s for s in report.get("skipped", []) if "mtime_ns" in s}
    except (BankError, AttributeError, TypeError, KeyError):
        pass
    return clips, skips, old, "reused unchanged files"


def _unique_names(rels: list[str]) -> list[str]:
    """The stem; the relative path without extension where stems collide; else the full path."""
    stems = [posixpath.splitext(posixpath.basename(r))[0] for r in rels]
    counts = Counter(stems)
    names = [
        posixpath.splitext(r)[0] if counts[s] > 1 else s for r, s in zip(rels, stems, strict=True)
    ]
    counts = Counter(names)
    return [r if counts[n] > 1 else n for r, n in zip(rels, names, strict=True)]


def _decode_all(
    tasks: list[tuple[int, str, AudioSpec]], jobs: int, on_result: Callable[[tuple], None]
) -> None:
    """Run :func:`_work` over ``tasks``, in-process or in a pool, with bounded submission."""
    if jobs <= 1 or len(tasks) <= 1:
        for task in tasks:
            on_result(_work(task))
        return
    import multiprocessing as mp

    # fork starts workers with the modules already imported (importing numpy,
    # scipy and soundfile costs ~0.5 s per spawned process) and is safe while
    # the process runs no native thread pools; once a caller has loaded torch
    # (which has them), use a clean forkserver instead.
    if sys.platform.startswith("linux") and "torch" not in sys.modules:
        ctx = mp.get_context("fork")
    elif "forkserver" in mp.get_all_start_methods():
        ctx = mp.get_context("forkserver")
        ctx.set_forkserver_preload(["pipeline.ingest"])
    else:
        ctx = None  # spawn, the platform default
    window = 4 * jobs  # results in flight, so memory stays bounded on a huge folder
    try:
        with ProcessPoolExecutor(max_workers=jobs, mp_context=ctx) as pool:
            pending: set = set()
            for task in tasks:
                pending.add(pool.submit(_work, task))
                if len(pending) >= window:
                    done, pending = wait(pending, return_when=FIRST_COMPLETED)
                    for fut in done:
                        on_result(fut.result())
            while pending:
                done, pending = wait(pending, return_when=FIRST_COMPLETED)
                for fut in done:
                    on_result(fut.result())
    except BrokenProcessPool:
        raise ShotsmithError(
            "a decoder process crashed; re-run with --jobs 1 to find the file that causes it"
        ) from None


def ingest_folder(
    source: str | Path,
    bank_dir: str | Path,
    settings: Settings,
    *,
    jobs: int | None = None,
    progress: Progress | None = None,
) -> IngestSummary:
    """Build or update the bank in ``bank_dir`` from the audio files under ``source``.

    Parameters
    ----------
    source : folder of one-shots; only read, never written.
    bank_dir : output folder, outside ``source``.
    settings : resolved settings; ``settings.audio`` fixes the clip and spectrogram shape.
    jobs : worker processes for decoding; default all available cores, 1 = in-process.
    progress : optional ``callable(done, total)`` over the audio files found.

    Raises
    ------
    ShotsmithError
        ``"no usable audio files in SOURCE (...)"`` when nothing can be used.
    """
    t0 = time.perf_counter()
    jobs = default_jobs() if jobs is None else jobs
    if jobs < 1:
        raise ParameterError(f"jobs={jobs} must be at least 1")
    src, bank = _check_paths(source, bank_dir)
    spec = settings.audio
    settings_dict = settings.to_dict()
    audio = settings_dict["audio"]
    scan = scan_folder(src)
    old_clips, old_skips, old, cache_note = _previous(bank, audio)

    reused: list[tuple[FoundFile, int, dict]] = []
    skipped = list(scan.skipped)
    todo: list[FoundFile] = []
    for f in scan.files:
        row_clip = old_clips.get(f.rel)
        skip = old_skips.get(f.rel)
        fingerprint = (f.size, f.mtime_ns)
        if row_clip and (row_clip[1].get("size"), row_clip[1].get("mtime_ns")) == fingerprint:
            reused.append((f, *row_clip))
        elif skip and (skip.get("size"), skip.get("mtime_ns")) == fingerprint:
            skipped.append(dict(skip))
        else:
            todo.append(f)

    total, done = len(scan.files), len(scan.files) - len(todo)
    if progress:
        progress(done, total)
    bank.mkdir(parents=True, exist_ok=True)
    files.remove_stale_temporaries(bank, BANK_FILES)  # what killed ingests left
    staging_path = files.temp_path(bank / STAGING_FILE)
    staging = None
    decoded: dict[int, dict[str, Any]] = {}
    writer = None
    try:
        if todo:
            staging = RowFile(staging_path, spec.spectra_dtype,
                              (len(todo), spec.n_bins, spec.n_frames))

        def on_result(result: tuple) -> None:
            nonlocal done
            slot, unit, info = result
            f = todo[slot]
            if unit is None:
                skipped.append(
                    {"path": f.rel, "reason": info, "size": f.size, "mtime_ns": f.mtime_ns}
                )
            else:
                staging.put(slot, unit)
                decoded[slot] = info
            done += 1
            if progress:
                progress(done, total)

        tasks = [(i, f.path, spec) for i, f in enumerate(todo)]
        _decode_all(tasks, min(jobs, len(todo)), on_result)

        # Row order = relative path order, whatever order the workers finished in.
        rows: list[tuple[FoundFile, dict, Callable[[], np.ndarray]]] = []
        for f, row, clip in reused:
            rows.append((f, clip, lambda r=row: old.spectra[r]))
        for slot, meta in decoded.items():
            rows.append((todo[slot], meta, lambda s=slot: staging.get(s)))
        rows.sort(key=lambda item: item[0].rel)
        skipped.sort(key=lambda s: s["path"])
        names = _unique_names([f.rel for f, _, _ in rows])
        clips = []
        for (f, meta, _), name in zip(rows, names, strict=True):
            parts = f.rel.split("/")
            clips.append({
                "name": name,
                "path": f.rel,
                "category": parts[0] if len(parts) > 1 else None,
                "sample_rate": meta["sample_rate"],
                "channels": meta["channels"],
                "duration": meta["duration"],
                "peak_dbfs": meta["peak_dbfs"],
                "size": f.size,
                "mtime_ns": f.mtime_ns,
            })
        seconds = round(time.perf_counter() - t0, 3)
        report = {
            "tool": "shotsmith",
            "version": __version__,
            "source": str(src.resolve()),
            "accepted": len(clips),
            "decoded": len(todo),
            "reused": len(reused),
            "skipped_count": len(skipped),
            "ignored": scan.ignored,
            "hidden": scan.hidden,
            "cache": cache_note,
            "seconds": seconds,
            "audio": audio,
            "skipped": skipped,
        }
        if not clips:
            files.write_json_atomic(bank / REPORT_FILE, report)
            raise ShotsmithError(
                f"no usable audio files in {source} ({len(skipped)} skipped, "
                f"{scan.ignored} ignored; see {bank / REPORT_FILE})"
            )
        writer = BankWriter(bank, spec, len(clips))
        for row, (_, _, unit) in enumerate(rows):
            writer.put(row, unit())
        writer.commit(clips, settings_dict, report)
        writer = None
        seconds = report["seconds"] = round(time.perf_counter() - t0, 3)  # now with the write
        files.write_json_atomic(bank / REPORT_FILE, report)
    finally:
        if writer is not None:
            writer.abort()
        if staging is not None:
            staging.close()
        staging_path.unlink(missing_ok=True)
    return IngestSummary(
        accepted=len(clips),
        skipped=len(skipped),
        ignored=scan.ignored,
        hidden=scan.hidden,
        decoded=len(todo),
        reused=len(reused),
        seconds=seconds,
        audio_seconds=round(sum(c["duration"] for c in clips), 3),
        bank=str(bank),
        report=str(bank / REPORT_FILE),
        cache=cache_note,
        skipped_files=skipped,
    )
