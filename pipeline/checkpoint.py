"""The training checkpoint ``MODEL.ckpt``: where a run stands, written and read in one place.

It sits beside the model file and shares its archive format (:mod:`pipeline.modelfile`:
``torch.save`` of plain data and tensors, written atomically, read with
``weights_only=True``). Keys:

``format``, ``tool``, ``kind`` (``"checkpoint"``)
    as in the model file.
``settings``, ``bank``
    the run's resolved settings and the bank fingerprint (``path``, ``n_clips``,
    ``names_sha256``); a resume must match their ``audio`` and ``model`` tables and the bank.
``state``
    :class:`TrainState` as plain data (see :meth:`TrainState.to_dict`).
``rng``
    ``{"torch": ..., "cuda": ... or None}``: the generator states (the
    reparameterisation noise no longer draws from them: it is keyed by seed, epoch and
    clip, :func:`pipeline.dataset.clip_noise`; a resume restores them all the same).
``model_state``, ``optimizer_state``
    the current weights and AdamW's moments.
``best_state``, ``best_mu``, ``best_logvar``
    the kept weights and their clip codes (None before the first epoch ends).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import torch

from pipeline.config import Settings
from pipeline.errors import ModelFileError, TrainingError
from pipeline.modelfile import FORMAT_VERSION, TOOL, read_archive, save_atomic

CHECKPOINT_SUFFIX = ".ckpt"


def checkpoint_path(model_path: str | Path) -> Path:
    """``MODEL.ckpt`` beside the model file."""
    p = Path(model_path)
    return p.with_name(p.name + CHECKPOINT_SUFFIX)


@dataclass
class TrainState:
    """Where a run stands: all that changes from step to step besides weights and optimiser.

    A resumed run restores it and continues exactly where the interrupted one stopped.
    """

    train_rows: np.ndarray  # int64 bank rows of the training split
    val_rows: np.ndarray  # int64 bank rows held out for validation (may be empty)
    epoch: int = 0  # epochs completed
    clips_done: int = 0  # training clips seen in the epoch under way
    sums: list[float] = field(default_factory=lambda: [0.0, 0.0, 0.0])  # loss, recon, KL x clips
    history: list[dict[str, Any]] = field(default_factory=list)  # one row per completed epoch
    best: dict[str, Any] | None = None  # the kept epoch: "epoch" and its validation metrics
    since_best: int = 0  # completed epochs since the kept one
    seconds: float = 0.0  # time spent in epochs, over every run

    def to_dict(self) -> dict[str, Any]:
        """Plain data for the checkpoint (the split as int64 tensors)."""
        return {
            "epoch": self.epoch, "clips_done": self.clips_done, "sums": list(self.sums),
            "history": [dict(h) for h in self.history], "best": self.best,
            "since_best": self.since_best, "seconds": self.seconds,
            "split": {"train": torch.as_tensor(self.train_rows),
                      "val": torch.as_tensor(self.val_rows)},
        }

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> TrainState:
        split = d["split"]
        return cls(
            train_rows=np.asarray(split["train"], dtype=np.int64),
            val_rows=np.asarray(split["val"], dtype=np.int64),
            epoch=int(d["epoch"]), clips_done=int(d["clips_done"]),
            sums=[float(s) for s in d["sums"]], history=list(d["history"]), best=d["best"],
            since_best=int(d["since_best"]), seconds=float(d["seconds"]),
        )


@dataclass
class Kept:
    """The weights of the best epoch so far and every bank clip's posterior under them."""

    weights: dict[str, torch.Tensor]  # CPU copies
    mu: np.ndarray  # float32 (n_clips, latent_dim)
    logvar: np.ndarray


@dataclass
class Checkpoint:
    """A checkpoint read back: see the module docstring for what each part is."""

    state: TrainState
    model_state: dict[str, torch.Tensor]
    optimizer_state: dict[str, Any]
    kept: Kept | None
    rng: dict[str, Any]


def save_checkpoint(
    path: Path,
    *,
    settings: Settings,
    bank: dict[str, Any],
    state: TrainState,
    model_state: dict[str, torch.Tensor],
    optimizer_state: dict[str, Any],
    kept: Kept | None,
    rng: dict[str, Any],
) -> None:
    """Write everything needed to continue exactly (atomic)."""
    save_atomic({
        "format": FORMAT_VERSION, "tool": TOOL, "kind": "checkpoint",
        "settings": settings.to_dict(), "bank": dict(bank), "state": state.to_dict(),
        "rng": rng,
        "model_state": {k: v.detach().cpu().clone() for k, v in model_state.items()},
        "optimizer_state": optimizer_state,
        "best_state": None if kept is None else kept.weights,
        "best_mu": None if kept is None else torch.as_tensor(kept.mu),
        "best_logvar": None if kept is None else torch.as_tensor(kept.logvar),
    }, path)


def _read_checkpoint(path: Path, *, settings: Settings, bank: dict[str, Any]) -> Checkpoint:
    """Read a checkpoint and refuse one made with other audio or model settings or another bank.

    Raises
    ------
    ModelFileError
        Not a readable shotsmith checkpoint (see :func:`pipeline.modelfile.read_archive`).
    TrainingError
        The checkpoint does not fit ``settings`` or ``bank``.
    """
    ckpt, _ = read_archive(path, kind="checkpoint")
    new = settings.to_dict()
    for table in ("audio", "model"):
        diff = [f"{table}.{k} is {new[table].get(k)!r} here but {v!r} in the checkpoint"
                for k, v in ckpt["settings"][table].items() if new[table].get(k) != v]
        if diff:
            raise TrainingError(
                f"{path}: cannot resume with different {table} settings ({'; '.join(diff)}); "
                "pass the same settings, or train afresh without --resume"
            )
    if ckpt["bank"]["names_sha256"] != bank["names_sha256"]:
        raise TrainingError(f"{path}: the bank {bank['path']} has changed since this "
                            "checkpoint; train afresh without --resume")
    kept = None
    if ckpt["best_state"] is not None:
        kept = Kept(ckpt["best_state"], ckpt["best_mu"].numpy(), ckpt["best_logvar"].numpy())
    return Checkpoint(
        state=TrainState.from_dict(ckpt["state"]), model_state=ckpt["model_state"],
        optimizer_state=ckpt["optimizer_state"], kept=kept, rng=ckpt["rng"],
    )


def load_checkpoint(path: Path, *, settings: Settings, bank: dict[str, Any]) -> Checkpoint:
    """:func:`_read_checkpoint`, with a checkpoint whose fields have the wrong type or shape
    (damaged or hand-made) refused in one line naming it, as model files are."""
    try:
        ckpt = _read_checkpoint(path, settings=settings, bank=bank)
        ok = (isinstance(ckpt.model_state, dict) and isinstance(ckpt.optimizer_state, dict)
              and isinstance(ckpt.rng, dict) and isinstance(ckpt.rng.get("torch"), torch.Tensor)
              and all(isinstance(h, dict) for h in ckpt.state.history)
              and isinstance(ckpt.state.best, (dict, type(None))))
    except (KeyError, TypeError, ValueError, AttributeError, IndexError) as exc:
        first = (str(exc).strip().splitlines() or [type(exc).__name__])[0][:120]
        raise ModelFileError(f"{path}: damaged training checkpoint ({first}); "
                             "train afresh without --resume") from None
    if not ok:
        raise ModelFileError(f"{path}: damaged training checkpoint (weights, optimizer, random "
                             "state or history of the wrong type); train afresh without --resume")
    return ckpt
