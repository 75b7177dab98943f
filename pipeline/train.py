"""Training: a bank in, one model file out.

The loop reads top to bottom in :func:`fit`:

1. a fresh :class:`~pipeline.checkpoint.TrainState` (the split, the output template
   started at the training mean) or the one restored from ``MODEL.ckpt``;
2. each epoch, :func:`train_epoch` takes one AdamW step per batch of a ``DataLoader``
   whose sampler is passed in (reseeded per epoch like ``DistributedSampler``), with
   the learning rate and KL weight from the pure :func:`schedule`;
3. :func:`validate` scores the held-out clips with their posterior means; an
   improvement keeps the weights and the clips' codes (:func:`keep`) and rewrites the
   model file; the checkpoint is rewritten every epoch and on Ctrl-C;
4. at the end the model file gets the whole history and the checkpoint is removed.

The loss is computed in one place, :func:`batch_loss`, for training and validation
alike. Every file write goes through :class:`RunFiles`, which writes nothing when
``enabled`` is false (the other ranks, when ``torch.distributed`` wraps this).
"""

from __future__ import annotations

import ctypes
import math
import shlex
import signal
import threading
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

import numpy as np
import torch

from pipeline.bank import Bank, open_bank, stored_settings
from pipeline.checkpoint import (
    Kept,
    TrainState,
    checkpoint_path,
    load_checkpoint,
    save_checkpoint,
)
from pipeline.config import Settings, TrainSpec, choose_settings
from pipeline.dataset import (
    EpochSampler,
    SpectraDataset,
    clip_noise,
    make_loader,
    mean_spectrogram,
    split_indices,
)
from pipeline.distributed import (
    Ranks,
    agree,
    all_sum,
    batch_mean,
    lost_peer,
    ranks_from_env,
    same_everywhere,
    together,
)
from pipeline.distributed import start as start_ranks
from pipeline.distributed import stop as stop_ranks
from pipeline.errors import OutputError, ParameterError, TrainingError
from pipeline.model import build_model, count_parameters, encode_all, init_template, vae_loss
from pipeline.modelfile import model_payload, names_digest, remove_stale_temporaries, save_atomic
from pipeline.outputs import refuse_library
from pipeline.runtime import default_threads
from pipeline.sampler import fit_samplers

__all__ = ["TrainSummary", "checkpoint_path", "kl_weight_at", "lr_at", "schedule", "train_model"]

KEEP_FREED_BUFFERS = True  # train_model calls keep_freed_buffers() (measured: +16 % clips/s)
Emit = Callable[[dict[str, Any]], None]


# --- the schedule (pure) ------------------------------------------------------------------


def lr_at(
    epoch: float, *, learning_rate: float, warmup_epochs: float, epochs: float,
    min_lr_ratio: float,
) -> float:
    """Learning rate after ``epoch`` (fractional) epochs.

    Linear warm-up from ``learning_rate * min_lr_ratio`` to ``learning_rate``, then
    cosine decay back to ``learning_rate * min_lr_ratio`` at ``epochs`` (cosine
    annealing without restarts, Loshchilov & Hutter 2017, "SGDR").
    """
    low = learning_rate * min_lr_ratio
    if epoch < warmup_epochs:
        return low + (learning_rate - low) * epoch / warmup_epochs
    span = max(epochs - warmup_epochs, 1e-9)
    t = min(max((epoch - warmup_epochs) / span, 0.0), 1.0)
    return low + (learning_rate - low) * 0.5 * (1.0 + math.cos(math.pi * t))


def kl_weight_at(epoch: float, *, beta: float, warmup_epochs: float) -> float:
    """KL weight after ``epoch`` (fractional) epochs: 0 rising linearly to ``beta``.

    KL cost annealing, Bowman et al. 2016 ("Generating Sentences from a
    Continuous Space"): the encoder learns to carry information before the KL
    term can pull every posterior onto the prior.
    """
    if warmup_epochs <= 0:
        return float(beta)
    return float(beta) * min(1.0, max(0.0, epoch / warmup_epochs))


def schedule(epoch: float, t: TrainSpec) -> tuple[float, float]:
    """``(learning rate, KL weight)`` after ``epoch`` (fractional) epochs of ``t``'s schedule."""
    lr = lr_at(epoch, learning_rate=t.learning_rate, warmup_epochs=t.lr_warmup_epochs,
               epochs=t.epochs, min_lr_ratio=t.min_lr_ratio)
    return lr, kl_weight_at(epoch, beta=t.beta, warmup_epochs=t.kl_warmup_epochs)


# --- one batch, one epoch, one validation pass ----------------------------------------------


def batch_loss(
    model: torch.nn.Module, x: torch.Tensor, *, kl_weight: float, free_bits: float,
    loud_weight: float, calibrated: bool = False, sample: bool | None = None,
    eps: torch.Tensor | None = None, mean: Callable[[torch.Tensor], torch.Tensor] | None = None,
) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor, torch.Tensor]:
    """The objective on one batch, ``(loss, recon, kl, x_hat)``: the only place it is computed.

    ``sample`` and ``eps`` as in :meth:`~pipeline.model.ShotVAE.forward` (default: a
    reparameterised draw in training mode, the posterior mean in evaluation mode);
    ``mean`` as ``batch_mean`` of :func:`~pipeline.model.vae_loss` (ranks sharing a batch).
    """
    x_hat, mu, logvar, _ = model(x, sample=sample, eps=eps)
    loss, rec, kl = vae_loss(x_hat, x, mu, logvar, kl_weight=kl_weight, free_bits=free_bits,
                             loud_weight=loud_weight, calibrated=calibrated, batch_mean=mean)
    return loss, rec, kl, x_hat


class _Diverged(Exception):
    """The loss turned non-finite; :func:`train_model` reports it as a TrainingError."""


@dataclass
class Meter:
    """Clips stepped through and the seconds spent in optimiser steps, this run."""

    clips: int = 0
    step_seconds: float = 0.0


def train_epoch(
    model: torch.nn.Module, opt: torch.optim.Optimizer, loader: torch.utils.data.DataLoader,
    st: TrainState, t: TrainSpec, *, device: torch.device, stop: threading.Event,
    meter: Meter, on_batch: Callable[[], None], noise_dim: int, ranks: Ranks = Ranks(),
) -> None:
    """One optimiser step per batch of ``t.batch_size`` clips (the rest of epoch ``st.epoch``).

    Each clip's reparameterisation noise is keyed by (seed, epoch, bank row)
    (:func:`~pipeline.dataset.clip_noise`). Under ``torch.distributed`` (``model`` a
    ``DistributedDataParallel``) each rank's ``loader`` gives its share of every batch;
    a share's mean loss is scaled by ``share * world / batch`` so that the averaged
    gradient is the whole batch's, a rank with no clip left in a short last batch steps
    on a stand-in that counts for nothing, and the losses, the clip count and the stop
    flag are summed over ranks once per step (every rank stops at the same batch).

    Returns early, before the next batch, once ``stop`` is set. ``st.sums`` and
    ``st.clips_done`` (clips of the whole run) advance with every batch, so a checkpoint
    can resume mid-epoch, with any number of ranks.
    """
    n_train = len(st.train_rows)
    calibrated = t.decoder_variance == "calibrated"
    shares = iter(loader)
    for _ in range(math.ceil((n_train - st.clips_done) / t.batch_size)):
        if stop.is_set() and not ranks.active:
            return
        t0 = time.perf_counter()
        got = next(shares, None)
        weight = 1.0
        if got is None:  # this rank's share of the epoch's short last batch is empty
            ds = loader.dataset
            got, weight = ds.__getitems__([0]), 0.0
        x, rows = got
        lr, kl_weight = schedule(st.epoch + st.clips_done / n_train, t)
        for group in opt.param_groups:
            group["lr"] = lr
        eps = torch.from_numpy(clip_noise(t.seed, st.epoch, rows, noise_dim)).to(device)
        loss, rec, kl, _ = batch_loss(
            model, x.to(device, non_blocking=True), kl_weight=kl_weight, free_bits=t.free_bits,
            loud_weight=t.loud_weight, calibrated=calibrated, eps=eps,
            mean=batch_mean(ranks, device, weight) if ranks.active else None)
        n_here = len(rows) * weight
        step = [n_here * v for v in (loss.item(), rec.item(), kl.item())]
        step += [n_here, float(not math.isfinite(loss.item()) and weight > 0), float(stop.is_set())]
        if ranks.active:
            step = all_sum(step, ranks, device).tolist()
        if step[4]:
            raise _Diverged(f"the training loss became non-finite at epoch {st.epoch + 1}")
        if step[5]:  # some rank was asked to stop: all stop before this step
            stop.set()
            return
        n_batch = int(round(step[3]))
        scale = n_here * ranks.world / n_batch
        opt.zero_grad(set_to_none=True)
        (loss if scale == 1.0 else loss * scale).backward()
        opt.step()
        st.sums = [s + v for s, v in zip(st.sums, step[:3])]
        st.clips_done += n_batch
        meter.clips += n_batch
        meter.step_seconds += time.perf_counter() - t0
        on_batch()


@torch.no_grad()
def validate(
    model: torch.nn.Module, spectra: np.ndarray, rows: np.ndarray, t: TrainSpec, *,
    db_range: float, device: torch.device, batch_size: int = 128, ranks: Ranks = Ranks(),
) -> dict[str, float]:
    """Per-clip losses of ``spectra[rows]`` at the full KL weight ``beta``, z = posterior mean.

    Rows are read in chunks (the bank may be a memory map); under ``torch.distributed``
    each rank scores every ``world``-th row of each chunk and the sums are reduced, so
    every rank gets the figures of one process. ``val_rms_db`` is the unweighted RMS
    error of the [0, 1] spectrogram times ``db_range``.
    """
    model.eval()
    calibrated = t.decoder_variance == "calibrated"
    sums = np.zeros(5)  # loss, recon, kl, mse per clip, summed; clips
    for i in range(0, len(rows), batch_size):
        share = rows[i : i + batch_size][ranks.rank :: ranks.world]
        mean = batch_mean(ranks, device) if ranks.active else None
        if len(share) == 0:
            if mean is not None and calibrated:  # the chunk's variance is reduced over ranks
                mean(torch.zeros(0, device=device))
            continue
        x = torch.from_numpy(np.asarray(spectra[share], dtype=np.float32)).to(device)
        loss, rec, kl, x_hat = batch_loss(model, x, kl_weight=t.beta, free_bits=0.0,
                                          loud_weight=t.loud_weight, sample=False,
                                          calibrated=calibrated, mean=mean)
        mse = (x_hat - x).pow(2).mean()
        sums += len(x) * np.array([loss.item(), rec.item(), kl.item(), mse.item(), 1.0])
    if ranks.active:
        sums = all_sum(sums.tolist(), ranks, device).cpu().numpy()
    model.train()
    loss, rec, kl, mse = (float(v) for v in sums[:4] / max(sums[4], 1))
    return {"val_loss": loss, "val_recon": rec, "val_kl": kl, "val_rms_db": db_range * mse**0.5}


def keep(model: torch.nn.Module, spectra: np.ndarray, device: torch.device) -> Kept:
    """The current weights (CPU copies) and every bank clip's posterior under them."""
    weights = {k: v.detach().cpu().clone() for k, v in model.state_dict().items()}
    mu, logvar = encode_all(model, spectra, device=device)
    return Kept(weights, mu, logvar)


# --- files ----------------------------------------------------------------------------------


@dataclass
class RunFiles:
    """Every file a run writes: the model file and the checkpoint beside it (both atomic).

    With ``enabled`` false every call does nothing (a ``torch.distributed`` rank other than 0).
    """

    model_path: Path
    settings: Settings
    bank: Bank
    bank_info: dict[str, Any]  # path, n_clips, names_sha256
    enabled: bool = True

    @property
    def checkpoint(self) -> Path:
        return checkpoint_path(self.model_path)

    def save_model(self, st: TrainState, kept: Kept, *, final: bool = False) -> None:
        """The kept weights and codes with the history so far: what later commands load.

        The final save also carries the sampler fitted to the codes (the fit takes a
        second or so, too long for every improvement; a file saved earlier gets it fitted
        when it is loaded).
        """
        if not self.enabled:
            return
        cats = self.bank.categories_per_clip
        samplers = fit_samplers(kept.mu, cats) if final else None
        save_atomic(model_payload(
            settings=self.settings, state_dict=kept.weights, history=st.history, best=st.best,
            clip_names=self.bank.names, clip_categories=cats, mu=kept.mu, logvar=kept.logvar,
            split={"train": st.train_rows, "val": st.val_rows}, bank=self.bank_info,
            samplers=samplers, clip_paths=self.bank.paths),
            self.model_path)

    def save_checkpoint(self, st: TrainState, model: torch.nn.Module,
                        opt: torch.optim.Optimizer, kept: Kept | None) -> None:
        if not self.enabled:
            return
        dev = next(model.parameters()).device
        cuda = torch.cuda.get_rng_state(dev) if dev.type == "cuda" else None
        save_checkpoint(self.checkpoint, settings=self.settings, bank=self.bank_info, state=st,
                        model_state=model.state_dict(), optimizer_state=opt.state_dict(),
                        kept=kept, rng={"torch": torch.get_rng_state(), "cuda": cuda})

    def remove_checkpoint(self) -> None:
        if self.enabled:
            self.checkpoint.unlink(missing_ok=True)


# --- the run --------------------------------------------------------------------------------


@dataclass
class TrainSummary:
    """What a training run did; ``to_dict`` is the ``--json`` summary (no NaN in it).

    Losses are per clip: recon summed over bins x frames, KL summed over latent
    dimensions (nats); ``best_val_rms_db`` is the RMS error in dB. ``model`` is None
    (and the ``best_*`` fields too) while no epoch has finished: no model file exists.
    """

    model: str | None  # the model file, when one exists
    preset: str  # where the settings came from (a preset name or file)
    checkpoint: str | None  # the checkpoint to resume from, when the run was interrupted
    stopped: str  # "early stop", "max epochs", "interrupted"
    epochs: int  # completed in total, resumed runs included
    epochs_this_run: int
    best_epoch: int
    best_val_loss: float | None
    best_val_recon: float | None
    best_val_kl: float | None
    best_val_rms_db: float | None
    seconds: float  # this run
    clips_per_second: float  # training clips / this run's wall time (validation, saving included)
    train_clips_per_second: float  # training clips / time in optimiser steps only
    n_train: int
    n_val: int
    parameters: int
    device: str
    threads: int
    resume_command: str | None
    world_size: int = 1  # training processes (torchrun ranks)
    rank: int = 0  # this process's rank; only rank 0 writes files

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


def resume_command(bank_dir: Path, model_path: Path, settings: Settings) -> str:
    """The exact command that continues this run."""
    m, t = settings.model, settings.train
    parts = [
        "shotsmith", "train", str(bank_dir), "--model", str(model_path),
        "--preset", settings.preset, "--epochs", str(t.epochs),
        "--latent-dim", str(m.latent_dim), "--beta", repr(t.beta), "--seed", str(t.seed),
        "--resume",
    ]
    return " ".join(shlex.quote(p) for p in parts)


def make_optimizer(model: torch.nn.Module, t: TrainSpec) -> torch.optim.AdamW:
    """AdamW with no weight decay on biases and the template (common practice)."""
    groups: tuple[list, list] = ([], [])
    for name, param in model.named_parameters():
        groups[param.ndim < 2 or name == "template"].append(param)
    return torch.optim.AdamW([{"params": groups[0], "weight_decay": t.weight_decay},
                              {"params": groups[1], "weight_decay": 0.0}], lr=t.learning_rate)


def fresh_state(model: torch.nn.Module, bank: Bank, t: TrainSpec, device) -> TrainState:
    """A new run: the seeded stratified split, the template at the training clips' mean."""
    cats = bank.categories_per_clip
    train_rows, val_rows = split_indices(cats, val_fraction=t.val_fraction, seed=t.seed)
    init_template(model, mean_spectrogram(bank.spectra, train_rows).to(device))
    return TrainState(train_rows=train_rows, val_rows=val_rows)


def fit(
    model: torch.nn.Module, opt: torch.optim.Optimizer, st: TrainState, kept: Kept | None,
    sampler: EpochSampler, files: RunFiles, *, t: TrainSpec, db_range: float,
    device: torch.device, stop: threading.Event, emit: Emit, meter: Meter,
    trainer: torch.nn.Module | None = None, ranks: Ranks = Ranks(),
) -> tuple[str, Kept | None]:
    """Run epochs until ``t.epochs``, early stopping or ``stop``; ``(why it stopped, kept)``.

    ``trainer`` is what takes the training steps (``model`` wrapped in
    ``DistributedDataParallel`` under ``torch.distributed``); only rank 0 keeps codes.
    """
    spectra = files.bank.spectra
    loader = make_loader(SpectraDataset(spectra, st.train_rows), sampler,
                         batch_size=t.batch_size // ranks.world, device=device)
    # no held-out clip (tiny bank or val_fraction 0): validate on the training clips
    val_rows = st.val_rows if len(st.val_rows) else st.train_rows
    n_train, start = len(st.train_rows), st.epoch
    n_batches = math.ceil(n_train / t.batch_size)
    no_early_stop_before = max(t.kl_warmup_epochs, t.lr_warmup_epochs)  # the warm-ups

    def on_batch() -> None:
        done, e = st.clips_done, st.epoch
        emit({"event": "batch", "epoch": e + 1, "epochs": t.epochs,
              "batch": math.ceil(done / t.batch_size), "batches": n_batches,
              "train_loss": st.sums[0] / done, "recon": st.sums[1] / done,
              "kl": st.sums[2] / done,
              "val_loss": st.history[-1]["val_loss"] if st.history else None,
              "eta_seconds": ((t.epochs - e) * n_train - done) * meter.step_seconds / meter.clips})

    while st.epoch < t.epochs:
        if (st.best is not None and st.since_best >= t.patience
                and st.epoch >= no_early_stop_before):
            return "early stop", kept
        epoch_t0 = time.perf_counter()
        sampler.set_epoch(st.epoch, start=st.clips_done)
        train_epoch(trainer or model, opt, loader, st, t, device=device, stop=stop,
                    meter=meter, on_batch=on_batch, noise_dim=model.latent_dim, ranks=ranks)
        st.seconds += time.perf_counter() - epoch_t0
        if stop.is_set():
            files.save_checkpoint(st, model, opt, kept)
            return "interrupted", kept

        val = validate(model, spectra, val_rows, t, db_range=db_range, device=device,
                       ranks=ranks)
        if not math.isfinite(val["val_loss"]):
            raise _Diverged(f"the validation loss became non-finite at epoch {st.epoch + 1}")
        done = max(st.clips_done, 1)
        lr, kl_weight = schedule(st.epoch + 1, t)
        row = {"epoch": st.epoch + 1, "train_loss": st.sums[0] / done,
               "train_recon": st.sums[1] / done, "train_kl": st.sums[2] / done, **val,
               "lr": lr, "kl_weight": kl_weight, "seconds": time.perf_counter() - epoch_t0}
        st.history.append(row)
        improved = st.best is None or val["val_loss"] < st.best["val_loss"]
        if improved:
            st.best, st.since_best = {"epoch": st.epoch + 1, **val}, 0
            kept = keep(model, spectra, device) if ranks.main else None
            files.save_model(st, kept)
        else:
            st.since_best += 1
        st.epoch, st.clips_done, st.sums = st.epoch + 1, 0, [0.0, 0.0, 0.0]
        files.save_checkpoint(st, model, opt, kept)
        per_epoch = sum(h["seconds"] for h in st.history[start:]) / (st.epoch - start)
        emit({"event": "epoch", "epoch": st.epoch, "epochs": t.epochs,
              "train_loss": row["train_loss"], "val_loss": val["val_loss"],
              "recon": val["val_recon"], "kl": val["val_kl"], "val_rms_db": val["val_rms_db"],
              "lr": lr, "improved": improved, "best_val_loss": st.best["val_loss"],
              "seconds": row["seconds"], "eta_seconds": per_epoch * (t.epochs - st.epoch)})
    return "max epochs", kept


def finish(files: RunFiles, st: TrainState, kept: Kept) -> None:
    """After training: the model file gets the kept weights and codes with the whole
    history, and the checkpoint is no longer needed."""
    files.save_model(st, kept, final=True)
    files.remove_checkpoint()


MIN_CLIPS = 2  # generate, vary and inspect compare codes with each other: one is not enough


def train_model(
    bank_dir: str | Path,
    model_path: str | Path,
    settings: Settings | None = None,
    *,
    resume: bool = False,
    progress: Emit | None = None,
    device: str = "auto",
    interrupt: threading.Event | None = None,
    overwrite: bool = False,
    threads: int | None = None,
) -> TrainSummary:
    """Train the VAE on a bank and write the model file.

    Parameters
    ----------
    bank_dir : path
        A bank made by ``ingest``; its audio spec replaces ``settings.audio``.
    model_path : path
        The model file to write; the checkpoint goes to ``model_path + ".ckpt"``.
    settings : Settings, optional
        The ``model`` and ``train`` tables are used; all tables go into the model file.
        Default: the settings the bank was made with (its preset).
    resume : bool
        Continue from the checkpoint (same model settings and bank required). The
        ``train`` table of ``settings`` applies from there on (``epochs`` may grow).
    progress : callable, optional
        Receives dicts with ``event`` ("start", "batch", "epoch"), ``epoch`` (1-based),
        ``epochs``, ``train_loss``, ``val_loss``, ``recon``, ``kl``, ``eta_seconds``, ...
    device : str
        "auto" (CUDA when present), "cpu", "cuda", ... Under ``torchrun`` "auto" and
        "cuda" take the GPU numbered ``LOCAL_RANK``.
    interrupt : threading.Event, optional
        Set it to stop after the current batch and save the checkpoint. When None,
        Ctrl-C (SIGINT) in the main thread does this; a second Ctrl-C aborts at once.
    overwrite : bool
        Replace an existing model file instead of refusing.
    threads : int, optional
        CPU threads (default: :func:`pipeline.runtime.default_threads`, the available
        cores shared among the ranks on this machine).

    Under ``torchrun`` (``WORLD_SIZE`` > 1) this runs data-parallel on every rank:
    ``settings.train.batch_size`` is the whole batch, split evenly among the ranks;
    only rank 0 writes files and reports progress; a resume may use another number of
    ranks. A single process is a world of one.

    Returns
    -------
    TrainSummary
        ``stopped == "interrupted"`` after an interrupt: the checkpoint was saved and
        ``resume_command`` continues the run.

    Raises
    ------
    TrainingError
        A loss that turned non-finite (the last good model file is kept), or a
        checkpoint that does not fit the settings or the bank.
    OutputError
        The model file exists (without ``overwrite`` or ``resume``) or its folder does not.
    """
    started = time.perf_counter()
    bank_dir, model_path = Path(bank_dir), Path(model_path)
    ranks = ranks_from_env()
    dev = pick_device(device, ranks)
    start_ranks(ranks, dev)
    try:
        return _train(bank_dir, model_path, settings, ranks=ranks, dev=dev, resume=resume,
                      progress=progress, interrupt=interrupt, overwrite=overwrite,
                      threads=threads, started=started)
    finally:
        stop_ranks(ranks)


def _train(
    bank_dir: Path, model_path: Path, settings: Settings | None, *, ranks: Ranks,
    dev: torch.device, resume: bool, progress: Emit | None, interrupt: threading.Event | None,
    overwrite: bool, threads: int | None, started: float,
) -> TrainSummary:
    bank = together(ranks, lambda: open_bank(bank_dir))
    if len(bank) < MIN_CLIPS:
        raise TrainingError(f"{bank_dir}: the bank holds {len(bank)} clip"
                            f"{'' if len(bank) == 1 else 's'}; training needs at least "
                            f"{MIN_CLIPS} (ingest a folder of two or more sounds)")
    if settings is None:
        settings, _ = choose_settings(None, stored_settings(bank_dir))
    settings = settings.replace(audio=bank.audio)
    files = RunFiles(model_path, settings, bank, {
        "path": str(bank_dir.resolve()), "n_clips": len(bank),
        "names_sha256": names_digest(bank.names), "fingerprint": bank.fingerprint()},
        enabled=ranks.main)
    same_everywhere(ranks, files.bank_info["names_sha256"], f"{bank_dir}: the bank's clip list")
    t = settings.train
    if t.batch_size % ranks.world:
        raise ParameterError(f"train.batch_size {t.batch_size} is not a multiple of the "
                             f"{ranks.world} training processes (each takes an equal share)")

    def check_outputs() -> None:  # rank 0: the model's folder may exist on its machine only
        _check_outputs(files, resume=resume, overwrite=overwrite)
        for path in (model_path, files.checkpoint):  # left by a run killed while saving
            remove_stale_temporaries(path)

    agree(ranks, check_outputs)
    if threads is None:
        threads = default_threads() if dev.type == "cpu" else torch.get_num_threads()
    with _run_environment(dev, threads, interrupt) as stop:
        torch.manual_seed(t.seed)
        model = build_model(settings.audio, settings.model).to(dev)
        opt = make_optimizer(model, t)
        kept = None
        if resume:
            ckpt = agree(ranks, lambda: load_checkpoint(files.checkpoint, settings=settings,
                                                        bank=files.bank_info))
            model.load_state_dict(ckpt.model_state)
            opt.load_state_dict(ckpt.optimizer_state)
            opt.param_groups[0]["weight_decay"] = t.weight_decay  # this run's settings win
            st, kept = ckpt.state, ckpt.kept if ranks.main else None
            torch.set_rng_state(ckpt.rng["torch"])
            if dev.type == "cuda" and ckpt.rng.get("cuda") is not None:
                torch.cuda.set_rng_state(ckpt.rng["cuda"], dev)
        else:
            st = fresh_state(model, bank, t, dev)
        trainer = model
        if ranks.active:
            trainer = torch.nn.parallel.DistributedDataParallel(
                model, device_ids=[dev.index] if dev.type == "cuda" else None)
        info = {"n_train": len(st.train_rows), "n_val": len(st.val_rows), "device": str(dev),
                "threads": threads, "parameters": count_parameters(model),
                "world_size": ranks.world, "rank": ranks.rank}
        emit = (progress or (lambda d: None)) if ranks.main else (lambda d: None)
        emit({"event": "start", "epoch": st.epoch, "epochs": t.epochs, **info})
        start_epoch, meter = st.epoch, Meter()
        audio = settings.audio
        sampler = EpochSampler(len(st.train_rows), seed=t.seed, rank=ranks.rank,
                               world=ranks.world)
        try:
            stopped, kept = fit(model, opt, st, kept, sampler, files, t=t,
                                db_range=audio.db_ceiling - audio.db_floor, device=dev,
                                stop=stop, emit=emit, meter=meter, trainer=trainer, ranks=ranks)
        except _Diverged as exc:
            kept_note = (f"the last good model {model_path} is kept" if st.best is not None
                         else "no model was written")
            raise TrainingError(f"{model_path}: {exc}; {kept_note} "
                                "(try a lower learning_rate or beta)") from None
        except Exception as exc:
            if not (ranks.active and lost_peer(exc)):
                raise
            first = (str(exc).strip().splitlines() or [type(exc).__name__])[0][:160]
            kept_note = (f"the last complete model {model_path} is kept" if st.best is not None
                         else "no model was written")
            raise TrainingError(
                f"{model_path}: rank {ranks.rank}: another training process stopped "
                f"({first}); {kept_note}; continue with --resume") from None
        if stopped != "interrupted":
            finish(files, st, kept)
    seconds = time.perf_counter() - started
    best = st.best or {}
    return TrainSummary(
        model=str(model_path) if st.best is not None else None, preset=settings.preset,
        checkpoint=str(files.checkpoint) if stopped == "interrupted" else None,
        stopped=stopped, epochs=st.epoch, epochs_this_run=st.epoch - start_epoch,
        best_epoch=best.get("epoch", 0), best_val_loss=best.get("val_loss"),
        best_val_recon=best.get("val_recon"), best_val_kl=best.get("val_kl"),
        best_val_rms_db=best.get("val_rms_db"), seconds=seconds,
        clips_per_second=meter.clips / seconds if seconds > 0 else 0.0,
        train_clips_per_second=(meter.clips / meter.step_seconds
                                if meter.step_seconds > 0 else 0.0),
        resume_command=(resume_command(bank_dir, model_path, settings)
                        if stopped == "interrupted" else None),
        **info)


# --- the edges: checks, device, threads, Ctrl-C ---------------------------------------------


def _check_outputs(files: RunFiles, *, resume: bool, overwrite: bool) -> None:
    model_path, ckpt_path = files.model_path, files.checkpoint
    if not model_path.parent.is_dir():
        raise OutputError(f"{model_path}: folder {model_path.parent} does not exist")
    if model_path.is_dir():
        raise OutputError(f"{model_path}: is a folder; give a file name for the model")
    refuse_library(model_path, option="--model", banks=[files.bank.path])
    if not resume and not overwrite and (model_path.exists() or ckpt_path.exists()):
        hint = " or --resume to continue its training" if ckpt_path.exists() else ""
        raise OutputError(f"{model_path}: already exists; pass --overwrite to replace it{hint}")
    if resume and not ckpt_path.exists():
        raise TrainingError(f"{ckpt_path}: no checkpoint to resume (train without --resume)")


def pick_device(device: str, ranks: Ranks = Ranks()) -> torch.device:
    """``"auto"`` is CUDA when present, else the CPU; anything else must exist here.

    Under ``torchrun`` a bare ``"cuda"`` (or ``"auto"`` on a GPU machine) is the GPU
    numbered ``LOCAL_RANK``.
    """
    if device == "auto":
        device = "cuda" if torch.cuda.is_available() else "cpu"
    if device == "cuda" and ranks.active and torch.cuda.is_available():
        device = f"cuda:{ranks.local_rank}"
    try:
        dev = torch.device(device)
    except (RuntimeError, TypeError):
        msg = f"device={device!r} is not a torch device ('auto', 'cpu', 'cuda')"
        raise ParameterError(msg) from None
    if dev.type == "cuda" and not torch.cuda.is_available():
        raise ParameterError(f"device={device!r}: CUDA is not available here")
    return dev


def keep_freed_buffers() -> bool:
    """Ask glibc's malloc to keep large freed buffers for reuse; True if it took effect.

    By default glibc returns big freed blocks to the system (``munmap``, heap
    trimming), so the next step's activations page-fault their memory in again.
    A 32 MiB mmap threshold (glibc's maximum) and no trimming keep them; the
    benchmark measures the effect (tests/benchmarks/bench_train.py). Process-wide
    and not undone; peak memory is unchanged.
    """
    try:
        mallopt = ctypes.CDLL(None).mallopt
    except (OSError, AttributeError):  # not glibc
        return False
    m_trim_threshold, m_mmap_threshold = -1, -3  # from glibc's malloc.h
    return bool(mallopt(m_mmap_threshold, 32 << 20)) and bool(mallopt(m_trim_threshold, 2**31 - 1))


@contextmanager
def _run_environment(
    dev: torch.device, threads: int, interrupt: threading.Event | None
) -> Iterator[threading.Event]:
    """Threads, allocator, Ctrl-C and torch's global RNG for one run; the caller's are restored.

    Yields the event that stops training after the current batch: ``interrupt``, or one
    that the first Ctrl-C sets (a second Ctrl-C raises KeyboardInterrupt at once).
    """
    stop = interrupt if interrupt is not None else threading.Event()
    old_handler = None
    if interrupt is None and threading.current_thread() is threading.main_thread():

        def on_sigint(signum, frame):
            if stop.is_set():
                raise KeyboardInterrupt
            stop.set()

        old_handler = signal.signal(signal.SIGINT, on_sigint)
    old_threads = torch.get_num_threads()
    if KEEP_FREED_BUFFERS:
        keep_freed_buffers()
    forked = []
    if dev.type == "cuda":
        forked = [dev.index if dev.index is not None else torch.cuda.current_device()]
    try:
        torch.set_num_threads(threads)
        with torch.random.fork_rng(devices=forked):  # training seeds torch's global generator
            yield stop
    finally:
        torch.set_num_threads(old_threads)
        if old_handler is not None:
            signal.signal(signal.SIGINT, old_handler)
