"""Find the audio files in a user's library folder, without ever writing to it.

The scan is recursive, follows directory symlinks but never loops (each real
folder is entered once, by ``(st_dev, st_ino)``), skips hidden entries and
macOS sidecars quietly (counted), counts non-audio files as ignored, and lists
every entry it cannot use with a reason a person understands.
"""

from __future__ import annotations

import errno
import os
import stat
import sys
from dataclasses import dataclass, field
from pathlib import Path

import soundfile as sf

from pipeline import files
from pipeline.errors import ParameterError

# Extensions of container formats libsndfile reads. MP3 only where the linked
# libsndfile has the MPEG codec (added in libsndfile 1.1.0, its CHANGELOG).
AUDIO_EXTENSIONS = frozenset(
    {".wav", ".wave", ".aif", ".aiff", ".aifc", ".flac", ".ogg", ".oga", ".opus",
     ".caf", ".w64", ".rf64", ".au", ".snd"}
    | ({".mp3"} if "MP3" in sf.available_formats() else set())
)


@dataclass(frozen=True)
class FoundFile:
    """One candidate audio file: absolute path, posix path relative to SOURCE, fingerprint."""

    path: str
    rel: str
    size: int
    mtime_ns: int


@dataclass
class ScanResult:
    files: list[FoundFile] = field(default_factory=list)
    skipped: list[dict[str, str]] = field(default_factory=list)  # [{path, reason}]
    hidden: int = 0  # dot-files, .DS_Store, AppleDouble "._*" sidecars, hidden folders
    ignored: int = 0  # files that are not audio by extension (README.txt, cover.jpg)


def display_path(rel: str) -> str:
    """``rel`` made safe for JSON: bytes that are not UTF-8 are shown as ``\\xNN``."""
    return rel.encode("utf-8", "surrogateescape").decode("utf-8", "backslashreplace")


def is_hidden(name: str) -> bool:
    """Dot-files and folders; this covers ``.DS_Store`` and AppleDouble ``._name`` sidecars."""
    return name.startswith(".")


def is_audio_name(name: str) -> bool:
    return os.path.splitext(name)[1].lower() in AUDIO_EXTENSIONS


def source_folder(source: str | Path) -> Path:
    """``source`` as a Path (``~`` expanded), or a ParameterError if it is not a folder."""
    src = Path(source).expanduser()
    if not src.is_dir():
        raise ParameterError(f"{source}: source folder not found" if not src.exists()
                             else f"{source}: SOURCE must be a folder")
    return src


def is_inside(path: str | Path, folder: str | Path) -> bool:
    """Whether ``path`` is ``folder`` or lies under it, links resolved."""
    real, top = Path(path).expanduser().resolve(), Path(folder).expanduser().resolve()
    return real == top or real.is_relative_to(top)


def scan_folder(source: str | Path) -> ScanResult:
    """Walk ``source`` and classify every entry.

    Parameters
    ----------
    source : str or Path
        An existing folder.

    Returns
    -------
    ScanResult
        ``files`` sorted by relative path; ``skipped`` entries that are audio by
        name (or folders) but cannot be used, each with a reason.
    """
    root = os.path.abspath(os.fspath(source))
    out = ScanResult()
    seen_dirs: dict[tuple[int, int], str] = {}
    seen_files: dict[tuple[int, int], str] = {}
    st = os.stat(root)
    seen_dirs[(st.st_dev, st.st_ino)] = ""
    # Depth-first with an explicit stack; each item carries the (dev, ino) of
    # its ancestors, so a link back up the tree is told apart from a second
    # link to a folder already scanned elsewhere.
    stack: list[tuple[str, str, frozenset]] = [(root, "", frozenset(seen_dirs))]
    while stack:
        folder, rel_folder, ancestors = stack.pop()
        try:
            with os.scandir(folder) as it:
                entries = sorted(it, key=lambda e: e.name)
        except OSError as exc:
            reason = f"folder not readable: {files.reason(exc).lower()}"
            out.skipped.append({"path": display_path(rel_folder + "/"), "reason": reason})
            continue
        subdirs = []
        for entry in entries:
            rel = f"{rel_folder}/{entry.name}" if rel_folder else entry.name
            shown = display_path(rel)
            if is_hidden(entry.name):
                out.hidden += 1
                continue
            try:
                est = os.stat(entry.path)  # follows symlinks
            except OSError as exc:
                if exc.errno == errno.ENAMETOOLONG:  # a folder below it would vanish silently
                    size = len(os.fsencode(entry.path))
                    out.skipped.append({"path": shown + ("/" if entry.is_dir(
                        follow_symlinks=False) else ""), "reason": f"path too long for this "
                        f"system ({size} bytes); move it higher up or shorten the names"})
                elif entry.is_symlink() or is_audio_name(entry.name):
                    reason = (
                        "symlink loop (the link points back to itself)"
                        if exc.errno == errno.ELOOP
                        else "broken symbolic link (its target is missing)"
                        if exc.errno == errno.ENOENT and entry.is_symlink()
                        else f"cannot be read: {files.reason(exc).lower()}"
                    )
                    out.skipped.append({"path": shown, "reason": reason})
                else:
                    out.ignored += 1
                continue
            key = (est.st_dev, est.st_ino)
            if stat.S_ISDIR(est.st_mode):
                if key in ancestors:
                    out.skipped.append({
                        "path": shown + "/",
                        "reason": "symlink loop (links back to an enclosing folder); not followed",
                    })
                elif key in seen_dirs:
                    out.skipped.append({
                        "path": shown + "/",
                        "reason": f"same folder as {display_path(seen_dirs[key]) or '.'}/; "
                        "scanned once",
                    })
                else:
                    seen_dirs[key] = rel
                    subdirs.append((entry.path, rel, ancestors | {key}))
                continue
            if not is_audio_name(entry.name):
                out.ignored += 1
                continue
            if not stat.S_ISREG(est.st_mode):
                reason = "not a regular file (device, pipe or socket)"
                out.skipped.append({"path": shown, "reason": reason})
                continue
            if key in seen_files:
                out.skipped.append({
                    "path": shown,
                    "reason": f"same file as {display_path(seen_files[key])} (a link); used once",
                })
                continue
            seen_files[key] = rel
            out.files.append(FoundFile(entry.path, shown, est.st_size, est.st_mtime_ns))
        stack.extend(reversed(subdirs))
    out.files.sort(key=lambda f: f.rel)
    return out


def sound_path(path: str | Path) -> str | bytes:
    """A path libsndfile can open: bytes on POSIX, so names that are not UTF-8 still work."""
    return os.fsdecode(path) if sys.platform == "win32" else os.fsencode(path)
