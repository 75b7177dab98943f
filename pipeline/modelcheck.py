"""The whole structure of a loaded model file, checked before anything uses it.

:func:`check_payload` takes the dict ``torch.load(..., weights_only=True)`` returned and
refuses, in one line naming the file, every field of the wrong type or shape, every
non-finite number (bit rot in a code or a weight), log-variances no trained encoder
gives, split rows outside the clips, and weights that no longer match their stored
checksum. The weights' shapes against the settings are checked in :mod:`pipeline.modelfile`.
"""

from __future__ import annotations

import hashlib
import math
from pathlib import Path
from typing import Any

import torch

from pipeline.errors import ModelFileError

# The encoder bounds log-variances softly to +-10 (model.py); a stored one beyond +-30 is
# e^15 times any trained value's spread and overflows when the sampler squares it.
MAX_ABS_LOGVAR = 30.0
MAX_HISTORY = 10_000_000  # epochs; a list longer than this is not one a run wrote


def weights_checksum(state_dict: dict[str, torch.Tensor], mu: torch.Tensor,
                     logvar: torch.Tensor) -> str:
    """SHA-256 over every weight and code (name, dtype, shape, bytes), in name order."""
    h = hashlib.sha256()
    tensors = {**{f"state_dict.{k}": v for k, v in state_dict.items()},
               "mu": mu, "logvar": logvar}
    for name in sorted(tensors):
        t = tensors[name].detach().cpu().contiguous()
        h.update(f"{name}|{t.dtype}|{tuple(t.shape)}|".encode())
        h.update(t.view(torch.uint8).numpy().tobytes() if t.numel() else b"")
    return h.hexdigest()


def _fail(path: Path, what: str) -> None:
    raise ModelFileError(f"{path}: damaged model file ({what})")


def _finite_number(x: Any) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x)


def _plain_record(path: Path, rec: Any, what: str) -> None:
    """A dict of str keys whose values are finite numbers, text, booleans or None."""
    if not isinstance(rec, dict):
        _fail(path, f"{what} is {type(rec).__name__}, not a mapping")
    for k, v in rec.items():
        if not isinstance(k, str):
            _fail(path, f"{what} has a key {k!r} that is not text")
        if isinstance(v, (str, bool)) or v is None:
            continue
        if not _finite_number(v):
            _fail(path, f"{what}.{k} is {v!r}, not a finite number")


def _text_list(path: Path, items: Any, what: str, *, none_ok: bool = False) -> list:
    if not isinstance(items, list):
        _fail(path, f"{what} is {type(items).__name__}, not a list")
    for x in items:
        if not (isinstance(x, str) and x) and not (none_ok and x is None):
            _fail(path, f"{what} holds {x!r}, not a name")
    return items


def check_payload(path: Path, p: dict[str, Any], n_dim: int) -> None:
    """Raise :class:`ModelFileError` naming ``path`` unless every field is well formed."""
    history = p["history"]
    if not isinstance(history, list) or len(history) > MAX_HISTORY:
        _fail(path, "history is not a list of epochs")
    for i, rec in enumerate(history):
        _plain_record(path, rec, f"history[{i}]")
    _plain_record(path, p["best"], "best")
    bank = p.get("bank", {})
    _plain_record(path, bank, "bank")
    for key, kind in (("path", str), ("names_sha256", str), ("n_clips", int)):
        if key in bank and not isinstance(bank[key], kind):
            _fail(path, f"bank.{key} is {bank[key]!r}")
    names = _text_list(path, p["clip_names"], "clip_names")
    if len(set(names)) != len(names):
        _fail(path, "clip_names repeats a name")
    categories = _text_list(path, p["categories"], "categories")
    cats = _text_list(path, p["clip_categories"], "clip_categories", none_ok=True)
    if not set(c for c in cats if c) <= set(categories):
        _fail(path, "clip_categories names a category the model does not list")
    for key in ("mu", "logvar"):
        t = p[key]
        if isinstance(t, torch.Tensor) and (not t.is_floating_point()
                                            or not bool(torch.isfinite(t).all())):
            _fail(path, f"{key} holds non-finite or non-numeric codes")
    lv = p["logvar"]
    if isinstance(lv, torch.Tensor) and lv.numel() and float(lv.abs().max()) > MAX_ABS_LOGVAR:
        _fail(path, f"logvar reaches {float(lv.abs().max()):.3g}; no encoder gives more than "
                    f"{MAX_ABS_LOGVAR:g}")
    split = p["split"]
    if not isinstance(split, dict) or not {"train", "val"} <= set(split):
        _fail(path, "split needs train and val rows")
    for k, rows in split.items():
        if not isinstance(rows, torch.Tensor) or rows.is_floating_point() or rows.ndim != 1 \
                or (rows.numel() and not (0 <= int(rows.min()) and int(rows.max()) < len(names))):
            _fail(path, f"split.{k} is not a list of clip rows")
    state = p["state_dict"]
    if isinstance(state, dict):
        for k, t in state.items():
            if isinstance(t, torch.Tensor) and t.is_floating_point() \
                    and not bool(torch.isfinite(t).all()):
                _fail(path, f"weight {k} holds NaN or infinite values")
    stored = p.get("checksum")
    if stored is not None and isinstance(state, dict) and all(
            isinstance(t, torch.Tensor) for t in (*state.values(), p["mu"], p["logvar"])):
        if stored != weights_checksum(state, p["mu"], p["logvar"]):
            _fail(path, "its weights or codes changed after it was written: checksum mismatch")
