"""Writing files safely: the one place for atomic and no-clobber writes and OSError reasons.

Every file the tool writes goes through here.

- :func:`write_temp` writes bytes under a hidden temporary name in the destination's own
  folder and fsyncs them; :func:`commit` then renames it over the destination
  (``overwrite=True``) or hard-links it to a name that must not exist yet
  (``overwrite=False``: ``os.link`` fails if the name appeared meanwhile, so nothing is
  ever clobbered). :func:`write_atomic` is the two in one. A process killed at any moment
  leaves the previous file or the new one at the destination, never a part of one.
- Temporary names are ``.NAME.tmp-PID-XXXXXX``: :func:`remove_stale_temporaries` deletes
  those whose process no longer exists (a run killed while writing).
- :func:`reason` is the one translation of an ``OSError`` into words (``No space left on
  device``, ``permission denied``); :func:`cannot_write` the one error built from it.

Files are created with mode 0o666 less the process umask, as ``open()`` does, so outputs
get the folder's usual permissions (``tempfile.mkstemp`` would give 0600).
"""

from __future__ import annotations

import json
import os
import re
import secrets
from collections.abc import Callable, Collection, Iterable
from pathlib import Path
from typing import Any

from pipeline.errors import OutputError

_TEMP = re.compile(r"^\.(?P<name>.+)\.tmp-(?P<pid>\d+)(?:-[0-9a-f]+)?$", re.S)
_TEMP_NAME_BYTES = 200  # the name part of a temporary name: 255-byte limit, room for the rest


def reason(exc: BaseException) -> str:
    """Why an operating-system call failed, in the system's own words.

    ``PermissionError`` reads ``permission denied``; any other ``OSError`` its
    ``strerror`` (``No space left on device``, ``File name too long``...).
    """
    if isinstance(exc, PermissionError):
        return "permission denied"
    if isinstance(exc, OSError) and exc.strerror:
        return str(exc.strerror)
    return str(exc) or type(exc).__name__


def cannot_write(path: str | Path, exc: BaseException) -> OutputError:
    """``OutputError('<path>: cannot write (<reason>)')``."""
    return OutputError(f"{path}: cannot write ({reason(exc)})")


def already_exists(path: str | Path) -> OutputError:
    return OutputError(f"{path}: already exists; pass --overwrite to replace it")


def _short(name: str) -> str:
    b = os.fsencode(name)
    return os.fsdecode(b[:_TEMP_NAME_BYTES]) if len(b) > _TEMP_NAME_BYTES else name


def temp_path(path: str | Path) -> Path:
    """A fresh hidden temporary name beside ``path`` that names this process."""
    path = Path(path)
    return path.with_name(f".{_short(path.name)}.tmp-{os.getpid()}-{secrets.token_hex(3)}")


def _write_all(fd: int, data: bytes | memoryview) -> None:
    view = memoryview(data).cast("B")
    while view:
        view = view[os.write(fd, view) :]


def write_temp(path: str | Path, data: bytes | memoryview | Iterable[bytes], *,
               sync: bool = True) -> Path:
    """Write ``data`` (bytes, or an iterable of chunks: a file streamed as it is made) to
    a new temporary file beside ``path``; the caller commits it.

    Raises :class:`OutputError` naming ``path`` (and removes the temporary) when it
    cannot be written: a full disk, a read-only folder, a name too long.
    """
    path = Path(path)
    tmp = temp_path(path)
    try:
        fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_BINARY", 0),
                     0o666)
    except OSError as exc:
        raise cannot_write(path, exc) from None
    try:
        try:
            for chunk in (data,) if isinstance(data, (bytes, bytearray, memoryview)) else data:
                _write_all(fd, chunk)
            if sync:
                os.fsync(fd)
        finally:
            os.close(fd)
    except BaseException as exc:
        tmp.unlink(missing_ok=True)
        if isinstance(exc, OSError):
            raise cannot_write(path, exc) from None
        raise
    return tmp


def sync_folder(folder: str | Path) -> None:
    """Make renames in ``folder`` durable (where the system allows opening a folder)."""
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def commit(tmp: str | Path, path: str | Path, *, overwrite: bool = True,
           sync: bool = True) -> Path:
    """Move the temporary ``tmp`` to ``path``; the temporary is gone afterwards either way.

    With ``overwrite=False`` an existing ``path`` is an :class:`OutputError` (the hard
    link is refused by the system itself, so a file that appears meanwhile is kept too).
    """
    tmp, path = Path(tmp), Path(path)
    try:
        if overwrite:
            os.replace(tmp, path)
        else:
            try:
                os.link(tmp, path)
            except FileExistsError:
                raise already_exists(path) from None
            except OSError:  # no hard links on this file system (or no room for the entry)
                if os.path.lexists(path):
                    raise already_exists(path) from None
                os.replace(tmp, path)
    except OSError as exc:
        raise cannot_write(path, exc) from None
    finally:
        tmp.unlink(missing_ok=True)
    if sync:
        sync_folder(path.parent)
    return path


def write_atomic(path: str | Path, data: bytes | memoryview, *, overwrite: bool = True,
                 sync: bool = True) -> Path:
    """Write ``data`` to ``path`` whole or not at all (see the module notes)."""
    return commit(write_temp(path, data, sync=sync), path, overwrite=overwrite, sync=sync)


def json_bytes(data: Any, *, indent: int | None = 2) -> bytes:
    """UTF-8 JSON; strict (no NaN). A path that is not UTF-8 (POSIX bytes, held as lone
    surrogates) becomes a ``\\udcXX`` escape, which ``json.loads`` turns back into it."""
    text = json.dumps(data, indent=indent, ensure_ascii=False, allow_nan=False)
    return (text + "\n").encode("utf-8", "backslashreplace")


def write_json_atomic(path: str | Path, data: Any, *, overwrite: bool = True) -> Path:
    """:func:`write_atomic` of :func:`json_bytes`."""
    return write_atomic(path, json_bytes(data), overwrite=overwrite)


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (OSError, OverflowError, ValueError):  # another user's process, or not a pid
        return True
    return True


def remove_stale_temporaries(
    folder: str | Path, names: Collection[str] | Callable[[str], bool] | None = None
) -> list[Path]:
    """Delete the temporaries that killed processes left in ``folder``.

    Only hidden files named as :func:`temp_path` names them, whose process no longer
    exists, are removed; with ``names`` (destination file names, or a test of one), only
    the temporaries of those destinations.
    """
    folder = Path(folder)
    if names is not None and not callable(names):
        wanted = {_short(n) for n in names}
        names = wanted.__contains__
    removed = []
    try:
        entries = list(os.scandir(folder))
    except OSError:
        return removed
    for entry in entries:
        m = _TEMP.match(entry.name)
        if not m or (names is not None and not names(m["name"])) or _alive(int(m["pid"])):
            continue
        try:
            if entry.is_file(follow_symlinks=False):
                os.unlink(entry.path)
                removed.append(Path(entry.path))
        except OSError:
            pass
    return sorted(removed)
