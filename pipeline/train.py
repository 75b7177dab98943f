"""Training: split, batches, schedule, validation, early stopping, checkpoints, resume.

The loop reads a :class:`~pipeline.dataset.SpectraDataset` over the bank's memory
map through a ``DataLoader`` whose sampler is passed in (reseeded per epoch like
``DistributedSampler``), and all file writing goes through two methods
(``save_model``, ``save_checkpoint``), so ``torch.distributed`` can wrap it later
(a sampler per rank, writing on rank 0) without a rewrite.

Files: the model file ``MODEL`` is rewritten atomically at every validation
improvement (and at the end with the full history); the resumable checkpoint
``MODEL.ckpt`` after every epoch and on Ctrl-C. It is removed when training ends
normally.
"""

from __future__ import annotations

import ctypes
import math
import shlex
import signal
import threading
import time
from collections.abc import Callable
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

import numpy as np
import torch

from pipeline.bank import Bank, open_bank
from pipeline.config import Settings, available_cores
from pipeline.dataset import (
    EpochSampler,
    SpectraDataset,
    make_loader,
    mean_spectrogram,
    split_indices,
)
from pipeline.errors import OutputError, ParameterError, TrainingError
from pipeline.model import (
    build_model,
    count_parameters,
    encode_all,
    evaluate,
    init_template,
    kl_weight_at,
    lr_at,
    vae_loss,
)
from pipeline.modelfile import (
    FORMAT_VERSION,
    TOOL,
    check_resumable,
    model_payload,
    names_digest,
    read_archive,
    remove_stale_temporaries,
    save_atomic,
)
from pipeline.outputs import refuse_library

CHECKPOINT_SUFFIX = ".ckpt"
KEEP_FREED_BUFFERS = True  # train_model calls keep_freed_buffers() (measured: +16 % clips/s)


def checkpoint_path(model_path: str | Path) -> Path:
    p = Path(model_path)
    return p.with_name(p.name + CHECKPOINT_SUFFIX)


# --- summary --------------------------------------------------------------------------


@dataclass
class TrainSummary:
    """What a training run did. Losses are per clip: recon summed over bins x frames,
    KL summed over latent dimensions (nats); ``val_rms_db`` is the RMS error in dB."""

    model: str
    checkpoint: str | None
    stopped: str  # "early stop", "max epochs", "interrupted"
    epochs: int  # completed in total, resumed runs included
    epochs_this_run: int
    best_epoch: int
    best_val_loss: float
    best_val_recon: float
    best_val_kl: float
    best_val_rms_db: float
    seconds: float  # this run
    clips_per_second: float  # training clips / this run's wall time (validation, saving included)
    train_clips_per_second: float  # training clips / time in optimiser steps only
    n_train: int
    n_val: int
    parameters: int
    device: str
    threads: int
    resume_command: str | None

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


# --- the loop -------------------------------------------------------------------------


def pick_device(device: str) -> torch.device:
    if device == "auto":
        return torch.device("cuda" if torch.cuda.is_available() else "cpu")
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


def _cpu_copy(state: dict[str, torch.Tensor]) -> dict[str, torch.Tensor]:
    return {k: v.detach().cpu().clone() for k, v in state.items()}


def train_model(
    bank_dir: str | Path,
    model_path: str | Path,
    settings: Settings,
    *,
    resume: bool = False,
    progress: Callable[[dict[str, Any]], None] | None = None,
    device: str = "auto",
    interrupt: threading.Event | None = None,
    overwrite: bool = False,
) -> TrainSummary:
    """Train the VAE on a bank and write the model file.

    Parameters
    ----------
    bank_dir : path
        A bank made by ``ingest``; its audio spec replaces ``settings.audio``.
    model_path : path
        The model file to write; the checkpoint goes to ``model_path + ".ckpt"``.
    settings : Settings
        The ``model`` and ``train`` tables are used; all tables go into the model file.
    resume : bool
        Continue from the checkpoint (same model settings and bank required). The
        ``train`` table of ``settings`` applies from there on (``epochs`` may grow).
    progress : callable, optional
        Receives dicts with ``event`` ("start", "batch", "epoch"), ``epoch`` (1-based),
        ``epochs``, ``train_loss``, ``val_loss``, ``recon``, ``kl``, ``eta_seconds``, ...
    device : str
        "auto" (CUDA when present), "cpu", "cuda", ...
    interrupt : threading.Event, optional
        Set it to stop after the current batch and save the checkpoint. When None,
        Ctrl-C (SIGINT) in the main thread does this; a second Ctrl-C aborts at once.
    overwrite : bool
        Replace an existing model file instead of refusing.

    Raises
    ------
    TrainingError
        A loss that turned non-finite (the last good model file is kept), or a
        checkpoint that does not fit the settings or the bank.
    OutputError
        The model file exists (without ``overwrite`` or ``resume``) or its folder does not.
    """
    t0 = time.perf_counter()
    bank_dir, model_path = Path(bank_dir), Path(model_path)
    bank = open_bank(bank_dir)
    if len(bank) == 0:
        raise TrainingError(f"{bank_dir}: the bank holds no clips")
    ckpt_path = checkpoint_path(model_path)
    if not model_path.parent.is_dir():
        raise OutputError(f"{model_path}: folder {model_path.parent} does not exist")
    if model_path.is_dir():
        raise OutputError(f"{model_path}: is a folder; give a file name for the model")
    refuse_library(model_path, option="--model", banks=[bank_dir])
    if not resume and not overwrite and (model_path.exists() or ckpt_path.exists()):
        hint = " or --resume to continue its training" if ckpt_path.exists() else ""
        raise OutputError(f"{model_path}: already exists; pass --overwrite to replace it{hint}")
    if resume and not ckpt_path.exists():
        raise TrainingError(f"{ckpt_path}: no checkpoint to resume (train without --resume)")
    dev = pick_device(device)
    for path in (model_path, ckpt_path):  # left by a run that was killed while saving
        remove_stale_temporaries(path)
    old_threads = torch.get_num_threads()
    threads = available_cores() if dev.type == "cpu" else old_threads
    if KEEP_FREED_BUFFERS:
        keep_freed_buffers()
    stop = interrupt if interrupt is not None else threading.Event()
    old_handler = None
    if interrupt is None and threading.current_thread() is threading.main_thread():

        def on_sigint(signum, frame):
            if stop.is_set():
                raise KeyboardInterrupt
            stop.set()

        old_handler = signal.signal(signal.SIGINT, on_sigint)
    try:
        torch.set_num_threads(threads)
        # training seeds torch's global generator; leave the caller's state untouched
        forked = []
        if dev.type == "cuda":
            forked = [dev.index if dev.index is not None else torch.cuda.current_device()]
        with torch.random.fork_rng(devices=forked):
            run = _Run(bank, bank_dir, model_path, settings.replace(audio=bank.audio), dev)
            return run.train(resume=resume, emit=progress or (lambda d: None), stop=stop, t0=t0,
                             threads=threads)
    finally:
        torch.set_num_threads(old_threads)
        if old_handler is not None:
            signal.signal(signal.SIGINT, old_handler)


class _Run:
    """One training run; every file write goes through ``save_model`` or ``save_checkpoint``."""

    def __init__(self, bank: Bank, bank_dir: Path, model_path: Path, settings: Settings, dev):
        self.bank, self.bank_dir, self.model_path, self.settings, self.dev = (
            bank, bank_dir, model_path, settings, dev)
        self.ckpt_path = checkpoint_path(model_path)
        self.t = t = settings.train
        torch.manual_seed(t.seed)
        self.model = build_model(settings.audio, settings.model).to(dev)
        # no weight decay on biases, norms and the template (common practice)
        groups: tuple[list, list] = ([], [])
        for name, param in self.model.named_parameters():
            groups[param.ndim < 2 or name == "template"].append(param)
        self.opt = torch.optim.AdamW(
            [{"params": groups[0], "weight_decay": t.weight_decay},
             {"params": groups[1], "weight_decay": 0.0}], lr=t.learning_rate)
        self.bank_info = {"path": str(bank_dir.resolve()), "n_clips": len(bank),
                          "names_sha256": names_digest(bank.names)}
        self.best_state: dict | None = None
        self.best_codes: tuple[np.ndarray, np.ndarray] | None = None

    def _fresh(self) -> dict[str, Any]:
        cats = [c.get("category") for c in self.bank.clips]
        train, val = split_indices(cats, val_fraction=self.t.val_fraction, seed=self.t.seed)
        init_template(self.model, mean_spectrogram(self.bank.spectra, train).to(self.dev))
        return {"epoch": 0, "clips_done": 0, "sums": [0.0, 0.0, 0.0], "history": [], "best": None,
                "since_best": 0, "seconds": 0.0,
                "split": {"train": torch.as_tensor(train), "val": torch.as_tensor(val)}}

    def _restore(self) -> dict[str, Any]:
        ckpt, _ = read_archive(self.ckpt_path, kind="checkpoint")
        check_resumable(ckpt, self.ckpt_path, settings=self.settings, bank=self.bank_info)
        self.model.load_state_dict(ckpt["model_state"])
        self.opt.load_state_dict(ckpt["optimizer_state"])
        self.opt.param_groups[0]["weight_decay"] = self.t.weight_decay  # this run's settings win
        self.best_state = ckpt["best_state"]
        if ckpt["best_mu"] is not None:
            self.best_codes = (ckpt["best_mu"].numpy(), ckpt["best_logvar"].numpy())
        torch.set_rng_state(ckpt["rng"]["torch"])
        if self.dev.type == "cuda" and ckpt["rng"].get("cuda") is not None:
            torch.cuda.set_rng_state(ckpt["rng"]["cuda"], self.dev)
        return ckpt["state"]

    def save_model(self) -> None:
        """The kept weights and their codes, with the history so far (atomic)."""
        st, (mu, logvar) = self.st, self.best_codes
        cats = [c.get("category") for c in self.bank.clips]
        save_atomic(model_payload(
            settings=self.settings, state_dict=self.best_state, history=st["history"],
            best=st["best"], clip_names=self.bank.names, clip_categories=cats, mu=mu,
            logvar=logvar, split={k: v.numpy() for k, v in st["split"].items()},
            bank=self.bank_info), self.model_path)

    def save_checkpoint(self) -> None:
        """Everything needed to continue exactly: weights, optimiser, RNG, position (atomic)."""
        cuda = torch.cuda.get_rng_state(self.dev) if self.dev.type == "cuda" else None
        codes = self.best_codes
        save_atomic({
            "format": FORMAT_VERSION, "tool": TOOL, "kind": "checkpoint",
            "settings": self.settings.to_dict(), "bank": self.bank_info, "state": self.st,
            "rng": {"torch": torch.get_rng_state(), "cuda": cuda},
            "model_state": _cpu_copy(self.model.state_dict()),
            "optimizer_state": self.opt.state_dict(), "best_state": self.best_state,
            "best_mu": None if codes is None else torch.as_tensor(codes[0]),
            "best_logvar": None if codes is None else torch.as_tensor(codes[1]),
        }, self.ckpt_path)

    def _lr(self, p: float) -> float:
        t = self.t
        return lr_at(p, learning_rate=t.learning_rate, warmup_epochs=t.lr_warmup_epochs,
                     epochs=t.epochs, min_lr_ratio=t.min_lr_ratio)

    def _step(self, x: torch.Tensor, p: float) -> tuple[float, float, float]:
        t = self.t
        for g in self.opt.param_groups:
            g["lr"] = self._lr(p)
        x_hat, mu, logvar, _ = self.model(x)
        kl_w = kl_weight_at(p, beta=t.beta, warmup_epochs=t.kl_warmup_epochs)
        loss, rec, kl = vae_loss(x_hat, x, mu, logvar, kl_weight=kl_w, free_bits=t.free_bits,
                                 loud_weight=t.loud_weight)
        if not torch.isfinite(loss):
            self._fail(f"the training loss became non-finite at epoch {int(p) + 1}")
        self.opt.zero_grad(set_to_none=True)
        loss.backward()
        self.opt.step()
        return loss.item(), rec.item(), kl.item()

    def _fail(self, what: str) -> None:
        kept = (f"the last good model {self.model_path} is kept" if self.model_path.exists()
                else "no model was written")
        hint = "try a lower learning_rate or beta"
        raise TrainingError(f"{self.model_path}: {what}; {kept} ({hint})")

    def train(self, *, resume: bool, emit, stop, t0: float, threads: int) -> TrainSummary:
        t, st = self.t, None
        self.st = st = self._restore() if resume else self._fresh()
        rows = st["split"]["train"].numpy(), st["split"]["val"].numpy()
        n_train, n_val = len(rows[0]), len(rows[1])
        train_data = SpectraDataset(self.bank.spectra, rows[0])
        # no held-out clip (tiny bank or val_fraction 0): validate on the training clips
        val_spectra = np.asarray(self.bank.spectra[rows[1] if n_val else rows[0]])
        sampler = EpochSampler(n_train, seed=t.seed)
        loader = make_loader(train_data, sampler, batch_size=t.batch_size, device=self.dev)
        audio = self.settings.audio
        db_range = audio.db_ceiling - audio.db_floor
        start, step_s, seen = st["epoch"], 0.0, 0
        n_batches = math.ceil(n_train / t.batch_size)
        min_epochs = max(t.kl_warmup_epochs, t.lr_warmup_epochs)  # no early stop in warm-up
        info = {"n_train": n_train, "n_val": n_val, "device": str(self.dev), "threads": threads,
                "parameters": count_parameters(self.model)}
        emit({"event": "start", "epoch": start, "epochs": t.epochs, **info})

        def summary(stopped: str, ckpt: bool) -> TrainSummary:
            b, secs = st["best"] or {}, time.perf_counter() - t0
            cmd = resume_command(self.bank_dir, self.model_path, self.settings) if ckpt else None
            return TrainSummary(
                model=str(self.model_path), checkpoint=str(self.ckpt_path) if ckpt else None,
                stopped=stopped, epochs=st["epoch"], epochs_this_run=st["epoch"] - start,
                best_epoch=b.get("epoch", 0), best_val_loss=b.get("val_loss", math.nan),
                best_val_recon=b.get("val_recon", math.nan), best_val_kl=b.get("val_kl", math.nan),
                best_val_rms_db=b.get("val_rms_db", math.nan), seconds=secs,
                clips_per_second=seen / secs if secs > 0 else 0.0,
                train_clips_per_second=seen / step_s if step_s > 0 else 0.0,
                resume_command=cmd, **info)

        while st["epoch"] < t.epochs:
            e = st["epoch"]
            if st["best"] is not None and st["since_best"] >= t.patience and e >= min_epochs:
                break
            epoch_t0 = time.perf_counter()
            sampler.set_epoch(e, start=st["clips_done"])
            for x in loader:
                if stop.is_set():
                    break
                b0 = time.perf_counter()
                p = e + st["clips_done"] / n_train
                values = self._step(x.to(self.dev, non_blocking=True), p)
                st["sums"] = [s + len(x) * v for s, v in zip(st["sums"], values)]
                st["clips_done"] += len(x)
                seen += len(x)
                step_s += time.perf_counter() - b0
                done = st["clips_done"]
                emit({"event": "batch", "epoch": e + 1, "epochs": t.epochs,
                      "batch": math.ceil(done / t.batch_size), "batches": n_batches,
                      "train_loss": st["sums"][0] / done, "recon": st["sums"][1] / done,
                      "kl": st["sums"][2] / done,
                      "val_loss": st["history"][-1]["val_loss"] if st["history"] else None,
                      "eta_seconds": ((t.epochs - e) * n_train - done) * step_s / seen})
            st["seconds"] += time.perf_counter() - epoch_t0
            if stop.is_set():
                self.save_checkpoint()
                return summary("interrupted", True)
            val = evaluate(self.model, val_spectra, beta=t.beta, loud_weight=t.loud_weight,
                           db_range=db_range, device=self.dev)
            if not math.isfinite(val["val_loss"]):
                self._fail(f"the validation loss became non-finite at epoch {e + 1}")
            done = max(st["clips_done"], 1)
            kl_w = kl_weight_at(e + 1, beta=t.beta, warmup_epochs=t.kl_warmup_epochs)
            row = {"epoch": e + 1, "train_loss": st["sums"][0] / done,
                   "train_recon": st["sums"][1] / done, "train_kl": st["sums"][2] / done, **val,
                   "lr": self._lr(e + 1), "kl_weight": kl_w,
                   "seconds": time.perf_counter() - epoch_t0}
            st["history"].append(row)
            improved = st["best"] is None or val["val_loss"] < st["best"]["val_loss"]
            if improved:
                st["best"], st["since_best"] = {"epoch": e + 1, **val}, 0
                self.best_state = _cpu_copy(self.model.state_dict())
                self.best_codes = encode_all(self.model, self.bank.spectra, device=self.dev)
                self.save_model()
            else:
                st["since_best"] += 1
            st.update(epoch=e + 1, clips_done=0, sums=[0.0, 0.0, 0.0])
            self.save_checkpoint()
            per_epoch = sum(h["seconds"] for h in st["history"][start:]) / (e + 1 - start)
            emit({"event": "epoch", "epoch": e + 1, "epochs": t.epochs,
                  "train_loss": row["train_loss"], "val_loss": val["val_loss"],
                  "recon": val["val_recon"], "kl": val["val_kl"], "val_rms_db": val["val_rms_db"],
                  "lr": row["lr"], "improved": improved, "best_val_loss": st["best"]["val_loss"],
                  "seconds": row["seconds"], "eta_seconds": per_epoch * (t.epochs - e - 1)})
        stopped = "max epochs" if st["epoch"] >= t.epochs else "early stop"
        self.save_model()  # the kept weights and codes, now with the whole history
        self.ckpt_path.unlink(missing_ok=True)
        return summary(stopped, False)
