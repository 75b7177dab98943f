"""Keep/reject marks: ``picks.json`` beside each manifest.

One file per output folder, written whole and atomically (temporary file, fsync,
rename) after every change, so closing the listening page loses nothing. Each
mark records the SHA-256 of the WAV it was made on: a file replaced since (a later
render with ``--overwrite``) does not inherit the old sound's mark.
"""

from __future__ import annotations

import hashlib
import json
import threading
import time
from pathlib import Path
from typing import Any

from pipeline import files
from pipeline.errors import ParameterError

PICKS_FILE = "picks.json"
PICKS_FORMAT = 1
STATES = ("keep", "reject")

_locks: dict[Path, threading.Lock] = {}
_locks_guard = threading.Lock()


def _lock_for(folder: Path) -> threading.Lock:
    key = folder.resolve()
    with _locks_guard:
        return _locks.setdefault(key, threading.Lock())


def settle(folder: str | Path) -> None:
    """Wait until no mark is being written in ``folder`` (before a process exits)."""
    with _lock_for(Path(folder)):
        pass


def file_sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _read_marks(folder: Path) -> dict[str, dict[str, Any]]:
    """The raw marks of ``folder/picks.json``; {} when there is none or it is unreadable."""
    try:
        data = json.loads((folder / PICKS_FILE).read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, ValueError):
        return {}
    if not isinstance(data, dict) or data.get("tool") != "shotsmith":
        return {}
    marks = data.get("picks")
    if not isinstance(marks, dict):
        return {}
    return {
        f: m for f, m in marks.items()
        if isinstance(f, str) and isinstance(m, dict) and m.get("state") in STATES
    }


def load_picks(folder: str | Path) -> dict[str, str]:
    """The keep/reject marks of an output folder.

    Parameters
    ----------
    folder : an output folder (holding ``manifest.json``).

    Returns
    -------
    marks : dict mapping the file name (relative to ``folder``, as in the manifest) to
        ``"keep"`` or ``"reject"``. Files without a mark are absent, and so are marks of
        files that are gone or whose content changed since they were marked.
    """
    folder = Path(folder)
    out = {}
    for name, mark in _read_marks(folder).items():
        path = folder / name
        try:
            same = path.is_file() and file_sha256(path) == mark.get("sha256")
        except OSError:
            same = False
        if same:
            out[name] = mark["state"]
    return out


def set_pick(folder: str | Path, file: str, state: str | None) -> Path:
    """Mark ``folder/file`` as ``"keep"`` or ``"reject"``, or clear its mark (``None``).

    The file is re-read under a lock before the change, so concurrent marks from
    several threads (or a second session) are all kept. Returns the picks file.

    Raises
    ------
    ParameterError
        ``state`` is not keep, reject or None, or the file does not exist.
    OutputError
        ``picks.json`` cannot be written (read-only folder, full disk).
    """
    folder = Path(folder)
    if state is not None and state not in STATES:
        raise ParameterError(f"state={state!r} must be keep, reject or None")
    path = folder / file
    with _lock_for(folder):
        marks = _read_marks(folder)
        if state is None:
            marks.pop(file, None)
        else:
            try:
                digest = file_sha256(path)
            except OSError as exc:
                raise ParameterError(f"{path}: cannot be marked ({files.reason(exc)})") from None
            stamp = time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())
            marks[file] = {"state": state, "sha256": digest, "at": stamp}
        data = {"tool": "shotsmith", "format": PICKS_FORMAT, "picks": dict(sorted(marks.items()))}
        target = folder / PICKS_FILE
        files.write_json_atomic(target, data)  # OutputError naming the file if it fails
    return target
