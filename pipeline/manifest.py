"""Reading an output folder's manifest: the one loader every reader uses.

STAND-IN: a minimal version with the agreed signature, reading ``manifest.json``
only. The real loader (JSON plus an append-only item log) replaces this file.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

from pipeline.errors import ShotsmithError

MANIFEST_FILE = "manifest.json"


def load_manifest(folder: str | Path) -> dict[str, Any] | None:
    """The manifest of an output folder, or None when the folder has none.

    Returns the top-level fields and ``items``: every item whose WAV is still there,
    each with ``file`` (relative to the folder) and ``model`` (``{"path", "sha256"}``, or
    None for resynth), plus the item fields listed in the README ("What it writes").

    Raises
    ------
    ShotsmithError
        The manifest exists but cannot be read or is not a shotsmith manifest.
    """
    folder = Path(folder)
    path = folder / MANIFEST_FILE
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        return None
    except (OSError, UnicodeDecodeError, ValueError) as exc:
        raise ShotsmithError(f"{path}: unreadable manifest ({exc})") from None
    if not isinstance(data, dict) or data.get("tool") != "shotsmith":
        raise ShotsmithError(f"{path}: not a shotsmith manifest")
    model = data.get("model")
    items = []
    for item in data.get("items") or []:
        if not isinstance(item, dict) or not isinstance(item.get("file"), str):
            continue
        if not (folder / item["file"]).is_file():
            continue
        items.append({"model": model, **item})
    return {**data, "items": items}
