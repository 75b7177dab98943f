"""What a model file holds: its clips and categories, and how it was trained.

:func:`model_info` reads a model file (:func:`pipeline.modelfile.load_model_file`, so a
damaged file fails with the same one-line errors) into a plain dict; ``shotsmith info``
prints it as text (:func:`format_info`) or as JSON.
"""

from __future__ import annotations

import math
from collections import Counter
from pathlib import Path
from typing import Any

NO_CATEGORY = "(none)"  # clips directly in the library folder
NAMES_SHOWN = 200  # the text lists every clip name up to this many clips


def _number(x: Any) -> float | None:
    """A finite float, else None (JSON has no NaN)."""
    return float(x) if isinstance(x, (int, float)) and math.isfinite(x) else None


def model_info(model) -> dict[str, Any]:
    """Clips, categories (names, counts) and training settings of a model file.

    ``model`` is a path or a loaded :class:`~pipeline.modelfile.ModelFile`. Keys: ``model``,
    ``sha256``, ``preset``, ``sample_rate``, ``duration``, ``latent_dim``, ``epochs``
    (the preset's limit), ``epochs_trained``, ``best_epoch``, ``best_val_loss``, ``beta``,
    ``decoder_variance``, ``sampler`` (stored, or fitted on load), ``bank``, ``n_clips``,
    ``categories`` (``[{"name", "clips"}]``, clips directly in the library as
    ``(none)``), ``clips`` (``[{"name", "category", "path"}]``).
    """
    from pipeline.modelfile import ModelFile, load_model_file

    mf = model if isinstance(model, ModelFile) else load_model_file(Path(model))
    s = mf.settings
    counts = Counter(c or NO_CATEGORY for c in mf.clip_categories)
    paths = mf.clip_paths or [None] * len(mf.clip_names)
    epochs = [h.get("epoch") for h in mf.history if isinstance(h.get("epoch"), int)]
    return {
        "model": str(mf.path),
        "sha256": mf.sha256,
        "preset": s.preset,
        "sample_rate": s.audio.sample_rate,
        "duration": s.audio.duration,
        "latent_dim": s.model.latent_dim,
        "epochs": s.train.epochs,
        "epochs_trained": max(epochs, default=len(mf.history)),
        "best_epoch": mf.best.get("epoch"),
        "best_val_loss": _number(mf.best.get("val_loss")),
        "beta": s.train.beta,
        "decoder_variance": s.train.decoder_variance,
        "sampler": "stored" if mf.stored_samplers is not None else "fitted on load",
        "bank": mf.bank.get("path"),
        "n_clips": len(mf.clip_names),
        "categories": [{"name": c, "clips": counts[c]}
                       for c in sorted(counts, key=lambda c: (c == NO_CATEGORY, c))],
        "clips": [{"name": n, "category": c, "path": p}
                  for n, c, p in zip(mf.clip_names, mf.clip_categories, paths)],
    }


def format_info(info: dict[str, Any]) -> str:
    """The text ``shotsmith info`` prints."""
    loss = info["best_val_loss"]
    lines = [
        f"{info['model']}: {info['n_clips']} clips in {len(info['categories'])} categories",
        f"preset {info['preset']}; {info['sample_rate']} Hz, {info['duration']:g} s clips; "
        f"latent size {info['latent_dim']}",
        f"trained {info['epochs_trained']} of {info['epochs']} epochs; best validation loss "
        + (f"{loss:.4g} at epoch {info['best_epoch']}" if loss is not None else "not recorded"),
        "",
        "category        clips",
    ]
    lines += [f"{c['name']:<15} {c['clips']:>5}" for c in info["categories"]]
    clips = info["clips"]
    if clips:
        shown = clips[:NAMES_SHOWN]
        more = (f" (first {NAMES_SHOWN} of {len(clips)}; --json lists all)"
                if len(clips) > NAMES_SHOWN else "")
        lines += ["", f"clips{more}:"]
        by_cat: dict[str, list[str]] = {}
        for c in shown:
            by_cat.setdefault(c["category"] or NO_CATEGORY, []).append(c["name"])
        for cat in sorted(by_cat, key=lambda c: (c == NO_CATEGORY, c)):
            lines.append(f"  {cat}: {', '.join(by_cat[cat])}")
    return "\n".join(lines)
