"""The listening page's data: one JSON-ready record per sound, and the bank's reference clips.

Pure assembly over a :class:`~pipeline.listen.catalog.Catalog`: loudness and gains
from :mod:`pipeline.listen.measure`, categories and nearest training sounds from the
manifest and, when given, the bank. Nothing here imports torch.
"""

from __future__ import annotations

import io
import math
import threading
from pathlib import Path
from typing import Any
from urllib.parse import quote

import soundfile as sf

from pipeline.listen.catalog import NEAR_COPY_RATIO, BankRef, Catalog, sound_category
from pipeline.listen.measure import loudness_target, matching_gain_db, measure_folder
from pipeline.listen.picks import PICKS_FILE, load_picks

MATCH_PERCENTILE = 10.0


def _finite(x: Any) -> float | None:
    try:
        v = float(x)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


def file_url(prefix: str, folder: int, file: str) -> str:
    return f"/{prefix}/{folder}/{quote(file, safe='/')}"


def build_sounds(catalog: Catalog, bank: BankRef | None) -> dict[str, Any]:
    """Records for the page: what each sound is, its loudness and its matching gain.

    Sounds that cannot be decoded are left out and listed in ``notes``.
    """
    measured: dict[tuple[int, str], dict[str, Any]] = {}
    for k, root in enumerate(catalog.folders):
        files = [(s.file, s.path) for s in catalog.sounds if s.folder == k]
        for name, m in measure_folder(root, files).items():
            measured[(k, name)] = m
    notes = list(catalog.notes)
    ok = []
    for s in catalog.sounds:
        m = measured.get((s.folder, s.file), {"error": "not measured"})
        if "error" in m:
            notes.append(f"{s.path}: left out (cannot be decoded: {m['error']})")
        else:
            ok.append((s, m))
    target = loudness_target([m["lufs"] for _, m in ok], percentile=MATCH_PERCENTILE)
    records = []
    for s, m in ok:
        item = s.item
        category, category_from = sound_category(item, bank)
        near = item.get("nearest") if isinstance(item.get("nearest"), dict) else None
        nearest = None
        if near is not None and isinstance(near.get("name"), str):
            ratio = _finite(near.get("distance_ratio"))
            name = near["name"]
            has_ref = bank is not None and bank.source_file(name) is not None
            nearest = {
                "name": name,
                "distance": _finite(near.get("distance")),
                "distance_ratio": ratio,
                "near_copy": ratio is not None and ratio < NEAR_COPY_RATIO,
                "category": bank.category(name) if bank is not None else None,
                "reference": f"/api/reference/{quote(name, safe='')}" if has_ref else None,
            }
        sources = [str(x) for x in item.get("sources") or []]
        records.append({
            "id": f"{s.folder}/{s.file}",
            "folder": s.folder,
            "file": s.file,
            "audio": file_url("audio", s.folder, s.file),
            "thumb": file_url("thumb", s.folder, s.file),
            "kind": str(item.get("kind") or "sound"),
            "seed": item.get("seed") if isinstance(item.get("seed"), int) else None,
            "sources": sources,
            "step": item.get("step") if isinstance(item.get("step"), int) else None,
            "path": item.get("path") if isinstance(item.get("path"), str) else None,
            "amount": _finite(item.get("amount")),
            "from_model": item.get("model") is not None,
            "category": category,
            "category_from": category_from,
            "nearest": nearest,
            "duration_s": m["duration_s"],
            "sample_rate": m["sample_rate"],
            "lufs": m["lufs"],
            "padded": bool(m["padded"]),
            "gain_db": round(matching_gain_db(m["lufs"], target), 2),
        })
    return {
        "folders": [
            {"index": k, "path": str(root), "picks": str(root / PICKS_FILE)}
            for k, root in enumerate(catalog.folders)
        ],
        "bank": str(bank.path) if bank is not None else None,
        "target_lufs": None if target is None else round(target, 2),
        "match_percentile": MATCH_PERCENTILE,
        "near_copy_ratio": NEAR_COPY_RATIO,
        "notes": notes,
        "sounds": records,
    }


def current_marks(catalog: Catalog) -> dict[str, str]:
    """``{"folder/file": "keep" | "reject"}`` from every folder's ``picks.json``, read now."""
    marks = {}
    for k, root in enumerate(catalog.folders):
        for name, state in load_picks(root).items():
            marks[f"{k}/{name}"] = state
    return marks


class References:
    """The bank's clips as the model heard them (front end applied), as WAV bytes, on demand.

    Each source file is decoded through :func:`pipeline.frontend.load_clip` with the
    bank's audio settings (onset aligned, fitted, peak-normalised), so the user compares
    a rendered sound with exactly what the model was trained on; any format libsndfile
    reads plays in the browser this way. Kept in memory for the session.
    """

    def __init__(self, bank: BankRef) -> None:
        self.bank = bank
        self._cache: dict[str, tuple[bytes, dict[str, Any]]] = {}
        self._lock = threading.Lock()

    def get(self, name: str, target_lufs: float | None) -> tuple[bytes, dict[str, Any]] | None:
        """``(wav_bytes, info)`` for clip ``name``, or None when it cannot be served."""
        from pipeline.errors import ShotsmithError
        from pipeline.frontend import load_clip
        from pipeline.listen.measure import padded_loudness

        with self._lock:
            hit = self._cache.get(name)
        if hit is None:
            path = self.bank.source_file(name)
            if path is None:
                return None
            try:
                y = load_clip(path, self.bank.audio)
            except (ShotsmithError, OSError, sf.SoundFileError):
                return None
            sr = self.bank.audio.sample_rate
            buf = io.BytesIO()
            sf.write(buf, y, sr, format="WAV", subtype="PCM_16")
            lufs, padded = padded_loudness(y, sr)
            rel = Path(path).relative_to(self.bank.source) if self.bank.source else path
            info = {"name": name, "source": str(rel), "category": self.bank.category(name),
                    "lufs": None if lufs is None else round(lufs, 3), "padded": padded,
                    "duration_s": len(y) / sr,
                    "audio": f"/reference/{quote(name, safe='')}"}
            hit = (buf.getvalue(), info)
            with self._lock:
                self._cache[name] = hit
        wav, info = hit
        return wav, info | {"gain_db": round(matching_gain_db(info["lufs"], target_lufs), 2)}
