"""The self-contained model file: write it atomically, load it safely.

A model file is one ``torch.save`` archive that ``torch.load(path,
weights_only=True)`` reads: a dict of tensors and plain str/int/float/bool/None
lists and dicts. Keys:

``format``, ``tool``, ``kind`` (``"model"``), ``version``
    format version 2, ``"shotsmith"``, the writing shotsmith version.
``settings``
    the resolved settings (``audio``, ``model``, ``train``, ``render`` tables, ``preset``).
``history``
    one dict per epoch: ``epoch``, ``train_loss``, ``train_recon``, ``train_kl``,
    ``val_loss``, ``val_recon``, ``val_kl``, ``val_rms_db``, ``lr``, ``kl_weight``, ``seconds``.
``best``
    the kept epoch: ``epoch``, ``val_loss``, ``val_recon``, ``val_kl``, ``val_rms_db``.
``categories``, ``clip_names``, ``clip_categories``
    sorted category names; per bank clip (row order) its name and category (or None).
``mu``, ``logvar``
    float32 ``(N, latent_dim)`` posterior means and log-variances of every bank clip.
``split``
    ``{"train": int64 (n,), "val": int64 (m,)}`` bank rows.
``bank``
    ``{"path", "n_clips", "names_sha256"}`` of the bank it was trained on.
``state_dict``
    the network weights.
``checksum``
    SHA-256 of the weights and codes (:func:`pipeline.modelcheck.weights_checksum`), checked
    on load with the rest of the structure (:func:`pipeline.modelcheck.check_payload`).
``sampler``
    ``{"library": mixture, "categories": {name: mixture}}``, each mixture
    ``{"weights" (K,), "means" (K, D), "covs" (K, D, D)}`` float64: the Gaussian mixtures
    fitted to ``mu`` that ``generate`` samples from (:mod:`pipeline.sampler`); None in a
    file saved before training ended.

The training checkpoint ``MODEL.ckpt`` uses the same archive format
(:func:`save_atomic`, :func:`read_archive`); its payload is in :mod:`pipeline.checkpoint`.
"""

from __future__ import annotations

import hashlib
import io
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import torch

from pipeline import __version__, files
from pipeline.config import AudioSpec, Settings, settings_from_dict
from pipeline.errors import ModelFileError, ParameterError, ShotsmithError
from pipeline.model import ShotVAE, build_model
from pipeline.modelcheck import check_payload, weights_checksum
from pipeline.sampler import Mixture, check_mixture, fit_samplers

FORMAT_VERSION = 2  # 2: spectra analysed after AudioSpec.analysis_pad of silence
TOOL = "shotsmith"
MODEL_KEYS = (
    "format",
    "tool",
    "kind",
    "settings",
    "history",
    "best",
    "categories",
    "clip_names",
    "clip_categories",
    "mu",
    "logvar",
    "split",
    "state_dict",
)
_ZIP_MAGIC = b"PK\x03\x04"  # torch.save writes a zip archive


def names_digest(names: list[str]) -> str:
    """A fingerprint of a bank's clip list (order matters: rows are clip indices)."""
    return hashlib.sha256("\n".join(names).encode("utf-8")).hexdigest()


def save_atomic(obj: Any, path: Path) -> None:
    """``torch.save`` to memory, then :func:`pipeline.files.write_atomic` to ``path``.

    A process killed at any instant leaves either the previous complete file or
    the new complete file at ``path``, never a partial one.
    """
    # Serialise first: torch's zip writer reports a failed file write (a full disk) as an
    # opaque RuntimeError; writing the finished bytes ourselves gives a plain OSError.
    buf = io.BytesIO()
    torch.save(obj, buf)
    files.write_atomic(Path(path), buf.getbuffer())


def remove_stale_temporaries(path: str | Path) -> list[Path]:
    """Delete the temporaries that killed processes left while saving ``path``."""
    path = Path(path)
    return files.remove_stale_temporaries(path.parent, [path.name])


def read_archive(path: Path, *, kind: str) -> tuple[dict[str, Any], str]:
    """Load a shotsmith archive with ``weights_only=True``; ``(payload, sha256)``.

    Raises :class:`ModelFileError` (one line) for a missing, foreign, truncated,
    newer-format or wrong-kind file.
    """
    path = Path(path)
    what = "model file" if kind == "model" else "training checkpoint"
    if path.is_dir():
        raise ModelFileError(f"{path}: is a folder, not a {what}")
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        raise ModelFileError(f"{path}: {what} not found") from None
    except OSError as exc:
        raise ModelFileError(f"{path}: cannot read {what} ({files.reason(exc)})") from None
    if not data.startswith(_ZIP_MAGIC):
        raise ModelFileError(f"{path}: not a shotsmith {what}")
    try:
        payload = torch.load(io.BytesIO(data), map_location="cpu", weights_only=True)
    except Exception as exc:  # torch raises many types for a damaged archive
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        if "Weights only load failed" in str(exc):
            raise ModelFileError(
                f"{path}: not a shotsmith {what} (it holds objects other than tensors "
                "and plain data; refusing to load it)"
            ) from None
        raise ModelFileError(f"{path}: truncated or corrupt {what} ({first[:160]})") from None
    if not isinstance(payload, dict) or payload.get("tool") != TOOL:
        raise ModelFileError(f"{path}: not a shotsmith {what}")
    version = payload.get("format")
    if not isinstance(version, int) or isinstance(version, bool):
        raise ModelFileError(f"{path}: not a shotsmith {what} (no format version)")
    if version > FORMAT_VERSION:
        raise ModelFileError(
            f"{path}: {what} format {version} is newer than this shotsmith reads "
            f"({FORMAT_VERSION}); upgrade shotsmith"
        )
    if version < FORMAT_VERSION:
        again = "train" if kind == "model" else "train without --resume"
        raise ModelFileError(f"{path}: {what} format {version} was made by an older shotsmith "
                             f"(this one reads {FORMAT_VERSION}); re-run 'shotsmith {again}'")
    if payload.get("kind") != kind:
        other = "a training checkpoint" if payload.get("kind") == "checkpoint" else "a model file"
        raise ModelFileError(f"{path}: is {other}, not a {what}")
    return payload, hashlib.sha256(data).hexdigest()


def model_payload(
    *,
    settings: Settings,
    state_dict: dict[str, torch.Tensor],
    history: list[dict[str, Any]],
    best: dict[str, Any],
    clip_names: list[str],
    clip_categories: list[str | None],
    mu: np.ndarray,
    logvar: np.ndarray,
    split: dict[str, np.ndarray],
    bank: dict[str, Any],
    samplers: Samplers | None = None,
    clip_paths: list[str] | None = None,
) -> dict[str, Any]:
    """The dict that :func:`save_atomic` writes as a model file.

    ``clip_paths``: each clip's path relative to the library (``kick/a.wav``), so a clip
    can be named by it; files written before it was stored have none.

    ``samplers`` (the mixtures fitted to ``mu``) is written when training ends; a file
    saved mid-training has none, and :meth:`ModelFile.samplers` fits them on load.
    """
    payload = {
        "format": FORMAT_VERSION,
        "tool": TOOL,
        "kind": "model",
        "version": __version__,
        "settings": settings.to_dict(),
        "history": [dict(h) for h in history],
        "best": dict(best),
        "categories": sorted({c for c in clip_categories if c}),
        "clip_names": list(clip_names),
        "clip_categories": list(clip_categories),
        "clip_paths": list(clip_paths or []),
        "mu": torch.as_tensor(np.asarray(mu, dtype=np.float32)),
        "logvar": torch.as_tensor(np.asarray(logvar, dtype=np.float32)),
        "split": {k: torch.as_tensor(np.asarray(v, dtype=np.int64)) for k, v in split.items()},
        "bank": dict(bank),
        "state_dict": {k: v.detach().cpu().clone() for k, v in state_dict.items()},
        "sampler": None if samplers is None else _samplers_payload(samplers),
    }
    payload["checksum"] = weights_checksum(payload["state_dict"], payload["mu"], payload["logvar"])
    return payload


Samplers = tuple[Mixture, dict[str, Mixture]]  # the library's mixture, one per category


def _mixture_payload(mix: Mixture) -> dict[str, torch.Tensor]:
    return {k: torch.as_tensor(v, dtype=torch.float64) for k, v in mix.to_arrays().items()}


def _samplers_payload(samplers: Samplers) -> dict[str, Any]:
    library, per_category = samplers
    return {"library": _mixture_payload(library),
            "categories": {c: _mixture_payload(m) for c, m in per_category.items()}}


def _read_samplers(path: Path, raw: Any, dim: int, categories: list[str]) -> Samplers | None:
    """The stored mixtures, checked (:func:`pipeline.sampler.check_mixture`); None if absent."""
    if raw is None:
        return None

    def one(entry: Any, what: str) -> Mixture:
        try:
            return check_mixture(entry["weights"], entry["means"], entry["covs"], dim=dim)
        except (ParameterError, TypeError, KeyError, IndexError) as exc:
            raise ModelFileError(f"{path}: damaged sampler ({what}: {exc})") from None

    if not isinstance(raw, dict) or not isinstance(raw.get("categories"), dict):
        raise ModelFileError(f"{path}: damaged sampler (not a mapping of mixtures)")
    per = {str(c): one(m, f"category {c}") for c, m in raw["categories"].items()}
    if sorted(per) != sorted(categories):
        raise ModelFileError(f"{path}: damaged sampler (its categories are not the model's)")
    return one(raw.get("library"), "library"), per


@dataclass
class ModelFile:
    """A loaded model file. ``decode``/``encode`` take and return numpy arrays."""

    path: Path
    sha256: str
    settings: Settings
    history: list[dict[str, Any]]
    best: dict[str, Any]
    categories: list[str]
    clip_names: list[str]
    clip_categories: list[str | None]
    mu: np.ndarray
    logvar: np.ndarray
    split: dict[str, np.ndarray]
    bank: dict[str, Any]
    model: ShotVAE = field(repr=False)
    stored_samplers: Samplers | None = field(default=None, repr=False)
    clip_paths: list[str] = field(default_factory=list)  # relative to the library; may be empty

    @property
    def audio(self) -> AudioSpec:
        return self.settings.audio

    def samplers(self) -> Samplers:
        """The mixtures fitted to the clips' codes (stored, or fitted now: a file saved
        before training ended holds none; the fit is seeded, so both give the same)."""
        if self.stored_samplers is None:
            self.stored_samplers = fit_samplers(self.mu, self.clip_categories)
        return self.stored_samplers

    @property
    def latent_dim(self) -> int:
        return self.settings.model.latent_dim

    def decode(self, z: np.ndarray, *, batch_size: int = 64) -> np.ndarray:
        """Codes ``(B, latent_dim)`` to float32 spectrograms ``(B, bins, frames)`` in [0, 1]."""
        z = np.array(z, dtype=np.float32)  # a copy: torch warns on read-only memory
        if z.ndim != 2 or z.shape[1] != self.latent_dim:
            raise ParameterError(f"z must have shape (B, {self.latent_dim}), got {z.shape}")
        if not np.isfinite(z).all():
            raise ParameterError("z must be finite")
        out = np.empty((len(z), self.audio.n_bins, self.audio.n_frames), dtype=np.float32)
        self.model.eval()
        with torch.inference_mode():
            for i in range(0, len(z), batch_size):
                out[i : i + batch_size] = self.model.decode(torch.from_numpy(z[i : i + batch_size]))
        return out

    def encode(self, U: np.ndarray, *, batch_size: int = 64) -> tuple[np.ndarray, np.ndarray]:
        """Spectrograms ``(B, bins, frames)`` in [0, 1] to ``(mu, logvar)``, each ``(B, D)``."""
        U = np.array(U, dtype=np.float32)  # a copy: torch warns on read-only memory
        shape = (self.audio.n_bins, self.audio.n_frames)
        if U.ndim != 3 or U.shape[1:] != shape:
            raise ParameterError(f"U must have shape (B, {shape[0]}, {shape[1]}), got {U.shape}")
        mu = np.empty((len(U), self.latent_dim), dtype=np.float32)
        logvar = np.empty_like(mu)
        self.model.eval()
        with torch.inference_mode():
            for i in range(0, len(U), batch_size):
                m, lv = self.model.encode(torch.from_numpy(U[i : i + batch_size]))
                mu[i : i + batch_size], logvar[i : i + batch_size] = m.numpy(), lv.numpy()
        return mu, logvar


def _check_weight_shapes(path: Path, settings: Settings, state: Any) -> None:
    """Compare the file's tensors with the network its settings describe, built on the meta
    device (no memory), so settings that claim a huge network fail here, not in an allocator."""
    with torch.device("meta"):
        shell = build_model(settings.audio, settings.model)
    want = {k: tuple(v.shape) for k, v in shell.state_dict().items()}
    if not isinstance(state, dict) or not all(isinstance(v, torch.Tensor) for v in state.values()):
        raise ModelFileError(f"{path}: weights do not fit the model settings (not a tensor dict)")
    got = {k: tuple(v.shape) for k, v in state.items()}
    if got != want:
        bad = sorted(set(want) ^ set(got)) or sorted(k for k in want if want[k] != got[k])
        raise ModelFileError(f"{path}: weights do not fit the model settings ({bad[0]}: "
                             f"expected {want.get(bad[0])}, found {got.get(bad[0])})")


def _check_weights(path: Path, state: Any, settings: Settings) -> None:
    """Compare names and shapes with the network the settings describe, before allocating it."""
    with torch.device("meta"):  # shapes only, no memory: a hostile file cannot make us allocate
        expected = {k: tuple(v.shape) for k, v in build_model(settings.audio, settings.model)
                    .state_dict().items()}
    if not isinstance(state, dict):
        raise ModelFileError(f"{path}: damaged model file (state_dict is not a mapping)")
    names = set(expected) ^ set(state)
    if names:
        raise ModelFileError(f"{path}: weights do not fit the model settings (unexpected or "
                             f"missing {', '.join(sorted(names)[:3])})")
    for key, shape in expected.items():
        got = tuple(state[key].shape) if isinstance(state[key], torch.Tensor) else None
        if got != shape:
            raise ModelFileError(f"{path}: weights do not fit the model settings ({key} has "
                                 f"shape {got}, the settings give {shape})")


def load_model_file(path: str | Path) -> ModelFile:
    """Load and check a model file (always with ``weights_only=True``).

    Raises
    ------
    ModelFileError
        One line naming the file: missing, not a shotsmith model, truncated or
        corrupt, newer format, missing keys, or shapes that do not fit the settings.
    """
    path = Path(path)
    p, sha = read_archive(path, kind="model")
    missing = [k for k in MODEL_KEYS if k not in p]
    if missing:
        raise ModelFileError(f"{path}: damaged model file (missing {', '.join(missing)})")
    try:
        settings = settings_from_dict(p["settings"], where=f"{path} settings")
    except (ShotsmithError, TypeError, AttributeError) as exc:
        raise ModelFileError(f"{path}: bad settings in model file ({exc})") from None
    names, cats = list(p["clip_names"]), list(p["clip_categories"])
    mu, logvar = p["mu"], p["logvar"]
    d = settings.model.latent_dim
    for key, t in (("mu", mu), ("logvar", logvar)):
        if not isinstance(t, torch.Tensor) or tuple(t.shape) != (len(names), d):
            got = tuple(t.shape) if isinstance(t, torch.Tensor) else type(t).__name__
            raise ModelFileError(f"{path}: {key} has shape {got}, expected ({len(names)}, {d})")
    if len(cats) != len(names):
        raise ModelFileError(f"{path}: {len(cats)} clip categories for {len(names)} clips")
    _check_weight_shapes(path, settings, p["state_dict"])
    _check_weights(path, p["state_dict"], settings)
    check_payload(path, p, d)
    if len(names) < 2:  # train refuses such banks; a file from elsewhere still says why
        raise ModelFileError(f"{path}: the model holds {len(names)} clip; generating, varying "
                             "and inspecting need at least 2 (train on two or more sounds)")
    model = build_model(settings.audio, settings.model)
    try:
        model.load_state_dict(p["state_dict"], strict=True)
    except (RuntimeError, KeyError, TypeError, AttributeError) as exc:
        first = str(exc).strip().splitlines()[0][:160]
        raise ModelFileError(f"{path}: weights do not fit the model settings ({first})") from None
    model.eval()
    try:
        split = {k: np.asarray(v, dtype=np.int64) for k, v in dict(p["split"]).items()}
    except (TypeError, ValueError):
        raise ModelFileError(f"{path}: damaged model file (bad split)") from None
    return ModelFile(
        path=path,
        sha256=sha,
        settings=settings,
        history=list(p["history"]),
        best=dict(p["best"]),
        categories=list(p["categories"]),
        clip_names=names,
        clip_categories=cats,
        mu=mu.numpy().astype(np.float32),
        logvar=logvar.numpy().astype(np.float32),
        split=split,
        bank=dict(p.get("bank", {})),
        model=model,
        stored_samplers=_read_samplers(path, p.get("sampler"), d, list(p["categories"])),
        clip_paths=_clip_paths(p.get("clip_paths"), len(names)),
    )


def _clip_paths(raw: Any, n: int) -> list[str]:
    """The stored relative paths when there is one string per clip, else none (older files)."""
    if isinstance(raw, list) and len(raw) == n and all(isinstance(x, str) for x in raw):
        return list(raw)
    return []
