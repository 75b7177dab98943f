"""The bank's per-clip table, held as columns: one row per spectra row.

On disk (bank format 3) it is a JSON Lines file: one compact record per clip, in row
order (``{"name":..,"path":..,"category":..,"sample_rate":..,"channels":..,"duration":..,
"peak_dbfs":..,"size":..,"mtime_ns":..}``). :func:`read_clip_lines` streams it in chunks
of :data:`CHUNK_ROWS` into a :class:`ClipTable`: three tuples of ``str`` (categories
interned) and one NumPy array per numeric field, a fifth of what the same rows take as
dicts (``tests/test_cliptable.py`` measures it). The table is also a sequence of records,
each built on demand, for callers that want one clip's dict.
"""

from __future__ import annotations

import json
import math
from collections.abc import Iterable, Iterator, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from pipeline.errors import BankError
from pipeline.files import reason

CHUNK_ROWS = 8192
# (field, Python type); a record may lack any of them (hand-made banks), kept as MISSING / NaN
NUMBERS = (("sample_rate", int), ("channels", int), ("duration", float), ("peak_dbfs", float),
           ("size", int), ("mtime_ns", int))
MISSING = np.iinfo(np.int64).min  # an integer field the record lacks
_INT64 = (-(2**63) + 1, 2**63 - 1)


def damaged(where: str | Path, what: str) -> BankError:
    """The one message of a damaged or hand-edited bank index."""
    return BankError(f"{where}: damaged bank index ({what}; re-run ingest)")


class ClipTable(Sequence):
    """Names, relative paths and categories (``None``: directly in SOURCE) as tuples, the
    numeric fields as ``int64`` / ``float64`` arrays (``numbers[field]``).

    ``table[i]`` is row ``i`` as the dict ingest recorded (fields it lacked left out).
    """

    __slots__ = ("names", "paths", "categories", "numbers", "_row_of")

    def __init__(self, names: Sequence[str], paths: Sequence[str],
                 categories: Sequence[str | None], numbers: dict[str, np.ndarray]) -> None:
        self.names, self.paths, self.categories = tuple(names), tuple(paths), tuple(categories)
        self.numbers = {k: np.asarray(numbers[k]) for k, _ in NUMBERS}
        n = len(self.names)
        if not (len(self.paths) == len(self.categories) == n
                and all(len(a) == n for a in self.numbers.values())):
            raise ValueError("every column of a clip table needs one value per clip")
        self._row_of: dict[str, int] | None = None

    @classmethod
    def from_records(cls, records: Iterable[Any], where: str | Path = "clips") -> ClipTable:
        """A table of ``records`` (dicts), checked as :func:`read_clip_lines` checks lines;
        a bad one is ``damaged(where, 'clip 3 ...')``."""
        rows = _Rows(where)
        for i, rec in enumerate(records):
            rows.add(rec, f"clip {i}")
        return rows.table()

    def __len__(self) -> int:
        return len(self.names)

    def __getitem__(self, i):  # noqa: ANN001 - int or slice, as a sequence takes
        if isinstance(i, slice):
            return [self.record(j) for j in range(*i.indices(len(self)))]
        return self.record(i)

    def record(self, i: int) -> dict[str, Any]:
        n = len(self)
        if not -n <= i < n:
            raise IndexError(f"clip {i} of {n}")
        i %= n
        rec: dict[str, Any] = {"name": self.names[i], "path": self.paths[i],
                               "category": self.categories[i]}
        for key, kind in NUMBERS:
            v = self.numbers[key][i]
            if kind is int and v != MISSING:
                rec[key] = int(v)
            elif kind is float and not math.isnan(v):
                rec[key] = float(v)
        return rec

    def __iter__(self) -> Iterator[dict[str, Any]]:
        return (self.record(i) for i in range(len(self)))

    def __eq__(self, other: object) -> bool:
        if isinstance(other, ClipTable):
            return ((self.names, self.paths, self.categories)
                    == (other.names, other.paths, other.categories)
                    and all(np.array_equal(self.numbers[k], other.numbers[k], equal_nan=kind
                                           is float) for k, kind in NUMBERS))
        if isinstance(other, (list, tuple)):
            return list(self) == list(other)
        return NotImplemented

    __hash__ = None  # type: ignore[assignment]

    def __repr__(self) -> str:
        return f"ClipTable({len(self)} clips)"

    def row(self, name: str) -> int | None:
        """The row of clip ``name``, or None (the lookup is built on first use)."""
        if self._row_of is None:
            self._row_of = {n: r for r, n in enumerate(self.names)}
        return self._row_of.get(name)

    def lines(self) -> Iterator[bytes]:
        """The JSON Lines file, in chunks of :data:`CHUNK_ROWS` lines (UTF-8; a path
        that is not UTF-8 keeps its ``\\udcXX`` escape, as :func:`pipeline.files.json_bytes`)."""
        for start in range(0, len(self), CHUNK_ROWS):
            text = "".join(json.dumps(self.record(i), ensure_ascii=False, allow_nan=False,
                                      separators=(",", ":")) + "\n"
                           for i in range(start, min(len(self), start + CHUNK_ROWS)))
            yield text.encode("utf-8", "backslashreplace")


class _Rows:
    """Checked rows gathered in chunks: strings in lists, numbers as one array a chunk."""

    def __init__(self, where: str | Path) -> None:
        self.where = where
        self.names: list[str] = []
        self.paths: list[str] = []
        self.categories: list[str | None] = []
        self.seen: set[str] = set()
        self.interned: dict[str, str] = {}
        self.pending: dict[str, list] = {k: [] for k, _ in NUMBERS}
        self.chunks: dict[str, list[np.ndarray]] = {k: [] for k, _ in NUMBERS}

    def __len__(self) -> int:
        return len(self.names)

    def add(self, rec: Any, label: str) -> None:
        """Every field the commands read, of the type they read it as (a damaged or
        hand-edited index is refused here in one line, not as a TypeError deep in training)."""
        if not isinstance(rec, dict):
            raise damaged(self.where, f"{label} is not a record")
        name, cat, path = rec.get("name"), rec.get("category"), rec.get("path")
        twice = isinstance(name, str) and name in self.seen
        if not isinstance(name, str) or not name or twice:
            raise damaged(self.where, f"{label} has the name {name!r}" + (" twice" * twice))
        if cat is not None and (not isinstance(cat, str) or not cat):
            raise damaged(self.where, f"{label}: clip {name} has the category {cat!r}")
        if not isinstance(path, str):
            raise damaged(self.where, f"{label}: clip {name} has the path {path!r}")
        for key, kind in NUMBERS:
            v = rec.get(key)
            if v is None:
                v = MISSING if kind is int else math.nan
            elif not _number_ok(v, kind):
                raise damaged(self.where, f"{label}: clip {name} has the {key} {v!r}")
            self.pending[key].append(v)
        self.seen.add(name)
        self.names.append(name)
        self.paths.append(path)
        self.categories.append(None if cat is None else self.interned.setdefault(cat, cat))
        if len(self.pending["size"]) >= CHUNK_ROWS:
            self._flush()

    def _flush(self) -> None:
        for key, kind in NUMBERS:
            self.chunks[key].append(np.array(self.pending[key],
                                             np.int64 if kind is int else np.float64))
            self.pending[key] = []

    def table(self) -> ClipTable:
        self._flush()
        numbers = {k: np.concatenate(self.chunks[k]) for k, _ in NUMBERS}
        return ClipTable(self.names, self.paths, self.categories, numbers)


def _number_ok(v: Any, kind: type) -> bool:
    if isinstance(v, bool):
        return False
    if kind is int:
        return isinstance(v, int) and _INT64[0] <= v <= _INT64[1]
    return isinstance(v, (int, float)) and math.isfinite(v)


def read_clip_lines(path: str | Path, count: int, where: str | Path | None = None) -> ClipTable:
    """Stream the JSON Lines clip table at ``path``, which must hold ``count`` clips.

    Raises :class:`BankError` in one line naming the file (or ``where``) and the line:
    a line that is not a JSON record or holds a bad field, fewer or more lines than
    ``count``, a missing or unreadable file.
    """
    path = Path(path)
    where = path if where is None else where
    rows = _Rows(where)
    try:
        with open(path, "rb") as fh:
            for n, raw in enumerate(fh, 1):
                if n > count:
                    raise damaged(where, f"more than the {count} clips the index names")
                try:
                    rec = json.loads(raw)
                except UnicodeDecodeError:
                    raise damaged(where, f"line {n} is not UTF-8 text") from None
                except json.JSONDecodeError as exc:
                    raise damaged(where, f"line {n} is not JSON: {exc.msg} at column "
                                         f"{exc.colno}") from None
                rows.add(rec, f"line {n}")
    except FileNotFoundError:
        raise BankError(f"{where}: clip table not found (re-run ingest)") from None
    except OSError as exc:
        raise BankError(f"{where}: unreadable clip table ({reason(exc)})") from None
    if len(rows) != count:
        raise damaged(where, f"{len(rows)} clips where the index names {count}: the file "
                             "is cut short")
    return rows.table()
