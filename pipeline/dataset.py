"""Feeding the bank to training: the split, a torch Dataset, a seeded sampler.

:class:`SpectraDataset` reads rows of the bank's memory map; :class:`EpochSampler`
is reseeded per epoch like ``DistributedSampler``, so a sampler per rank can take
its place when ``torch.distributed`` wraps training.
"""

from __future__ import annotations

import numpy as np
import torch
from torch.utils.data import DataLoader, Dataset, Sampler


def split_indices(
    categories: list[str | None], *, val_fraction: float, seed: int
) -> tuple[np.ndarray, np.ndarray]:
    """Deterministic train/validation split of bank rows, stratified by category.

    Each category (clips without one form their own group) gives
    ``round(n * val_fraction)`` clips to validation but keeps at least one for
    training. With ``val_fraction > 0`` and two or more clips, at least one clip is
    held out. Returns sorted int64 ``(train, val)``.
    """
    rng = np.random.default_rng(seed)
    groups: dict[str | None, list[int]] = {}
    for i, c in enumerate(categories):
        groups.setdefault(c, []).append(i)
    val: list[int] = []
    for key in sorted(groups, key=lambda c: (c is None, c or "")):
        rows = rng.permutation(np.asarray(groups[key]))
        k = min(int(round(len(rows) * val_fraction)), len(rows) - 1)
        val.extend(rows[:k].tolist())
    n = len(categories)
    if val_fraction > 0 and not val and n >= 2:
        val = [int(rng.integers(n))]
    val_arr = np.sort(np.asarray(val, dtype=np.int64))
    train_arr = np.setdiff1d(np.arange(n, dtype=np.int64), val_arr)
    return train_arr, val_arr


class SpectraDataset(Dataset):
    """Rows of a bank's (memory-mapped) spectra as float32 tensors ``(bins, frames)``.

    A batch (``__getitems__``) is ``(spectra, rows)``: the bank rows come with it, so
    the training loop can key each clip's noise by its row.
    """

    def __init__(self, spectra: np.ndarray, rows: np.ndarray | None = None) -> None:
        self.spectra = spectra
        self.rows = np.arange(len(spectra)) if rows is None else np.asarray(rows, dtype=np.int64)

    def __len__(self) -> int:
        return len(self.rows)

    def __getitem__(self, i: int) -> torch.Tensor:
        # np.array copies: a float32 bank's row is a read-only view of the memory map, and
        # torch warns about tensors over read-only memory
        return torch.from_numpy(np.array(self.spectra[self.rows[i]], dtype=np.float32))

    def __getitems__(self, items: list[int]) -> tuple[torch.Tensor, np.ndarray]:
        # one read per batch instead of one per clip, in increasing row order (a memory
        # map reads forward), then put back in the sampler's order
        rows = self.rows[items]
        order = np.argsort(rows, kind="stable")
        x = np.empty((len(rows), *self.spectra.shape[1:]), dtype=np.float32)
        x[order] = self.spectra[rows[order]]
        return torch.from_numpy(x), rows


def mean_spectrogram(spectra: np.ndarray, rows: np.ndarray, *, chunk: int = 32) -> torch.Tensor:
    """Mean of ``spectra[rows]`` as float32 ``(bins, frames)``, read in chunks (a chunk of
    32 float64 ``drums`` clips is 23 MB; 256 made setup the run's peak)."""
    total = np.zeros(spectra.shape[1:], dtype=np.float64)
    for i in range(0, len(rows), chunk):
        total += np.asarray(spectra[rows[i : i + chunk]], dtype=np.float64).sum(axis=0)
    return torch.from_numpy((total / max(len(rows), 1)).astype(np.float32))


def _keep_batch(batch: torch.Tensor) -> torch.Tensor:
    return batch


_GOLDEN = np.uint64(0x9E3779B97F4A7C15)


def _splitmix64(x: np.ndarray) -> np.ndarray:
    """The SplitMix64 finaliser (Steele, Lea & Flood 2014), elementwise on uint64."""
    x = x + _GOLDEN
    x = (x ^ (x >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
    x = (x ^ (x >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
    return x ^ (x >> np.uint64(31))


def clip_noise(seed: int, epoch: int, rows: np.ndarray, dim: int) -> np.ndarray:
    """Standard normal noise ``(len(rows), dim)`` float32 keyed by ``(seed, epoch, row)``.

    Counter-based: a clip's noise depends on nothing else, not on which process
    trains it, the batch it falls in or what was drawn before, so a run split over
    ranks, resumed mid-epoch or run in one process draws the same reparameterisation
    noise. Uniforms from SplitMix64 hashes of the key and a counter, then Box-Muller
    (Box & Muller 1958).
    """
    with np.errstate(over="ignore"):
        key = _splitmix64(_splitmix64(np.full(len(rows), seed, dtype=np.uint64))
                          ^ np.uint64(epoch))
        key = _splitmix64(key ^ np.asarray(rows, dtype=np.uint64))
        half = (dim + 1) // 2
        counter = np.arange(1, 2 * half + 1, dtype=np.uint64) * _GOLDEN
        bits = _splitmix64(key[:, None] ^ counter[None, :])
    u = ((bits >> np.uint64(11)).astype(np.float64) + 0.5) * 2.0**-53  # (0, 1)
    r = np.sqrt(-2.0 * np.log(u[:, :half]))
    angle = 2.0 * np.pi * u[:, half:]
    z = np.concatenate([r * np.cos(angle), r * np.sin(angle)], axis=1)[:, :dim]
    return z.astype(np.float32)


class EpochSampler(Sampler[int]):
    """A shuffled order that depends only on ``(seed, epoch)``; ``start`` skips clips.

    Seeding per epoch makes a resumed run take the same batches as an
    uninterrupted one, with no sampler state to save. With ``world > 1`` rank
    ``rank`` takes every ``world``-th clip of what is left from ``start`` (like
    ``DistributedSampler``, without padding): with a per-rank batch of
    ``global batch / world`` the ranks' k-th batches together are exactly the k-th
    global batch of one process, whatever the world size, so ``start`` (clips of the
    whole run done this epoch) resumes with any number of ranks.
    """

    def __init__(self, n: int, *, seed: int, shuffle: bool = True, rank: int = 0,
                 world: int = 1) -> None:
        self.n, self.seed, self.shuffle = n, seed, shuffle
        self.rank, self.world = rank, world
        self.epoch, self.start = 0, 0

    def set_epoch(self, epoch: int, start: int = 0) -> None:
        self.epoch, self.start = epoch, start

    def __iter__(self):
        order = np.arange(self.n)
        if self.shuffle:
            order = np.random.default_rng([self.seed, self.epoch]).permutation(self.n)
        return iter(order[self.start + self.rank :: self.world].tolist())

    def __len__(self) -> int:
        return len(range(self.start + self.rank, self.n, self.world))


def make_loader(
    dataset: Dataset, sampler: Sampler, *, batch_size: int, device: torch.device
) -> DataLoader:
    """Batches of ``dataset`` in ``sampler``'s order, on the calling process."""
    return DataLoader(
        dataset,
        batch_size=batch_size,
        sampler=sampler,
        collate_fn=_keep_batch,
        num_workers=0,
        pin_memory=device.type == "cuda",
        # its own generator: creating an iterator must not draw from torch's global
        # one, or a resumed run would take different reparameterisation noise
        generator=torch.Generator().manual_seed(0),
    )
