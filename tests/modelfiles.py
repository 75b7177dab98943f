"""Model files made in a moment, without training: an untrained network with made-up codes.

Enough for the commands that load a model (generate, interpolate, vary, inspect) to run their
whole path, and the starting point for the damaged and hostile model files of the safety tests.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from pipeline.config import Settings


def model_dict(settings: Settings, *, n_clips: int = 6, seed: int = 0) -> dict:
    """The payload of a valid model file: random weights, codes spread like the prior."""
    import torch

    from pipeline.model import build_model
    from pipeline.modelfile import model_payload

    torch.manual_seed(seed)
    net = build_model(settings.audio, settings.model)
    rng = np.random.default_rng(seed)
    d = settings.model.latent_dim
    cats = ["kick" if i % 2 == 0 else "hat" for i in range(n_clips)]
    return model_payload(
        settings=settings,
        state_dict=net.state_dict(),
        history=[{"epoch": 1, "train_loss": 1.0, "val_loss": 1.0}],
        best={"epoch": 1, "val_loss": 1.0, "val_recon": 1.0, "val_kl": 0.0, "val_rms_db": 1.0},
        clip_names=[f"{c}_{i:02d}" for i, c in enumerate(cats)],
        clip_categories=cats,
        mu=rng.standard_normal((n_clips, d)),
        logvar=np.full((n_clips, d), -2.0),
        split={"train": np.arange(n_clips - 1), "val": np.array([n_clips - 1])},
        bank={"path": "nowhere", "n_clips": n_clips, "names_sha256": ""},
    )


def write_model_file(path: Path, settings: Settings, **kw) -> Path:
    from pipeline.modelfile import save_atomic

    path = Path(path)
    save_atomic(model_dict(settings, **kw), path)
    return path


def small_preset(folder: Path, **values) -> Path:
    """presets/tiny.toml with some keys set (``width=32, depth=2`` by default), as a file in
    ``folder``; each key must exist in the preset exactly once."""
    import re

    values = {"width": 32, "depth": 2} | values
    text = (Path(__file__).resolve().parents[1] / "presets" / "tiny.toml").read_text("utf-8")
    for key, value in values.items():
        text, n = re.subn(rf"(?m)^{key}\s*=\s*[^#\n]*", f"{key} = {value!r} ", text)
        assert n == 1, f"{key} appears {n} times in tiny.toml"
    path = Path(folder) / "small.toml"
    path.write_text(text, encoding="utf-8")
    return path
