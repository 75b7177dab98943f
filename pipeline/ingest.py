"""Ingest: a folder of one-shots in, a bank of [0, 1] log-magnitude spectrograms out.

:func:`ingest_folder` scans SOURCE (:mod:`pipeline.scan`), plans what to decode
against the previous bank built with the same audio settings (unchanged clips and
unchanged rejects are reused), decodes the rest through the audio front end in worker
processes (:mod:`pipeline.decode`, shared with resynth; the same front end that
interpolate/vary use for a user's own sound) and streams the spectrogram rows into
the bank. SOURCE is only ever read.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

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
    stored_settings,
)
from pipeline.config import Settings, choose_settings
from pipeline.decode import category_of, check_jobs, clip_names, decode_files, plan_decode
from pipeline.errors import BankError, ParameterError, ShotsmithError
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
from pipeline.scan import is_inside, scan_folder, source_folder

__all__ = [
    "IngestSummary",
    "align_onset",
    "decode_file",
    "fit_length",
    "ingest_folder",
    "load_clip",
    "mix_to_mono",
    "normalise_peak",
    "prepare_clip",
    "resample",
]

Progress = Callable[[int, int], None]


# --- the folder -----------------------------------------------------------------------------


@dataclass(frozen=True)
class IngestSummary:
    """What one ingest run did. ``to_dict`` is the ``--json`` summary."""

    accepted: int
    preset: str  # where the settings came from (a preset name or file)
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


def _check_paths(source: str | Path, bank_dir: str | Path) -> tuple[Path, Path]:
    src, bank = source_folder(source), Path(bank_dir).expanduser()
    if is_inside(bank, src):
        raise ParameterError(
            f"{bank_dir}: the bank folder must not be inside the source folder {source}")
    if bank.exists() and not bank.is_dir():
        raise BankError(f"{bank_dir}: exists and is not a folder")
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
        raise BankError(f"{index_path}: exists and is not a shotsmith bank; choose another "
                        "bank folder")
    if raw.get("audio") != audio:
        stored = raw.get("audio") if isinstance(raw.get("audio"), dict) else {}
        changed = sorted(k for k in audio if stored.get(k) != audio[k])
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


def ingest_folder(
    source: str | Path,
    bank_dir: str | Path,
    settings: Settings | None = None,
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
        Default: those of the bank already in ``bank_dir`` (its preset), else the default
        preset (see :func:`pipeline.config.choose_settings`).
    jobs : worker processes for decoding; default all available cores, 1 = in-process.
    progress : optional ``callable(done, total)`` over the audio files found.

    Raises
    ------
    ShotsmithError
        ``"no usable audio files in SOURCE (...)"`` when nothing can be used.
    """
    t0 = time.perf_counter()
    jobs = check_jobs(jobs)
    src, bank = _check_paths(source, bank_dir)
    if settings is None:
        settings, _ = choose_settings(None, stored_settings(bank))
    spec = settings.audio
    settings_dict = settings.to_dict()
    audio = settings_dict["audio"]
    scan = scan_folder(src)
    old_clips, old_skips, old, cache_note = _previous(bank, audio)

    plan = plan_decode(scan.files, old_clips, old_skips)
    reused, todo = plan.reuse, plan.decode
    skipped = [*scan.skipped, *plan.remembered]

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
        results = decode_files([f.path for f in todo], spec, jobs=jobs, dtype=spec.spectra_dtype)
        for slot, (f, (unit, info)) in enumerate(zip(todo, results)):
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

        # Row order = relative path order.
        rows = [(f, clip, lambda r=row: old.spectra[r]) for f, row, clip in reused]
        rows += [(todo[s], meta, lambda s=s: staging.get(s)) for s, meta in decoded.items()]
        rows.sort(key=lambda item: item[0].rel)
        skipped.sort(key=lambda s: s["path"])
        names = clip_names([f.rel for f, _, _ in rows])
        clips = []
        for (f, meta, _), name in zip(rows, names, strict=True):
            clips.append({
                "name": name,
                "path": f.rel,
                "category": category_of(f.rel),
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
        preset=settings.preset,
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
