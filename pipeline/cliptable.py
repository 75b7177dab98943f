"""The bank's per-clip table, held as columns: one row per spectra row.

On disk (bank format 3) it is a JSON Lines file: one compact record per clip, in row
order (``{"name":..,"path":..,"category":..,"sample_rate":..,"channels":..,"duration":..,
"peak_dbfs":..,"size":..,"mtime_ns":..}``). :func:`read_clip_lines` streams it in blocks
of :data:`CHUNK_BYTES`, parses and checks each block's lines and keeps them as columns, a
:class:`ClipTable`: three lists of ``str`` (categories interned) and one NumPy array per
numeric field. Reading 100,000 clips peaks at about a third of the memory that loading
them as one JSON list of dicts takes (``tests/test_bank_format.py`` measures it). The
table is also a sequence of records, each built on demand, for callers that want one clip's dict.
"""

from __future__ import annotations

import itertools
import json
import math
import operator
from collections.abc import Callable, Iterable, Iterator, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from pipeline.errors import BankError
from pipeline.files import reason

CHUNK_ROWS = 2048  # records parsed and checked at a time (about 1 MB of them as dicts)
CHUNK_BYTES = 1 << 18  # of the clip table read at a time (about 1,500 lines)
# (field, Python type); a record may lack any of them (hand-made banks), kept as MISSING / NaN
NUMBERS = (("sample_rate", int), ("channels", int), ("duration", float), ("peak_dbfs", float),
           ("size", int), ("mtime_ns", int))
MISSING = np.iinfo(np.int64).min  # an integer field the record lacks
_INT64 = (-(2**63) + 1, 2**63 - 1)


def damaged(where: str | Path, what: str) -> BankError:
    """The one message of a damaged or hand-edited bank index."""
    return BankError(f"{where}: damaged bank index ({what}; re-run ingest)")


class ClipTable(Sequence):
    """Names, relative paths and categories (``None``: directly in SOURCE) as lists of
    ``str`` (read-only by convention: no copy is made), the numeric fields as ``int64`` /
    ``float64`` arrays (``numbers[field]``).

    ``table[i]`` is row ``i`` as the dict ingest recorded (fields it lacked left out).
    """

    __slots__ = ("names", "paths", "categories", "numbers", "_row_of")

    def __init__(self, names: Sequence[str], paths: Sequence[str],
                 categories: Sequence[str | None], numbers: dict[str, np.ndarray]) -> None:
        self.names, self.paths, self.categories = (
            c if type(c) is list else list(c) for c in (names, paths, categories))
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
        rows, it = _Rows(where), iter(records)
        while chunk := list(itertools.islice(it, CHUNK_ROWS)):
            rows.add(chunk, lambda j, first=len(rows): f"clip {first + j}")
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
    """Checked rows gathered a chunk at a time: strings in lists (categories interned),
    numbers as one array per field and chunk. Each chunk is checked column by column;
    where a check fails, row by row, for the message of the first bad row."""

    def __init__(self, where: str | Path) -> None:
        self.where = where
        self.names: list[str] = []
        self.paths: list[str] = []
        self.categories: list[str | None] = []
        self.seen: set[str] = set()
        self.interned: dict[str | None, str | None] = {None: None}
        self.chunks: dict[str, list[np.ndarray]] = {k: [] for k, _ in NUMBERS}

    def __len__(self) -> int:
        return len(self.names)

    def add(self, recs: list[Any], label: Callable[[int], str]) -> None:
        """Append the records ``recs``; ``label(j)`` names the ``j``-th of them in a message
        (``line 7``, ``clip 6``)."""
        try:
            columns = self._columns(recs)
        except _Slow:
            local: set[str] = set()
            for j, rec in enumerate(recs):
                self._check(rec, label(j), local)
            raise damaged(self.where, f"{label(0)} or one of the next {len(recs) - 1}") from None
        names, paths, cats, numbers = columns
        self.names += names
        self.paths += paths
        self.categories += cats
        for key, _ in NUMBERS:
            self.chunks[key].append(numbers[key])

    def _columns(self, recs: list[Any]):
        if all(type(r) is dict and r.keys() == _KEYS for r in recs):  # as ingest writes them
            columns = list(zip(*map(_GET, recs))) or [()] * len(_FIELDS)
        elif all(type(r) is dict for r in recs):
            columns = [[r.get(k) for r in recs] for k in _FIELDS]
        else:
            raise _Slow
        names, paths, cats, *values = columns
        unique, cat_set = set(names), set(cats)
        if not (set(map(type, names)) <= {str} and "" not in unique
                and len(unique) == len(names) and unique.isdisjoint(self.seen)
                and set(map(type, paths)) <= {str}
                and set(map(type, cat_set)) <= {str, type(None)} and "" not in cat_set):
            raise _Slow
        numbers = {}
        for (key, kind), column in zip(NUMBERS, values):
            types = set(map(type, column))
            if not types <= _TYPES[kind]:
                raise _Slow
            absent = None
            if type(None) in types:
                absent = np.array([v is None for v in column], bool)
                column = [(MISSING if kind is int else math.nan) if v is None else v
                          for v in column]
            try:
                array = np.array(column, np.int64 if kind is int else np.float64)
            except OverflowError:
                raise _Slow from None
            given = array if absent is None else array[~absent]
            if not (np.isfinite(given).all() if kind is float else (given != MISSING).all()):
                raise _Slow
            numbers[key] = array
        self.seen |= unique  # only now: a chunk checked again row by row starts afresh
        self.interned.update((c, c) for c in cat_set - self.interned.keys())
        return names, paths, list(map(self.interned.__getitem__, cats)), numbers

    def _check(self, rec: Any, label: str, local: set[str]) -> None:
        """Every field the commands read, of the type they read it as (a damaged or
        hand-edited index is refused here in one line, not as a TypeError deep in training)."""
        if not isinstance(rec, dict):
            raise damaged(self.where, f"{label} is not a record")
        name, cat, path = rec.get("name"), rec.get("category"), rec.get("path")
        twice = isinstance(name, str) and (name in self.seen or name in local)
        if not isinstance(name, str) or not name or twice:
            raise damaged(self.where, f"{label} has the name {name!r}" + (" twice" * twice))
        if cat is not None and (not isinstance(cat, str) or not cat):
            raise damaged(self.where, f"{label}: clip {name} has the category {cat!r}")
        if not isinstance(path, str):
            raise damaged(self.where, f"{label}: clip {name} has the path {path!r}")
        for key, kind in NUMBERS:
            v = rec.get(key)
            if v is not None and not _number_ok(v, kind):
                raise damaged(self.where, f"{label}: clip {name} has the {key} {v!r}")
        local.add(name)

    def table(self) -> ClipTable:
        self.seen.clear()
        numbers = {k: np.concatenate([*self.chunks[k], np.zeros(0, np.float64 if kind is float
                                                               else np.int64)])
                   for k, kind in NUMBERS}
        self.chunks.clear()
        return ClipTable(self.names, self.paths, self.categories, numbers)


class _Slow(Exception):
    """A chunk failed a column check: look at it row by row."""


_TYPES = {int: {int, type(None)}, float: {int, float, type(None)}}
_FIELDS = ("name", "path", "category", *(k for k, _ in NUMBERS))
_KEYS = frozenset(_FIELDS)
_GET = operator.itemgetter(*_FIELDS)


def _number_ok(v: Any, kind: type) -> bool:
    if isinstance(v, bool):
        return False
    if kind is int:
        return isinstance(v, int) and _INT64[0] <= v <= _INT64[1]
    return isinstance(v, (int, float)) and math.isfinite(v)


def read_clip_lines(path: str | Path, count: int, where: str | Path | None = None) -> ClipTable:
    """Stream the JSON Lines clip table at ``path``, which must hold ``count`` clips.

    Read :data:`CHUNK_BYTES` at a time. Raises :class:`BankError` in one line naming
    the file (or ``where``) and the line: a line that is not a JSON record or holds a bad
    field, fewer or more lines than ``count``, a missing or unreadable file.
    """
    path = Path(path)
    where = path if where is None else where
    rows = _Rows(where)
    scan = json.JSONDecoder().scan_once  # the C scanner, without json.loads' per-call work
    n, rest = 0, b""
    try:
        with open(path, "rb") as fh:
            while True:
                block = fh.read(CHUNK_BYTES)
                if block:
                    lines = (rest + block).split(b"\n")
                    rest = lines.pop()  # a line not ended yet
                    if not lines:
                        continue
                elif rest.strip():  # the last line, without its newline
                    lines, rest = [rest], b""
                else:
                    break
                if n + len(lines) > count:
                    raise damaged(where, f"more than the {count} clips the index names")
                rows.add(_parse(lines, n, scan, where), lambda j, first=n + 1: f"line {first + j}")
                n += len(lines)
    except FileNotFoundError:
        raise BankError(f"{where}: clip table not found (re-run ingest)") from None
    except OSError as exc:
        raise BankError(f"{where}: unreadable clip table ({reason(exc)})") from None
    if len(rows) != count:
        raise damaged(where, f"{len(rows)} clips where the index names {count}: the file "
                             "is cut short")
    return rows.table()


def _parse(lines: list[bytes], n: int, scan: Callable, where: str | Path) -> list[Any]:
    """The records of ``lines`` (lines ``n + 1``...)."""
    try:
        texts = b"\n".join(lines).decode("utf-8").split("\n")
    except UnicodeDecodeError:
        texts = []
        for j, raw in enumerate(lines, n + 1):
            try:
                texts.append(raw.decode("utf-8"))
            except UnicodeDecodeError:
                raise damaged(where, f"line {j} is not UTF-8 text") from None
    recs = []
    for j, text in enumerate(texts, n + 1):
        try:
            rec, end = scan(text, 0)
            if end == len(text):
                recs.append(rec)
                continue
        except (StopIteration, ValueError, RecursionError):
            pass
        text = text.strip()
        try:
            rec = json.loads(text)
            if isinstance(rec, dict):  # spaces around it: allowed
                recs.append(rec)
                continue
            why = "not a record"
        except json.JSONDecodeError as exc:
            why = f"{exc.msg}: column {exc.colno}"
        except RecursionError:
            why = "nested too deeply"
        raise damaged(where, f"line {j} is not a JSON record ({why})")
    return recs
