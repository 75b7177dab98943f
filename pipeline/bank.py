"""The bank: the on-disk feature cache that ingest writes and training reads.

A bank is a folder:

- ``spectra.npy``: ``(N, bins, frames)`` [0, 1] log-magnitude spectrograms
  (float16 or float32), memory-mapped on read;
- ``index.json``: the format version, the audio spec, the resolved settings, the clip
  count and the name of the clip table;
- ``clips-<digest>.jsonl``: the clip table (:mod:`pipeline.cliptable`), one line per clip
  in row order: its name, relative source path, category, original sample rate,
  channels, duration, peak dBFS and a size + mtime fingerprint. The name holds the first
  16 hex digits of the file's SHA-256, so a new table never replaces the one the
  current index names (format 2 held the clips in ``index.json``; still read);
- ``ingest-report.json``: what was accepted, skipped and ignored, and why.

Writes go to temporary names first and are renamed into place (the clip table, the
spectra, then the index that names the table), so an interrupted ingest leaves the
previous bank readable.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from pipeline import files
from pipeline.cliptable import ClipTable, damaged, read_clip_lines
from pipeline.config import AudioSpec, Settings, settings_from_dict, spec_from_dict
from pipeline.errors import BankError, PresetError

BANK_FORMAT = 3  # 2: spectra analysed after AudioSpec.analysis_pad of silence; 3: clips.jsonl
OLDEST_READ = 2  # format 2 (clips inside index.json) has the same spectra: still opened
SPECTRA_FILE = "spectra.npy"
INDEX_FILE = "index.json"
CLIPS_FILE = "clips.jsonl"  # the clip table's temporary; committed as clips-<digest>.jsonl
REPORT_FILE = "ingest-report.json"
STAGING_FILE = "ingest-staging.npy"  # decoded rows while an ingest runs (a temporary)
BANK_FILES = (SPECTRA_FILE, INDEX_FILE, CLIPS_FILE, REPORT_FILE, STAGING_FILE)
_TABLE_NAME = re.compile(r"clips-[0-9a-f]{16}\.jsonl")


@dataclass
class Bank:
    """An opened bank. ``spectra`` is a read-only memory map; ``clips`` the clip table
    (columns, and a sequence of per-clip dicts built on demand)."""

    path: Path
    audio: AudioSpec
    settings: dict[str, Any]
    clips: ClipTable
    spectra: np.ndarray = field(repr=False)

    def __len__(self) -> int:
        return len(self.clips)

    @property
    def names(self) -> list[str]:
        return list(self.clips.names)

    @property
    def paths(self) -> list[str]:
        """Each clip's path relative to the library folder, in row order."""
        return list(self.clips.paths)

    @property
    def categories_per_clip(self) -> list[str | None]:
        """Each clip's category in row order (``None``: directly in SOURCE)."""
        return list(self.clips.categories)

    def fingerprint(self) -> str:
        """SHA-256 of the clip names and every spectrum: two banks whose clips share names
        but not sounds differ here (read once in chunks, about a second per gigabyte).

        Raises :class:`BankError` naming the clip if a spectrum holds NaN or infinite
        values (a damaged file: training would only say that its loss became non-finite).
        """
        h = hashlib.sha256("\n".join(self.clips.names).encode("utf-8") + b"\0")
        h.update(f"{self.spectra.dtype.str}{tuple(self.spectra.shape)}".encode())
        step = max(1, (64 << 20) // max(1, self.spectra[:1].nbytes))
        for i in range(0, len(self.spectra), step):
            chunk = np.ascontiguousarray(self.spectra[i : i + step])
            bad = np.flatnonzero(~np.isfinite(chunk.reshape(len(chunk), -1)).all(axis=1))
            if bad.size:
                raise BankError(f"{self.path / SPECTRA_FILE}: clip {self.clips.names[i + bad[0]]} "
                                "holds NaN or infinite values (a damaged file; delete the bank "
                                "and ingest again)")
            h.update(chunk.tobytes())
        return h.hexdigest()

    @property
    def categories(self) -> list[str]:
        """Sorted category names; clips directly in SOURCE have category ``None``."""
        return sorted({c for c in self.clips.categories if c})


def read_json(path: Path, what: str) -> Any:
    try:
        return json.loads(Path(path).read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise BankError(f"{path}: {what} not found") from None
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise BankError(f"{path}: {what} is unreadable ({exc})") from None


class RowFile:
    """A ``.npy`` file of ``shape[0]`` equal rows, written and read with ``pwrite``/``pread``.

    Never memory-mapped: pages written through a map stay resident (and dirty) in the
    writing process, so a 20,000-clip bank would add its whole size to the process's peak
    memory; plain writes leave them to the page cache. A full disk is an ``OSError``
    (ENOSPC) at the write, where a map would raise SIGBUS.
    """

    def __init__(self, path: Path, dtype: np.dtype | str, shape: tuple[int, ...]) -> None:
        self.path = Path(path)
        self.dtype = np.dtype(dtype)
        self.shape = tuple(int(n) for n in shape)
        self.row_shape = self.shape[1:]
        self.row_bytes = self.dtype.itemsize * int(np.prod(self.row_shape, dtype=np.int64))
        header = {"descr": np.lib.format.dtype_to_descr(self.dtype), "fortran_order": False,
                  "shape": self.shape}
        self._fd: int | None = None
        try:
            with open(self.path, "wb") as fh:
                np.lib.format.write_array_header_1_0(fh, header)
                self.offset = fh.tell()
                fh.truncate(self.offset + self.shape[0] * self.row_bytes)
            self._fd = os.open(self.path, os.O_RDWR)
        except OSError as exc:
            raise files.cannot_write(self.path.parent, exc) from None

    def put(self, row: int, unit: np.ndarray) -> None:
        data = np.ascontiguousarray(unit, dtype=self.dtype)
        if data.shape != self.row_shape or not 0 <= row < self.shape[0]:
            raise ValueError(f"row {row} of shape {data.shape} does not fit {self.shape}")
        view, at = memoryview(data).cast("B"), self.offset + row * self.row_bytes
        try:
            while view:
                n = os.pwrite(self._fd, view, at)
                view, at = view[n:], at + n
        except OSError as exc:
            raise files.cannot_write(self.path.parent, exc) from None

    def get(self, row: int) -> np.ndarray:
        buf = os.pread(self._fd, self.row_bytes, self.offset + row * self.row_bytes)
        return np.frombuffer(buf, dtype=self.dtype).reshape(self.row_shape)

    def close(self, *, sync: bool = False) -> None:
        if self._fd is not None:
            try:
                if sync:
                    os.fsync(self._fd)
            except OSError as exc:
                raise files.cannot_write(self.path.parent, exc) from None
            finally:
                os.close(self._fd)
                self._fd = None


class BankWriter:
    """Stream rows into a new ``spectra.npy`` and commit it with its index.

    >>> w = BankWriter(bank_dir, spec, n_clips)   # doctest: +SKIP
    >>> w.put(0, unit_spectrogram)                # any order, each row once
    >>> w.commit(clips, settings, report)         # clips: dicts or a ClipTable
    """

    def __init__(self, path: Path, audio: AudioSpec, n_clips: int) -> None:
        self.path = Path(path)
        self.audio = audio
        self.path.mkdir(parents=True, exist_ok=True)
        self._tmp = files.temp_path(self.path / SPECTRA_FILE)
        shape = (n_clips, audio.n_bins, audio.n_frames)
        self._rows = RowFile(self._tmp, audio.spectra_dtype, shape)

    def put(self, row: int, unit: np.ndarray) -> None:
        self._rows.put(row, unit)

    def commit(
        self, clips: Sequence[dict[str, Any]] | ClipTable, settings: dict[str, Any],
        report: dict[str, Any]
    ) -> None:
        if len(clips) != self._rows.shape[0]:
            raise ValueError("one index entry per spectra row is required")
        if not isinstance(clips, ClipTable):
            clips = ClipTable.from_records(clips, "the clips given to BankWriter")
        self._rows.close(sync=True)
        # Everything that can fail for lack of space is written before the first rename, so
        # a full disk leaves the previous spectra, clip table and index together.
        digest = hashlib.sha256()
        table_tmp = files.write_temp(self.path / CLIPS_FILE, _hashed(clips.lines(), digest))
        table = self.path / f"clips-{digest.hexdigest()[:16]}.jsonl"
        index = {
            "format": BANK_FORMAT,
            "tool": "shotsmith",
            "source": report.get("source"),
            "audio": settings["audio"],
            "settings": settings,
            "shape": [len(clips), self.audio.n_bins, self.audio.n_frames],
            "clip_count": len(clips),
            "clips_file": table.name,
        }
        new_table = not table.exists()
        try:
            index_tmp = files.write_temp(self.path / INDEX_FILE, files.json_bytes(index))
        except BaseException:
            table_tmp.unlink(missing_ok=True)
            raise
        try:
            files.commit(table_tmp, table)  # a new name: the current index still reads its own
            files.commit(self._tmp, self.path / SPECTRA_FILE)
        except BaseException:
            index_tmp.unlink(missing_ok=True)
            if new_table:
                table.unlink(missing_ok=True)
            raise
        files.commit(index_tmp, self.path / INDEX_FILE)
        for old in self.path.iterdir():  # the tables no index names any more
            if old != table and _TABLE_NAME.fullmatch(old.name):
                try:
                    old.unlink()
                except OSError:
                    pass  # left for the next ingest
        files.write_json_atomic(self.path / REPORT_FILE, report)

    def abort(self) -> None:
        self._rows.close()
        self._tmp.unlink(missing_ok=True)


def _hashed(chunks: Iterator[bytes], digest: Any) -> Iterator[bytes]:
    for chunk in chunks:
        digest.update(chunk)
        yield chunk


def read_index(path: Path) -> dict[str, Any]:
    """The parsed ``index.json`` of a bank folder, checked for format and header fields.

    Format 3 holds the header only (:func:`read_clips` reads the clip table); format 2
    still holds its ``clips`` list.
    """
    path = Path(path)
    if not path.is_dir():
        raise BankError(f"{path}: bank folder not found (run 'shotsmith ingest' first)")
    where = path / INDEX_FILE
    index = read_json(where, "bank index")
    if not isinstance(index, dict) or index.get("tool") != "shotsmith" or not (
            "clips" in index or "clip_count" in index):
        raise BankError(f"{where}: not a shotsmith bank index")
    version = index.get("format", 0)
    if not isinstance(version, int) or version > BANK_FORMAT:
        raise BankError(
            f"{where}: bank format {version} is newer than this "
            f"shotsmith reads ({BANK_FORMAT}); upgrade shotsmith"
        )
    if version < OLDEST_READ:
        raise BankError(f"{path}: bank format {version} was made by an older shotsmith "
                        f"(this one reads {BANK_FORMAT}); re-run 'shotsmith ingest'")
    if not isinstance(index.get("audio"), dict):
        raise damaged(where, "audio is not a table of settings")
    if not isinstance(index.get("settings", {}), dict):
        raise damaged(where, "settings is not a table of settings")
    if version == 2:
        if not isinstance(index.get("clips"), list):
            raise damaged(where, "clips is not a list")
        return index
    count, name = index.get("clip_count"), index.get("clips_file")
    if isinstance(count, bool) or not isinstance(count, int) or count < 0:
        raise damaged(where, f"clip_count is {count!r}")
    if not isinstance(name, str) or Path(name).name != name or name in ("", ".", ".."):
        raise damaged(where, f"clips_file is {name!r}")
    return index


def read_clips(path: Path, index: dict[str, Any]) -> ClipTable:
    """The clip table of the bank in ``path`` whose ``index`` :func:`read_index` returned:
    streamed from the clips file in chunks (format 3), or from the index's list (format 2)."""
    path = Path(path)
    if index.get("format") == 2:
        return ClipTable.from_records(index["clips"], path / INDEX_FILE)
    return read_clip_lines(path / index["clips_file"], index["clip_count"])


def open_bank(path: Path) -> Bank:
    """Open a bank folder; ``spectra`` is memory-mapped read-only."""
    path = Path(path)
    index = read_index(path)
    clips = read_clips(path, index)
    try:
        audio = spec_from_dict(AudioSpec, index["audio"], "audio")
    except PresetError as exc:
        raise BankError(f"{path / INDEX_FILE}: bad audio settings ({exc})") from None
    try:
        spectra = np.load(path / SPECTRA_FILE, mmap_mode="r")
    except FileNotFoundError:
        raise BankError(f"{path / SPECTRA_FILE}: spectra not found (re-run ingest)") from None
    except (OSError, ValueError) as exc:
        raise BankError(f"{path / SPECTRA_FILE}: unreadable spectra ({exc})") from None
    expected = (len(clips), audio.n_bins, audio.n_frames)
    if spectra.shape != expected:
        raise BankError(
            f"{path / SPECTRA_FILE}: shape {spectra.shape} does not match the index "
            f"{expected} (re-run ingest)"
        )
    return Bank(path, audio, index.get("settings", {}), clips, spectra)


def stored_settings(path: str | Path) -> Settings | None:
    """The settings a bank was made with (its preset and every table), or None where
    ``path`` holds no shotsmith bank (yet).

    Raises
    ------
    BankError
        The bank's stored settings are not valid settings.
    """
    path = Path(path)
    try:
        index = read_index(path)
    except BankError:
        return None
    stored = index.get("settings")
    if not isinstance(stored, dict) or not stored:
        return None
    try:
        return settings_from_dict(stored, where=f"{path / INDEX_FILE} settings")
    except PresetError as exc:
        raise BankError(f"{path / INDEX_FILE}: bad stored settings ({exc}); "
                        "give a preset instead") from None


def source_folder(path: str | Path) -> Path | None:
    """The library folder a bank was made from (recorded by ingest), or None if unknown."""
    path = Path(path)
    for name in (INDEX_FILE, REPORT_FILE):
        try:
            data = json.loads((path / name).read_text(encoding="utf-8"))
        except (OSError, UnicodeDecodeError, ValueError):
            continue
        source = data.get("source") if isinstance(data, dict) else None
        if isinstance(source, str) and source:
            return Path(source)
    return None
