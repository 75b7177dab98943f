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
    """Rows of a bank's (memory-mapped) spectra as float32 tensors ``(bins, frames)``."""

    def __init__(self, spectra: np.ndarray, rows: np.ndarray | None = None) -> None:
        self.spectra = spectra
        self.rows = np.arange(len(spectra)) if rows is None else np.asarray(rows, dtype=np.int64)

    def __len__(self) -> int:
        return len(self.rows)

    def __getitem__(self, i: int) -> torch.Tensor:
        # np.array copies: a float32 bank's row is a read-only view of the memory map, and
        # torch warns about tensors over read-only memory
        return torch.from_numpy(np.array(self.spectra[self.rows[i]], dtype=np.float32))

    def __getitems__(self, items: list[int]) -> torch.Tensor:
        # one fancy-indexed read per batch instead of one per clip
        return torch.from_numpy(np.array(self.spectra[self.rows[items]], dtype=np.float32))


def mean_spectrogram(spectra: np.ndarray, rows: np.ndarray, *, chunk: int = 256) -> torch.Tensor:
    """Mean of ``spectra[rows]`` as float32 ``(bins, frames)``, read in chunks."""
    total = np.zeros(spectra.shape[1:], dtype=np.float64)
    for i in range(0, len(rows), chunk):
        total += np.asarray(spectra[rows[i : i + chunk]], dtype=np.float64).sum(axis=0)
    return torch.from_numpy((total / max(len(rows), 1)).astype(np.float32))


def _keep_batch(batch: torch.Tensor) -> torch.Tensor:
    return batch


class EpochSampler(Sampler[int]):
    """A shuffled order that depends only on ``(seed, epoch)``; ``start`` skips clips.

    Seeding per epoch makes a resumed run take the same batches as an
    uninterrupted one, with no sampler state to save.
    """

    def __init__(self, n: int, *, seed: int, shuffle: bool = True) -> None:
        self.n, self.seed, self.shuffle = n, seed, shuffle
        self.epoch, self.start = 0, 0

    def set_epoch(self, epoch: int, start: int = 0) -> None:
        self.epoch, self.start = epoch, start

    def __iter__(self):
        order = np.arange(self.n)
        if self.shuffle:
            order = np.random.default_rng([self.seed, self.epoch]).permutation(self.n)
        return iter(order[self.start :].tolist())

    def __len__(self) -> int:
        return self.n - self.start


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
