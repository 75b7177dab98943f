"""One decode path for ingest and resynth: what to decode, decoding it, naming the clips.

- :func:`plan_decode` (pure): a folder scan and what the previous bank holds in, the
  clips to reuse, the rejects to remember and the files to decode out;
- :func:`decode_files`: every file through the audio front end
  (:func:`pipeline.frontend.decode_file`) to its [0, 1] spectrogram, in worker
  processes, results in the files' order;
- :func:`clip_names`: the one naming rule for clips (bank names, resynth file stems).
"""

from __future__ import annotations

import os
import posixpath
import sys
from collections import Counter, deque
from collections.abc import Iterator, Mapping, Sequence
from concurrent.futures import ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass
from typing import Any

import numpy as np

from pipeline.config import AudioSpec, available_cores
from pipeline.errors import AudioError, ParameterError, ShotsmithError
from pipeline.frontend import decode_file
from pipeline.scan import FoundFile
from pipeline.spectra import clip_to_unit

Decoded = tuple[np.ndarray | None, Any]  # (unit spectrogram, metadata) or (None, reason)


@dataclass(frozen=True)
class DecodePlan:
    """What a run does with each file a scan found."""

    reuse: list[tuple[FoundFile, int, dict[str, Any]]]  # (file, row in the old bank, its entry)
    remembered: list[dict[str, Any]]  # the previous run's reasons for unchanged rejects
    decode: list[FoundFile]  # new or changed files, in scan order


def plan_decode(
    files: Sequence[FoundFile],
    previous_clips: Mapping[str, tuple[int, dict[str, Any]]] | None = None,
    previous_skips: Mapping[str, dict[str, Any]] | None = None,
) -> DecodePlan:
    """Split ``files`` into clips to reuse, rejects to remember and files to decode.

    A file is unchanged when its size and modification time (``size``, ``mtime_ns``)
    equal those recorded for its relative path in the previous bank
    (``previous_clips``: ``{rel: (row, index entry)}``) or among its rejects
    (``previous_skips``: ``{rel: report entry}``). With neither, everything is decoded.
    """
    clips, skips = previous_clips or {}, previous_skips or {}
    reuse, remembered, decode = [], [], []
    for f in files:
        fingerprint = (f.size, f.mtime_ns)
        old = clips.get(f.rel)
        skip = skips.get(f.rel)
        if old and (old[1].get("size"), old[1].get("mtime_ns")) == fingerprint:
            reuse.append((f, *old))
        elif skip and (skip.get("size"), skip.get("mtime_ns")) == fingerprint:
            remembered.append(dict(skip))
        else:
            decode.append(f)
    return DecodePlan(reuse, remembered, decode)


def clip_names(rels: Sequence[str]) -> list[str]:
    """A short unique name per relative path: the one rule for bank clips and resynth files.

    The file stem (``kick``); where stems collide, the relative path without its
    extension (``a/kick``, ``b/kick``); where those collide too, the whole relative
    path (``c/kick.wav``, ``c/kick.flac``). A file name made from it replaces the
    ``/`` (:func:`pipeline.render.safe_name`).
    """
    stems = [posixpath.splitext(posixpath.basename(r))[0] for r in rels]
    counts = Counter(stems)
    names = [posixpath.splitext(r)[0] if counts[s] > 1 else s for r, s in zip(rels, stems)]
    counts = Counter(names)
    return [r if counts[n] > 1 else n for r, n in zip(rels, names)]


def category_of(rel: str) -> str | None:
    """The first folder below SOURCE that holds the file (``snares/acoustic/x.wav``: snares)."""
    parts = rel.split("/")
    return parts[0] if len(parts) > 1 else None


def decode_one(task: tuple[str, AudioSpec, str]) -> Decoded:
    """Worker: ``(unit spectrogram as dtype, metadata)`` or ``(None, reason)``; never raises
    for one bad file."""
    path, spec, dtype = task
    try:
        clip, meta = decode_file(path, spec)
    except AudioError as exc:
        return None, str(exc)
    except Exception as exc:  # noqa: BLE001 - one odd file must not end the whole run
        return None, f"could not be decoded ({type(exc).__name__}: {exc})"[:200]
    return clip_to_unit(clip, spec).astype(dtype, copy=False), meta


def die_with_parent(parent: int) -> None:
    """Worker initializer: end this process when the one that started it ends.

    A killed ingest (SIGKILL runs no clean-up) must not leave its decoders running for
    ever, holding the caller's stdout. On Linux the kernel sends SIGKILL when the parent
    exits (``prctl(PR_SET_PDEATHSIG)``); everywhere, a daemon thread exits once the
    process is handed to another parent (forkserver workers: when the forkserver, which
    ends with its starter, goes).
    """
    import signal
    import threading
    import time

    if sys.platform.startswith("linux"):
        import ctypes

        try:
            ctypes.CDLL(None, use_errno=True).prctl(1, int(signal.SIGKILL))  # PR_SET_PDEATHSIG
        except (OSError, AttributeError):  # pragma: no cover - no prctl in this libc
            pass
    start = os.getppid()
    if start != parent and not _is_alive(parent):
        os._exit(1)  # the parent ended before the signal was armed

    def watch() -> None:
        while os.getppid() == start:
            time.sleep(0.5)
        os._exit(1)

    threading.Thread(target=watch, name="die-with-parent", daemon=True).start()


def _is_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # pragma: no cover - someone else's process took the pid
        return True
    return True


def _pool(jobs: int) -> ProcessPoolExecutor:
    import multiprocessing as mp

    # fork starts workers with the modules already imported (importing numpy,
    # scipy and soundfile costs ~0.5 s per spawned process) and is safe while
    # the process runs no native thread pools; once a caller has loaded torch
    # (which has them), use a clean forkserver instead.
    if sys.platform.startswith("linux") and "torch" not in sys.modules:
        ctx = mp.get_context("fork")
    elif "forkserver" in mp.get_all_start_methods():
        ctx = mp.get_context("forkserver")
        ctx.set_forkserver_preload(["pipeline.decode"])
    else:
        ctx = None  # spawn, the platform default
    return ProcessPoolExecutor(max_workers=jobs, mp_context=ctx, initializer=die_with_parent,
                               initargs=(os.getpid(),))


MAX_JOBS = 256


def check_jobs(jobs: int | None) -> int:
    """Decoder processes: ``None`` is every core this process may use; at least 1."""
    jobs = available_cores() if jobs is None else jobs
    if isinstance(jobs, bool) or not isinstance(jobs, int) or jobs < 1:
        raise ParameterError(f"jobs={jobs!r} must be at least 1")
    if jobs > MAX_JOBS:  # one process per file of a large folder would swamp the machine
        raise ParameterError(f"jobs={jobs} must be at most {MAX_JOBS}")
    return jobs


def decode_files(
    paths: Sequence[str], spec: AudioSpec, *, jobs: int | None = None, dtype: str = "float32",
    ahead: int | None = None,
) -> Iterator[Decoded]:
    """:func:`decode_one` of each path, yielded in the order of ``paths``.

    With ``jobs > 1`` (default: every available core) the files are decoded in that many
    worker processes, at most ``ahead`` (default ``4 * jobs``) results ahead of the
    consumer, so memory stays bounded on a huge folder. Close the iterator to stop early.

    Raises
    ------
    ParameterError
        ``jobs`` below 1 (at once, not on the first result).
    ShotsmithError
        A worker process died (the message says how to find the file that caused it).
    """
    jobs = min(check_jobs(jobs), max(len(paths), 1))
    tasks = [(p, spec, dtype) for p in paths]
    if jobs == 1:
        return (decode_one(task) for task in tasks)
    return _in_pool(tasks, jobs, ahead or 4 * jobs)


def _in_pool(tasks: list[tuple[str, AudioSpec, str]], jobs: int, ahead: int) -> Iterator[Decoded]:
    pool = _pool(jobs)
    pending: deque = deque()
    try:
        for task in tasks:
            pending.append(pool.submit(decode_one, task))
            if len(pending) >= ahead:
                yield pending.popleft().result()
        while pending:
            yield pending.popleft().result()
    except BrokenProcessPool:
        raise ShotsmithError(
            "a decoder process crashed; re-run with --jobs 1 to find the file that causes it"
        ) from None
    finally:
        pool.shutdown(wait=True, cancel_futures=True)
