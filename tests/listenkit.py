"""Output folders for the listening page and kit export tests, made in a second or two.

A little library of synthesized kicks, snares and hats is ingested into a real bank
(``tiny`` preset, no torch); its spectra, at several levels, go through the real
renderer (:func:`pipeline.render.render_spectra`: Griffin-Lim, finishing, WAV and
manifest) with the item fields that generate, vary and interpolate record. A second
folder holds quarter-second renders, shorter than one BS.1770 block.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import soundfile as sf

SR = 16000
CATEGORIES = ("kick", "snare", "hat")


def _hit(cat: str, rng: np.random.Generator) -> np.ndarray:
    t = np.arange(int(0.35 * SR)) / SR
    if cat == "kick":
        f = rng.uniform(45, 60) + 120 * np.exp(-t * 35)
        y = np.sin(2 * np.pi * np.cumsum(f) / SR) * np.exp(-t * 9)
    elif cat == "snare":
        y = (0.5 * np.sin(2 * np.pi * rng.uniform(170, 220) * t) * np.exp(-t * 30)
             + rng.standard_normal(t.size) * np.exp(-t * 18))
    else:
        y = np.diff(rng.standard_normal(t.size + 1)) * np.exp(-t * rng.uniform(30, 60))
    y[-160:] *= np.linspace(1.0, 0.0, 160)  # 10 ms fade-out: no click at the end
    return 0.8 * y / np.max(np.abs(y))


@dataclass
class ListenKit:
    source: Path
    bank: Path
    long: Path  # half-second renders: generate, vary, interpolate
    short: Path  # quarter-second renders (shorter than a BS.1770 block)
    clip_names: list[str]


def make_library(root: Path, *, per_category: int = 2, seed: int = 5) -> Path:
    rng = np.random.default_rng(seed)
    src = root / "library"
    for cat in CATEGORIES:
        (src / cat).mkdir(parents=True)
        for i in range(per_category):
            sf.write(src / cat / f"{cat}_{i + 1:02d}.wav", _hit(cat, rng), SR, subtype="PCM_16")
    return src


def _items(names: list[str], cats: list[str]) -> list[dict]:
    """Item fields as the model commands write them, nearest clips taken from the bank."""
    kick = [n for n, c in zip(names, cats) if c == "kick"]
    snare = [n for n, c in zip(names, cats) if c == "snare"]
    items = []
    for i in range(3):  # generate: one near-copy (ratio below 0.5)
        items.append({"stem": f"generate-{i:04d}", "kind": "generate", "seed": 100 + i,
                      "sources": ["category:hat"] if i == 2 else [],
                      "nearest": {"name": names[i * 2 % len(names)], "distance": 0.4 + i,
                                  "distance_ratio": [0.31, 1.2, 2.5][i]}})
    for i in range(3):  # vary around the first kick: round robin in a kit
        items.append({"stem": f"vary-{kick[0]}-{i:02d}", "kind": "vary", "seed": 200 + i,
                      "sources": [kick[0]], "amount": 0.5,
                      "nearest": {"name": kick[0], "distance": 0.5, "distance_ratio": 0.8}})
    for i in range(4):  # interpolate snare -> kick: velocity layers in a kit
        items.append({"stem": f"interpolate-{snare[0]}-to-{kick[1]}-{i:02d}", "kind": "interpolate",
                      "seed": 300 + i, "sources": [snare[0], kick[1]], "path": "slerp", "step": i,
                      "nearest": {"name": snare[0] if i < 2 else kick[1], "distance": 1.0,
                                  "distance_ratio": 1.1 + i}})
    return items


def make_listen_kit(root: Path) -> ListenKit:
    """The library, its bank, and two rendered output folders with manifests."""
    from pipeline.bank import open_bank
    from pipeline.config import load_settings
    from pipeline.ingest import ingest_folder
    from pipeline.render import render_spectra

    root = Path(root)
    src = make_library(root)
    settings = load_settings("tiny", {"render": {"iterations": 4}})
    ingest_folder(src, root / "bank", settings, jobs=1)
    bank = open_bank(root / "bank")
    names = bank.names
    cats = [c["category"] for c in bank.clips]
    items = _items(names, cats)
    rows = [i % len(bank) for i in range(len(items))]
    # levels spread over about 20 dB so that loudness matching has something to do
    shift = np.linspace(0.0, 0.2, len(items))[:, None, None]
    U = np.clip(np.asarray(bank.spectra[rows], dtype=np.float32) - shift, 0, 1)
    extra = {"model": {"path": str(root / "model.pt"), "sha256": "0" * 64},
             "settings": settings.to_dict(), "request": {"command": "generate"}}
    render_spectra([(U, items)], root / "long", settings.audio, settings.render,
                   manifest_extra=extra)
    short = load_settings("tiny", {"audio": {"duration": 0.25}, "render": {"iterations": 4}})
    a = short.audio
    Us = np.clip(np.asarray(bank.spectra[:2, :, : a.n_frames], dtype=np.float32), 0, 1)
    short_items = [{"stem": f"short-{i}", "kind": "generate", "seed": i, "sources": [],
                    "nearest": {"name": names[-1], "distance": 2.0, "distance_ratio": 1.5}}
                   for i in range(2)]
    render_spectra([(Us, short_items)], root / "short", a, short.render,
                   manifest_extra=extra | {"settings": short.to_dict()})
    return ListenKit(src, root / "bank", root / "long", root / "short", names)
