"""Data-parallel training under ``torchrun``: who this process is, and the collectives.

``torchrun --nproc-per-node N -m pipeline train ...`` starts N copies of the command
with ``RANK``, ``WORLD_SIZE``, ``LOCAL_RANK``, ``LOCAL_WORLD_SIZE``, ``MASTER_ADDR`` and
``MASTER_PORT`` set (torch.distributed's ``env://`` rendezvous); :func:`ranks_from_env`
reads them, :func:`start` joins the process group (gloo on CPUs, NCCL on GPUs).
Every collective here runs on every rank in the same order: a rank that skipped one
would leave the others waiting, so decisions that can fail are taken by rank 0 and
shared (:func:`agree`).
"""

from __future__ import annotations

import os
from collections.abc import Callable
from dataclasses import dataclass
from datetime import timedelta
from typing import Any, TypeVar

import torch
import torch.distributed as dist

from pipeline.errors import ShotsmithError, TrainingError

T = TypeVar("T")


@dataclass(frozen=True)
class Ranks:
    """This process's place in the run: one process is rank 0 of a world of 1."""

    rank: int = 0
    world: int = 1
    local_rank: int = 0

    @property
    def active(self) -> bool:
        return self.world > 1

    @property
    def main(self) -> bool:
        return self.rank == 0


def ranks_from_env(environ: dict[str, str] | None = None) -> Ranks:
    """The ranks ``torchrun`` gave this process (a world of 1 outside it)."""
    env = os.environ if environ is None else environ
    try:
        world = int(env.get("WORLD_SIZE", "1"))
        rank = int(env.get("RANK", "0"))
        local = int(env.get("LOCAL_RANK", str(rank)))
    except ValueError:
        raise TrainingError("RANK, WORLD_SIZE and LOCAL_RANK must be integers "
                            "(set by torchrun)") from None
    if world < 1 or not 0 <= rank < world:
        raise TrainingError(f"RANK={rank} does not fit WORLD_SIZE={world} (set by torchrun)")
    return Ranks(rank=rank, world=world, local_rank=local)


def start(ranks: Ranks, device: torch.device, *, timeout_s: float = 1800.0) -> None:
    """Join the process group of ``ranks`` (nothing for a world of 1)."""
    if not ranks.active or dist.is_initialized():
        return
    if device.type == "cuda":
        torch.cuda.set_device(device)
    dist.init_process_group(backend="nccl" if device.type == "cuda" else "gloo",
                            rank=ranks.rank, world_size=ranks.world,
                            timeout=timedelta(seconds=timeout_s))


def stop(ranks: Ranks) -> None:
    if ranks.active and dist.is_initialized():
        dist.destroy_process_group()


def all_sum(values: list[float] | torch.Tensor, ranks: Ranks, device: torch.device
            ) -> torch.Tensor:
    """Elementwise sum over ranks of a few numbers (float64, on ``device``)."""
    t = torch.as_tensor(values, dtype=torch.float64, device=device).clone()
    if ranks.active:
        dist.all_reduce(t)
    return t


def batch_mean(ranks: Ranks, device: torch.device, weight: float = 1.0
               ) -> Callable[[torch.Tensor], torch.Tensor]:
    """The mean over the whole batch, every rank's share of it, of per-clip values.

    ``weight`` 0 marks a stand-in share that counts for nothing (a rank with no clip
    left in an epoch's last batch still steps with the others).
    """

    def mean(values: torch.Tensor) -> torch.Tensor:
        s = all_sum([float(values.sum()) * weight, len(values) * weight], ranks, device)
        return (s[0] / s[1].clamp(min=1.0)).to(values.dtype)

    return mean


def agree(ranks: Ranks, decide: Callable[[], T]) -> T:
    """Rank 0 runs ``decide``; every rank gets its result or raises its error."""
    if not ranks.active:
        return decide()
    box: list[Any] = [None]
    if ranks.main:
        try:
            box[0] = ("ok", decide())
        except ShotsmithError as exc:
            box[0] = ("error", exc)
    dist.broadcast_object_list(box, src=0)
    status, value = box[0]
    if status == "error":
        raise value
    return value


def together(ranks: Ranks, run: Callable[[], T]) -> T:
    """Every rank runs ``run``; if it fails on any rank, every rank raises that error."""
    if not ranks.active:
        return run()
    result, error = None, None
    try:
        result = run()
    except ShotsmithError as exc:
        error = exc
    errors: list[Any] = [None] * ranks.world
    dist.all_gather_object(errors, None if error is None else (type(error), str(error)))
    for r, e in enumerate(errors):
        if e is not None:
            if r == ranks.rank:
                raise error
            kind, msg = e
            raise kind(f"{msg} (on rank {r})")
    return result


def same_everywhere(ranks: Ranks, value: Any, what: str) -> None:
    """Refuse, on every rank, a ``value`` that differs between ranks."""
    if not ranks.active:
        return
    seen: list[Any] = [None] * ranks.world
    dist.all_gather_object(seen, value)
    odd = [r for r, v in enumerate(seen) if v != seen[0]]
    if odd:
        raise TrainingError(f"{what} differs between rank 0 and rank {odd[0]} "
                            "(every machine must see the same bank)")


def lost_peer(exc: BaseException) -> bool:
    """True for the error a collective raises when another rank has gone."""
    return isinstance(exc, getattr(dist, "DistError", RuntimeError)) or (
        isinstance(exc, RuntimeError) and any(w in str(exc) for w in (
            "Connection closed", "Connection reset", "Broken pipe", "gloo", "NCCL")))
