"""The manifest of an output folder: ``manifest.json`` plus its append-only log.

A folder of WAVs describes itself in two files:

``manifest.json`` (format 2)
    ``tool``, ``format``; the latest run's fields at the top (``version``, ``started``,
    ``complete``, ``model``, ``settings``, ``render``, ``request``, and for ``resynth``
    ``source``, ``skipped``, ``ignored``, ``hidden``); ``runs``: every run that wrote into
    the folder, numbered from 1, each with those fields; ``items``: one dict per WAV,
    ``file`` and ``run`` first; ``failed``: items that could not be written, with
    ``reason`` and ``run``; ``unlisted``: WAVs in the folder that no item describes.
``manifest.jsonl``
    the log of the run in progress, one JSON object per line, each with ``run`` and one
    of ``start`` (the run's fields), ``item``, ``failed``, ``extend`` (elements added to a
    list field of the run, such as ``skipped``) or ``end`` (``{"complete": true}``).

A run appends to the log as it writes (an item's line goes in before its WAV reaches its
name), so the cost per batch does not grow with the folder; at its end, and at the start
of the next run into the folder, the log is folded into ``manifest.json`` and removed.
Items whose WAV is missing are dropped when reading, so after a kill at any moment the
manifest as :func:`load_manifest` reads it describes exactly the WAVs present.
"""

from __future__ import annotations

import datetime
import json
import math
import os
from pathlib import Path
from typing import Any

import numpy as np

from pipeline import files
from pipeline.errors import OutputError

MANIFEST_FILE = "manifest.json"
LOG_FILE = "manifest.jsonl"
FORMAT = 2
TOOL = "shotsmith"
_RUN_KEYS = ("run", "version", "started", "complete")


def jsonable(x: Any) -> Any:
    """Plain JSON data: numpy values as Python numbers, non-finite floats as None."""
    if isinstance(x, dict):
        return {str(k): jsonable(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [jsonable(v) for v in x]
    if isinstance(x, np.ndarray):
        return jsonable(x.tolist())
    if isinstance(x, np.generic):
        x = x.item()
    if isinstance(x, float) and not math.isfinite(x):
        return None
    if isinstance(x, Path):
        return str(x)
    return x


def now() -> str:
    """The current UTC time, ISO 8601 to the second."""
    return datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds")


# --- reading -------------------------------------------------------------------------------


def _read_base(folder: Path) -> dict[str, Any] | None:
    path = folder / MANIFEST_FILE
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        return None
    except (OSError, UnicodeDecodeError, ValueError) as exc:
        why = files.reason(exc) if isinstance(exc, OSError) else "not valid JSON"
        raise OutputError(f"{path}: unreadable manifest ({why})") from None
    if not isinstance(data, dict) or data.get("tool") != TOOL:
        raise OutputError(f"{path}: exists and is not a shotsmith manifest")
    if isinstance(data.get("format"), int) and data["format"] > FORMAT:
        raise OutputError(f"{path}: manifest format {data['format']} is newer than this "
                          f"shotsmith reads ({FORMAT}); upgrade shotsmith")
    return data


def _read_log(folder: Path) -> list[dict[str, Any]]:
    """The log's records; a line cut short by a kill or a full disk is skipped."""
    try:
        raw = (folder / LOG_FILE).read_bytes()
    except FileNotFoundError:
        return []
    except OSError as exc:
        raise OutputError(f"{folder / LOG_FILE}: unreadable ({files.reason(exc)})") from None
    records = []
    for line in raw.split(b"\n"):
        try:
            rec = json.loads(line)
        except ValueError:
            continue
        if isinstance(rec, dict) and isinstance(rec.get("run"), int):
            records.append(rec)
    return records


def _plain_name(name: Any) -> bool:
    return (isinstance(name, str) and name not in ("", ".", "..") and "/" not in name
            and "\\" not in name and "\x00" not in name)


def _wavs_present(folder: Path) -> set[str]:
    try:
        return {e.name for e in os.scandir(folder) if e.is_file(follow_symlinks=False)}
    except FileNotFoundError:
        return set()
    except OSError as exc:
        raise OutputError(f"{folder}: cannot list the folder ({files.reason(exc)})") from None


def _upgrade(base: dict[str, Any]) -> dict[str, Any]:
    """A format-1 manifest (one run, items of earlier runs marked ``earlier_run``) as format 2."""
    if base.get("format") == FORMAT:
        return base
    run = {k: v for k, v in base.items() if k not in ("tool", "format", "items", "failed")}
    items = []
    for it in base.get("items", []):
        if isinstance(it, dict):  # an earlier run's model is not known
            items.append(dict(it, run=0 if it.get("earlier_run") else 1))
    runs = [{"run": 0, "model": None, "complete": True}, {"run": 1, **run}]
    failed = [dict(f, run=1) for f in base.get("failed", []) if isinstance(f, dict)]
    return {"tool": TOOL, "format": FORMAT, "runs": runs, "items": items, "failed": failed}


def merge(folder: str | Path, *, ignore_existing: bool = False) -> dict[str, Any] | None:
    """``manifest.json`` and its log as one manifest (format 2, items as stored: ``run``,
    not ``model``), or None when the folder has neither. Read-only.

    ``ignore_existing``: start from no ``manifest.json`` (it is being replaced).
    """
    folder = Path(folder)
    base = None if ignore_existing else _read_base(folder)
    records = _read_log(folder)
    if base is None and not records:
        return None
    base = _upgrade(base or {"format": FORMAT})
    runs = {r["run"]: dict(r) for r in base.get("runs", [])
            if isinstance(r, dict) and isinstance(r.get("run"), int)}
    folded = set(runs)  # a run already in manifest.json: its log lines are in it too
    items: dict[str, dict[str, Any]] = {}
    for it in base.get("items", []):
        if isinstance(it, dict) and _plain_name(it.get("file")):
            items[it["file"]] = it
    failed = [f for f in base.get("failed", []) if isinstance(f, dict)]
    for rec in records:
        r = rec["run"]
        if r in folded:
            continue
        if isinstance(rec.get("start"), dict):
            runs.setdefault(r, {"run": r, **rec["start"], "complete": False})
            continue
        run = runs.setdefault(r, {"run": r, "complete": False})
        if isinstance(rec.get("item"), dict) and _plain_name(rec["item"].get("file")):
            it = {"file": rec["item"]["file"], "run": r}
            it |= {k: v for k, v in rec["item"].items() if k != "run"}
            items.pop(it["file"], None)  # a later write of a name replaces the file
            items[it["file"]] = it
        elif isinstance(rec.get("failed"), dict):
            failed.append({**rec["failed"], "run": r})
        elif isinstance(rec.get("extend"), dict):
            for key, more in rec["extend"].items():
                if isinstance(more, list) and key not in _RUN_KEYS:
                    run[key] = [*(run.get(key) or []), *more]
        elif isinstance(rec.get("end"), dict):
            run["complete"] = bool(rec["end"].get("complete"))
    present = _wavs_present(folder)
    kept = [it for it in items.values() if it["file"] in present]
    described = {it["file"] for it in kept}
    order = sorted(runs)
    latest = {k: v for k, v in runs[order[-1]].items() if k != "run"} if order else {}
    return {
        "tool": TOOL,
        "format": FORMAT,
        **latest,
        "runs": [runs[r] for r in order],
        "items": kept,
        "failed": failed,
        "unlisted": sorted(n for n in present - described if n.lower().endswith(".wav")),
    }


def load_manifest(folder: str | Path) -> dict[str, Any] | None:
    """The manifest of an output folder, as every reader should see it. Read-only.

    Returns
    -------
    None when ``folder`` holds neither ``manifest.json`` nor its log. Otherwise a dict:
    the latest run's top-level fields (``tool``, ``format``, ``version``, ``complete``,
    ``model``, ``settings``, ``render``, ``request``, ...), ``runs`` (every run, numbered),
    ``failed`` (of every run), ``unlisted`` (WAVs no item describes) and ``items``: those
    of ``manifest.json`` and those still only in the log (an interrupted run), in writing
    order, without items whose file is missing. Every item has ``file`` (a plain name in
    ``folder``), ``run`` and ``model`` (``{"path", "sha256"}`` of the model that made it,
    or None: resynthesis, or an item of an older manifest whose model was not recorded).

    Raises
    ------
    OutputError
        ``manifest.json`` is not valid JSON, not a shotsmith manifest, or from a newer format.
    """
    m = merge(folder)
    if m is None:
        return None
    models = {r["run"]: r.get("model") for r in m["runs"]}
    m["items"] = [{"file": it["file"], "run": it["run"], "model": models.get(it["run"]), **it}
                  for it in m["items"]]
    return m


# --- writing -------------------------------------------------------------------------------


def fold(folder: str | Path, *, ignore_existing: bool = False) -> dict[str, Any] | None:
    """Fold the log into ``manifest.json`` (atomically), then remove the log.

    Safe to repeat after a kill at any point: records of a run that ``manifest.json``
    already holds are not applied twice.
    """
    folder = Path(folder)
    m = merge(folder, ignore_existing=ignore_existing)
    if m is None:
        return None
    files.write_json_atomic(folder / MANIFEST_FILE, m)
    try:
        (folder / LOG_FILE).unlink(missing_ok=True)
    except OSError as exc:
        raise OutputError(f"{folder / LOG_FILE}: cannot remove ({files.reason(exc)})") from None
    return m


class ManifestLog:
    """Appends records to ``manifest.jsonl``: one ``write`` per record, opened for append."""

    def __init__(self, folder: str | Path, run: int) -> None:
        self.path = Path(folder) / LOG_FILE
        self.run = run
        self._fd: int | None = None
        self._torn = False  # a record was cut short: start the next on a fresh line

    def append(self, **record: Any) -> None:
        line = files.json_bytes(jsonable({"run": self.run, **record}), indent=None)
        try:
            if self._fd is None:
                self._fd = os.open(self.path, os.O_RDWR | os.O_CREAT | os.O_APPEND, 0o666)
                size = os.fstat(self._fd).st_size  # a killed writer's cut line: end it
                self._torn = size > 0 and os.pread(self._fd, 1, size - 1) != b"\n"
            files._write_all(self._fd, (b"\n" if self._torn else b"") + line)
            self._torn = False
        except OSError as exc:
            self._torn = True
            raise files.cannot_write(self.path, exc) from None

    def sync(self) -> None:
        if self._fd is not None:
            try:
                os.fsync(self._fd)
            except OSError as exc:
                raise files.cannot_write(self.path, exc) from None

    def close(self) -> None:
        if self._fd is not None:
            os.close(self._fd)
            self._fd = None
