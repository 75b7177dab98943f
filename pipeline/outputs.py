"""Output folders: safe unique names, tagged WAV files, the manifest, where outputs may go.

:class:`OutputFolder` is the writer every command that writes audio uses: it creates and
checks the folder, takes it for one run (a second run into the same folder at the same
time is refused), removes what killed runs left, hands out names, writes each WAV whole
(with RIFF INFO tags) and keeps the manifest (:mod:`pipeline.manifest`) exact at every
moment. :func:`refuse_library` keeps outputs out of the library a bank was made from.
"""

from __future__ import annotations

import hashlib
import io
import os
import re
import unicodedata
from collections.abc import Iterable
from pathlib import Path
from typing import Any

import numpy as np
import soundfile as sf

from pipeline import __version__, files, manifest
from pipeline.errors import AudioError, OutputError, ParameterError

SUBTYPES = {"16": "PCM_16", "24": "PCM_24", "32f": "FLOAT"}
NAME_MAX_BYTES = 120  # well under the 255-byte limit of common file systems, room for a suffix
LABEL_MAX_BYTES = 100  # the label part of a name; the rest holds a step or count suffix
TAG_MAX_CHARS = 1000
_RESERVED = re.compile(r"^(con|prn|aux|nul|com[0-9]|lpt[0-9])(\..*)?$", re.IGNORECASE)  # Windows
_UNSAFE = re.compile(r'[/\\:*?"<>|]')


# --- names ---------------------------------------------------------------------------------


def _cut(text: str, max_bytes: int) -> str:
    return text.encode("utf-8")[:max_bytes].decode("utf-8", "ignore").rstrip(". ")


def safe_name(text: str, *, max_bytes: int = NAME_MAX_BYTES) -> str:
    """A file stem from user text that cannot leave its folder.

    Unicode letters are kept (NFC); control characters are removed; path separators,
    characters Windows forbids and runs of dots become ``_``; leading dots and
    trailing dots/spaces are dropped; reserved device names (CON, NUL, COM1...) get a
    ``_`` prefix; the result is cut to ``max_bytes`` of UTF-8. Empty text gives ``sound``.
    """
    s = unicodedata.normalize("NFC", str(text))
    s = "".join(ch for ch in s if unicodedata.category(ch) not in ("Cc", "Cf", "Cs", "Co"))
    s = _UNSAFE.sub("_", s)
    s = re.sub(r"\.{2,}", "_", s)
    s = re.sub(r"\s+", " ", s).strip().lstrip(".").rstrip(". ")
    if _RESERVED.match(s):
        s = "_" + s
    return _cut(s, max_bytes) or "sound"


def label_stem(label: str, *, max_bytes: int = LABEL_MAX_BYTES) -> str:
    """:func:`safe_name` of ``label``, whole when it fits in ``max_bytes``; else cut, with
    ``~`` and 8 hex digits of the SHA-256 of the whole label, so different long labels
    keep different names."""
    whole = safe_name(label, max_bytes=1 << 16)
    if len(whole.encode("utf-8")) <= max_bytes:
        return whole
    digest = hashlib.sha256(str(label).encode("utf-8", "surrogatepass")).hexdigest()[:8]
    return f"{_cut(whole, max_bytes - 9)}~{digest}"


def next_number(folder: str | Path, label: str) -> int:
    """One past the highest ``N`` of the files ``<label>-N.wav`` in ``folder`` (0 if none):
    where a new batch of numbered sounds starts, after the ones already there."""
    pattern = re.compile(rf"^{re.escape(label_stem(label))}-(\d+)(?:-\d+)?\.wav$", re.IGNORECASE)
    try:
        names = os.listdir(folder)
    except OSError:
        return 0
    return max((int(m[1]) + 1 for m in map(pattern.match, names) if m), default=0)


def numbered(start: int, count: int, *, width: int) -> list[str]:
    """Suffixes ``-0016``, ``-0017``... wide enough that names sort in number order."""
    width = max(width, len(str(max(start + count - 1, 0))))
    return [f"-{k:0{width}d}" for k in range(start, start + count)]


# --- WAV files ---------------------------------------------------------------------------


def _tag_text(value: Any) -> str:
    s = "".join(ch for ch in str(value) if unicodedata.category(ch) != "Cc")
    return s.encode("utf-8", "backslashreplace").decode("utf-8")[:TAG_MAX_CHARS]


def wav_tags(name: str, entry: dict[str, Any], model: dict[str, Any] | None) -> dict[str, str]:
    """RIFF INFO tags of one output: software, title (the file stem) and a comment with the
    kind, seed, sources and the model's SHA-256 prefix, so a file dragged out of its folder
    still says how it was made."""
    sources = entry.get("sources") or []
    sha = (model or {}).get("sha256")
    comment = "; ".join([
        f"kind={entry.get('kind')}",
        f"seed={entry.get('seed')}",
        "sources=" + (", ".join(str(s) for s in sources) if sources else "none"),
        f"model=sha256:{sha[:12]}" if sha else "model=none",
    ])
    return {"software": f"shotsmith {__version__}", "title": Path(name).stem, "comment": comment}


def wav_bytes(y: np.ndarray, sr: int, *, bit_depth: str = "24",
              tags: dict[str, str] | None = None) -> bytes:
    """A whole WAV file in memory (libsndfile via soundfile), with RIFF INFO ``tags``.

    ``y`` must lie on the bit depth's grid (see :func:`pipeline.finish.finish_audio`): PCM
    samples are written as exact integer codes, so what was measured is what is on disk.
    """
    if bit_depth not in SUBTYPES:
        raise ParameterError(f"bit_depth={bit_depth!r} must be one of {', '.join(SUBTYPES)}")
    y = np.asarray(y)
    if not np.all(np.isfinite(y)):
        raise AudioError("non-finite samples (NaN or Inf); not written")
    if bit_depth == "16":
        data = np.clip(np.rint(y * 32768.0), -32768, 32767).astype(np.int16)
    elif bit_depth == "24":  # libsndfile takes the top 24 bits of an int32
        data = np.clip(np.rint(y * 2.0**23), -(2**23), 2**23 - 1).astype(np.int32) << 8
    else:
        data = y.astype(np.float32)
    buf = io.BytesIO()
    channels = 1 if data.ndim == 1 else data.shape[1]
    with sf.SoundFile(buf, "w", samplerate=int(sr), channels=channels, format="WAV",
                      subtype=SUBTYPES[bit_depth]) as fh:
        for key, value in (tags or {}).items():  # before the samples: the header holds them
            setattr(fh, key, _tag_text(value))
        fh.write(data)
    return buf.getvalue()


def write_wav(path: str | Path, y: np.ndarray, sr: int, *, bit_depth: str = "24",
              overwrite: bool = False, tags: dict[str, str] | None = None) -> Path:
    """Write ``y`` as a WAV file, whole or not at all; an existing file is kept
    (``OutputError``) unless ``overwrite``."""
    path = Path(path)
    if not overwrite and os.path.lexists(path):
        raise files.already_exists(path)
    try:
        data = wav_bytes(y, sr, bit_depth=bit_depth, tags=tags)
    except AudioError as exc:
        raise AudioError(f"{path.name}: {exc}") from None
    return files.write_atomic(path, data, overwrite=overwrite)


# --- the output folder -------------------------------------------------------------------

_LOCKS: set[int] = set()


def _close_locks_in_child() -> None:
    # A forked worker must not keep the folder taken after its parent is gone.
    for fd in list(_LOCKS):
        try:
            os.close(fd)
        except OSError:
            pass
    _LOCKS.clear()


if hasattr(os, "register_at_fork"):
    os.register_at_fork(after_in_child=_close_locks_in_child)


def _take(folder: Path) -> int | None:
    """An exclusive lock on the folder for this run (``flock``), or None where unsupported."""
    try:
        import fcntl
    except ImportError:  # Windows
        return None
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return None
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        os.close(fd)
        raise OutputError(f"{folder}: another shotsmith run is writing into this folder; "
                          "wait for it to finish, or choose another --out") from None
    except OSError:  # a file system without locks
        os.close(fd)
        return None
    _LOCKS.add(fd)
    return fd


def _ours(name: str) -> bool:
    """A destination this writer writes: WAVs, the manifest, the writability probe."""
    return name.lower().endswith(".wav") or name in (manifest.MANIFEST_FILE, "probe")


class OutputFolder:
    """One run's writer for an output folder of WAVs and their manifest.

    Opening it creates the folder, checks that it is writable, takes it for this run,
    removes temporaries of killed runs and folds a killed run's manifest log. Each
    :meth:`write` puts the item in the log before its WAV reaches its name, so the
    manifest never lists a file that is not there, nor misses one that is; :meth:`close`
    folds the log into ``manifest.json``. Earlier runs' items stay in the manifest (files
    replaced with ``overwrite`` are described by the run that replaced them).
    Set ``header`` (the run's ``model``, ``settings``, ``request``...) before writing.
    """

    def __init__(self, path: str | Path, *, overwrite: bool = False) -> None:
        self.path = Path(path).expanduser()
        self.overwrite = overwrite
        self.items: list[dict[str, Any]] = []
        self.failed: list[dict[str, Any]] = []
        self.header: dict[str, Any] = {}
        self._taken: set[str] = set()
        self._log: manifest.ManifestLog | None = None
        self._logged_failed = 0
        self._listed: dict[str, int] = {}
        self._replace = False  # an unreadable or foreign manifest.json is being replaced
        if self.path.exists() and not self.path.is_dir():
            raise OutputError(f"{self.path}: exists and is not a folder")
        try:
            self.path.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            why = files.reason(exc)
            raise OutputError(f"{self.path}: cannot create the output folder ({why})") from None
        probe = files.temp_path(self.path / "probe")
        try:
            os.close(os.open(probe, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666))
            os.unlink(probe)
        except OSError as exc:
            why = files.reason(exc)
            raise OutputError(f"{self.path}: output folder is not writable ({why})") from None
        self._lock = _take(self.path)
        try:
            files.remove_stale_temporaries(self.path, _ours)
            self.run = self._open_manifest()
        except BaseException:
            self._release()
            raise

    def _open_manifest(self) -> int:
        try:
            existing = manifest.merge(self.path)
        except OutputError as exc:
            if not self.overwrite:
                raise OutputError(f"{exc}; pass --overwrite to replace it, "
                                  "or choose another --out") from None
            existing, self._replace = None, True
        if (self.path / manifest.LOG_FILE).exists():  # a killed run's log: fold it first
            existing = manifest.fold(self.path, ignore_existing=self._replace)
            self._replace = False
        return 1 + max((r["run"] for r in (existing or {}).get("runs", [])), default=0)

    def claim(self, stems: Iterable[str], suffixes: Iterable[str] | None = None) -> list[str]:
        """Unique safe names ``<stem><suffix>.wav`` (the stem is cut, never the suffix);
        an existing file is an OutputError unless ``overwrite``."""
        stems = list(stems)
        suffixes = [""] * len(stems) if suffixes is None else list(suffixes)
        names = []
        for stem, suffix in zip(stems, suffixes, strict=True):
            base = label_stem(stem) + (safe_name(suffix) if suffix else "")
            name, k = f"{base}.wav", 1
            while name.casefold() in self._taken:  # case-insensitive file systems (macOS)
                k += 1
                name = f"{base}-{k}.wav"
            if not self.overwrite and os.path.lexists(self.path / name):
                raise files.already_exists(self.path / name)
            self._taken.add(name.casefold())
            names.append(name)
        return names

    def _begin(self) -> manifest.ManifestLog:
        if self._log is None:
            log = manifest.ManifestLog(self.path, self.run)
            try:
                log.append(start={"version": __version__, "started": manifest.now(),
                                  "model": None, **self.header})
            except BaseException:
                log.close()
                raise
            self._log = log
            self._listed = {k: len(v) for k, v in self.header.items() if isinstance(v, list)}
        return self._log

    def write(self, name: str, y: np.ndarray, sr: int, bit_depth: str,
              entry: dict[str, Any]) -> None:
        """Write one WAV named by :meth:`claim` and record it (``entry``: its metadata)."""
        path = self.path / name
        try:
            data = wav_bytes(y, sr, bit_depth=bit_depth,
                             tags=wav_tags(name, entry, self.header.get("model")))
        except AudioError as exc:
            raise AudioError(f"{path.name}: {exc}") from None
        tmp = files.write_temp(path, data)
        try:
            log = self._begin()
            if self.overwrite and os.path.lexists(path):
                try:  # gone before the new item is logged: a kill between never mislabels it
                    os.unlink(path)
                except OSError as exc:
                    raise files.cannot_write(path, exc) from None
            log.append(item={"file": name, **entry})
            files.commit(tmp, path, overwrite=self.overwrite, sync=False)
        finally:
            tmp.unlink(missing_ok=True)
        self.items.append({"file": name, **entry})

    def flush(self) -> None:
        """After a batch: log new failures and additions to the header's lists, then make
        the batch durable (fsync of the log and the folder)."""
        log = self._begin()
        for f in self.failed[self._logged_failed :]:
            log.append(failed=f)
        self._logged_failed = len(self.failed)
        more = {k: v[self._listed.get(k, 0) :] for k, v in self.header.items()
                if isinstance(v, list) and len(v) > self._listed.get(k, 0)}
        if more:
            log.append(extend=more)
            self._listed |= {k: len(self.header[k]) for k in more}
        log.sync()
        files.sync_folder(self.path)

    def close(self, *, complete: bool) -> None:
        """End the run: fold the log into ``manifest.json``. A run that wrote nothing and
        did not finish leaves the folder as it was. When the run did not finish, a fold
        that fails (a full disk) leaves the log, which :func:`manifest.load_manifest` reads."""
        try:
            if complete or self._log is not None or self.items or self.failed:
                try:
                    self.flush()
                    if complete:
                        self._log.append(end={"complete": True})
                    self._log.close()
                    manifest.fold(self.path, ignore_existing=self._replace)
                except OutputError:
                    if complete:
                        raise
        finally:
            if self._log is not None:
                self._log.close()
            self._release()

    def _release(self) -> None:
        if self._lock is not None:
            _LOCKS.discard(self._lock)
            os.close(self._lock)
            self._lock = None

    def __enter__(self) -> OutputFolder:
        return self

    def __exit__(self, kind, value, tb) -> None:
        self.close(complete=kind is None)


# --- where outputs may go ----------------------------------------------------------------


def _same_or_inside(path: Path, folder: Path) -> bool:
    """``path`` is ``folder`` or below it, through symlinks, ``..`` and letter case."""
    try:
        st = folder.stat()
    except OSError:  # the library is gone: nothing left to protect
        return False
    key = (st.st_dev, st.st_ino)
    path = path.expanduser()
    for chain in (Path(os.path.abspath(path)), path.resolve()):
        for q in (chain, *chain.parents):
            try:
                s = q.stat()
            except OSError:
                continue
            if (s.st_dev, s.st_ino) == key:
                return True
    return False


def refuse_library(path: str | Path, *, option: str, model: Any = None,
                   banks: Iterable[str | Path] = ()) -> None:
    """Refuse an output ``path`` inside a library the tool knows of: the source folder of
    each bank in ``banks`` and of the bank ``model`` (a loaded model file) was trained on.
    The next ingest of that library would take the outputs for library sounds."""
    from pipeline.bank import source_folder

    banks = [Path(b) for b in banks]
    bank_of_model = ((getattr(model, "bank", None) or {}).get("path")) if model else None
    if isinstance(bank_of_model, str) and bank_of_model:
        banks.append(Path(bank_of_model))
    for bank in banks:
        src = source_folder(bank)
        if src is not None and _same_or_inside(Path(path), src):
            raise OutputError(f"{path}: {option} must not be inside the library {src} (the "
                              f"source of bank {bank}): the next ingest would take what is "
                              "written there for library sounds")
