"""Rendering: [0, 1] spectra to finished WAV files and a manifest.

Phase reconstruction (:func:`pipeline.phase.reconstruct`), then an optional
resampling to the session's rate (``render.output_rate``, soxr), then
:func:`pipeline.finish.finish_audio` (DC, fades, the end of the sound, loudness or
true-peak normalisation, quantisation with dither; re-exported here). The I/O edge is
:class:`OutputFolder` (safe unique names, atomic no-clobber WAV writes, an atomic
``manifest.json``) and :func:`render_spectra`, which every command that writes
audio calls with decoded spectra and per-item metadata.
"""

from __future__ import annotations

import dataclasses
import json
import math
import os
import re
import tempfile
import unicodedata
from collections.abc import Callable, Iterable
from pathlib import Path
from typing import Any

import numpy as np
import soundfile as sf

from pipeline import __version__, spectra
from pipeline.bank import write_json_atomic
from pipeline.config import AudioSpec, RenderSpec
from pipeline.errors import AudioError, OutputError, ParameterError
from pipeline.finish import (  # noqa: F401 - re-exported: the finishing stage of rendering
    BS1770_BLOCK_S,
    finish_audio,
    integrated_loudness,
)
from pipeline.frontend import resample
from pipeline.phase import reconstruct

MANIFEST_FILE = "manifest.json"
SUBTYPES = {"16": "PCM_16", "24": "PCM_24", "32f": "FLOAT"}
_PCM_BITS = {"16": 16, "24": 24}
NAME_MAX_BYTES = 120  # well under the 255-byte limit of common file systems, room for a suffix
_RESERVED = re.compile(r"^(con|prn|aux|nul|com[0-9]|lpt[0-9])(\..*)?$", re.IGNORECASE)  # Windows
_UNSAFE = re.compile(r'[/\\:*?"<>|]')


# --- names and files ------------------------------------------------------------------------


def safe_name(text: str, *, max_bytes: int = NAME_MAX_BYTES) -> str:
    """A file stem from user text that cannot leave its folder.

    Unicode letters are kept (NFC); control characters are removed; path separators,
    characters Windows forbids and runs of dots become ``_``; leading dots and
    trailing dots/spaces are dropped; reserved device names (CON, NUL, COM1...) get a
    ``_`` prefix; the result is cut to ``max_bytes`` of UTF-8. Empty text gives ``sound``.
    """
    s = unicodedata.normalize("NFC", str(text))
    s = "".join(ch for ch in s if unicodedata.category(ch) not in ("Cc", "Cf", "Cs", "Co"))
    s = _UNSAFE.sub("_", s)
    s = re.sub(r"\.{2,}", "_", s)
    s = re.sub(r"\s+", " ", s).strip().lstrip(".").rstrip(". ")
    if _RESERVED.match(s):
        s = "_" + s
    b = s.encode("utf-8")[:max_bytes]
    s = b.decode("utf-8", "ignore").rstrip(". ")
    return s or "sound"


def _why(exc: OSError) -> str:
    return "permission denied" if isinstance(exc, PermissionError) else str(exc.strerror or exc)


def _exists(path: Path) -> OutputError:
    return OutputError(f"{path}: already exists; pass --overwrite to replace it")


def write_wav(
    path: str | Path, y: np.ndarray, sr: int, *, bit_depth: str = "24", overwrite: bool = False
) -> Path:
    """Write ``y`` (on the bit depth's grid, see :func:`finish_audio`) as a WAV file.

    Written to a hidden temporary name in the same folder, then moved into place; an
    existing file is kept (``OutputError``) unless ``overwrite``. PCM samples are written
    as exact integer codes, so what :func:`finish_audio` measured is what is on disk.
    """
    path = Path(path)
    if bit_depth not in SUBTYPES:
        raise ParameterError(f"bit_depth={bit_depth!r} must be one of {', '.join(SUBTYPES)}")
    y = np.asarray(y)
    if not np.all(np.isfinite(y)):
        raise AudioError(f"{path.name}: non-finite samples (NaN or Inf); not written")
    if not overwrite and path.exists():
        raise _exists(path)
    bits = _PCM_BITS.get(bit_depth)
    if bits == 16:
        data = np.clip(np.rint(y * 32768.0), -32768, 32767).astype(np.int16)
    elif bits == 24:  # libsndfile takes the top 24 bits of an int32
        data = np.clip(np.rint(y * 2.0**23), -(2**23), 2**23 - 1).astype(np.int32) << 8
    else:
        data = y.astype(np.float32)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.stem[:40]}.", suffix=".tmp", dir=path.parent)
    os.close(fd)
    try:
        sf.write(tmp, data, sr, subtype=SUBTYPES[bit_depth], format="WAV")
        if overwrite:
            os.replace(tmp, path)
        else:
            try:  # a hard link fails if the name appeared meanwhile: never clobber
                os.link(tmp, path)
            except FileExistsError:
                raise _exists(path) from None
            except OSError:  # no hard links on this file system
                if path.exists():
                    raise _exists(path) from None
                os.replace(tmp, path)
    except (OSError, sf.SoundFileError) as exc:
        why = _why(exc) if isinstance(exc, OSError) else exc
        raise OutputError(f"{path}: cannot write ({why})") from None
    finally:
        Path(tmp).unlink(missing_ok=True)
    return path


class OutputFolder:
    """An output folder: created and checked on entry, unique names, WAVs and the manifest.

    ``manifest.json`` lists exactly the WAVs present: it is rewritten after every batch
    and, on any interruption, once more with what was written. Entries of an earlier
    manifest in the same folder whose files are still there (and not replaced now) are
    kept, marked ``"earlier_run": true``.
    """

    def __init__(self, path: str | Path, *, overwrite: bool = False) -> None:
        self.path = Path(path).expanduser()
        self.overwrite = overwrite
        self.items: list[dict[str, Any]] = []
        self.failed: list[dict[str, Any]] = []
        self.header: dict[str, Any] = {}
        self._taken: set[str] = set()
        if self.path.exists() and not self.path.is_dir():
            raise OutputError(f"{self.path}: exists and is not a folder")
        try:
            self.path.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            why = _why(exc)
            raise OutputError(f"{self.path}: cannot create the output folder ({why})") from None
        try:
            fd, probe = tempfile.mkstemp(prefix=".shotsmith-probe-", dir=self.path)
            os.close(fd)
            os.unlink(probe)
        except OSError as exc:
            raise OutputError(f"{self.path}: output folder is not writable ({_why(exc)})") from None
        self._earlier = self._read_earlier()

    def _read_earlier(self) -> list[dict[str, Any]]:
        path = self.path / MANIFEST_FILE
        try:
            old = json.loads(path.read_text(encoding="utf-8"))
            items = [it for it in old.get("items", []) if isinstance(it, dict) and "file" in it]
        except FileNotFoundError:
            return []
        except (OSError, ValueError, AttributeError):
            old, items = None, []
        if not self.overwrite and not (isinstance(old, dict) and old.get("tool") == "shotsmith"):
            raise OutputError(f"{path}: exists and is not a shotsmith manifest; "
                              "pass --overwrite to replace it, or choose another --out")
        return [dict(it, earlier_run=True) for it in items]

    def claim(self, stems: Iterable[str]) -> list[str]:
        """Unique safe names for ``stems``; an existing file is an OutputError unless overwrite."""
        names = []
        for stem in stems:
            base = safe_name(stem)
            name, k = f"{base}.wav", 1
            while name.casefold() in self._taken:  # case-insensitive file systems (macOS)
                k += 1
                name = f"{base}-{k}.wav"
            if not self.overwrite and (self.path / name).exists():
                raise _exists(self.path / name)
            self._taken.add(name.casefold())
            names.append(name)
        return names

    def write(self, name: str, y: np.ndarray, sr: int, bit_depth: str, entry: dict) -> None:
        write_wav(self.path / name, y, sr, bit_depth=bit_depth, overwrite=self.overwrite)
        self.items.append({"file": name, **entry})

    def write_manifest(self, *, complete: bool = False) -> Path:
        mine = {it["file"] for it in self.items}
        earlier = [it for it in self._earlier
                   if it["file"] not in mine and (self.path / it["file"]).is_file()]
        manifest = {"tool": "shotsmith", "version": __version__, "model": None, **self.header,
                    "complete": complete, "items": earlier + self.items, "failed": self.failed}
        path = self.path / MANIFEST_FILE
        try:
            write_json_atomic(path, _jsonable(manifest))
        except OSError as exc:
            raise OutputError(f"{path}: cannot write ({_why(exc)})") from None
        return path


def _jsonable(x: Any) -> Any:
    if isinstance(x, dict):
        return {str(k): _jsonable(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_jsonable(v) for v in x]
    if isinstance(x, np.ndarray):
        return _jsonable(x.tolist())
    if isinstance(x, np.generic):
        x = x.item()
    if isinstance(x, float) and not math.isfinite(x):
        return None
    if isinstance(x, Path):
        return str(x)
    return x


_FIRST_KEYS = ("kind", "z", "seed", "sources", "nearest")


def render_spectra(
    batches: Iterable[tuple[np.ndarray, list[dict[str, Any]]]],
    out_dir: str | Path,
    audio: AudioSpec,
    render: RenderSpec,
    *,
    overwrite: bool = False,
    seed: int = 0,
    progress: Callable[..., None] | None = None,
    total: int | None = None,
    manifest_extra: dict[str, Any] | None = None,
) -> list[dict[str, Any]]:
    """Phase-reconstruct, finish and write batches of [0, 1] spectra; keep the manifest current.

    Parameters
    ----------
    batches : iterable of ``(U, items)``
        ``U`` [shape=(B, audio.n_bins, audio.n_frames)] on the bank's [0, 1] scale; ``items``
        B dicts: ``stem`` (wanted file stem), ``seed`` (phase and dither; default
        ``seed + index``) and any metadata to record (``kind``, ``z``, ``sources``, ``nearest``...).
    out_dir : output folder (created).
    audio, render : the spectrogram scale and the render settings.
    overwrite : replace existing files of the same name.
    progress : ``callable(done, total)`` after each batch.
    manifest_extra : top-level manifest fields (``model``, ``settings``, ...). Lists in it are
        written as they stand at each manifest write, so a caller may extend them (for example
        skipped files) while it produces batches.

    Returns
    -------
    The manifest entries of the files written, in order: ``file``, the metadata, and
    ``sc_db`` (spectral convergence of the reconstruction against the target magnitudes),
    ``peak_dbfs``, ``loudness_lufs``, ``gain_db``, ``normalisation``.
    """
    folder = OutputFolder(out_dir, overwrite=overwrite)
    settings = {"audio": dataclasses.asdict(audio), "render": dataclasses.asdict(render)}
    extra = manifest_extra if manifest_extra is not None else {}
    out_sr = render.output_rate or audio.sample_rate
    folder.header = {"settings": settings, "render": settings["render"],
                     "sample_rate": audio.sample_rate, "output_rate": out_sr, **extra}
    done, complete = 0, False
    try:
        for U, items in batches:
            U = np.asarray(U, dtype=np.float32)
            if U.ndim != 3 or U.shape[1:] != (audio.n_bins, audio.n_frames):
                raise ParameterError(f"spectra of shape {U.shape} do not match the audio settings "
                                     f"(B, {audio.n_bins}, {audio.n_frames})")
            if len(items) != len(U):
                raise ParameterError(f"{len(items)} items for {len(U)} spectra")
            for s in range(0, len(U), render.batch_size):
                its = items[s : s + render.batch_size]
                names = folder.claim(
                    it.get("stem") or f"sound-{done + j:04d}" for j, it in enumerate(its)
                )
                seeds = [int(it.get("seed", seed + done + j)) for j, it in enumerate(its)]
                S = spectra.unit_to_magnitude(U[s : s + len(its)], audio)
                y, sc = reconstruct(S, audio, n_iter=render.iterations, momentum=render.momentum,
                                    init=render.phase_init, seed=seeds)
                if out_sr != audio.sample_rate:
                    y = [resample(yj, orig_sr=audio.sample_rate, target_sr=out_sr) for yj in y]
                for it, name, sd, yj, scj in zip(its, names, seeds, y, sc):
                    meta = {k: it.get(k) for k in _FIRST_KEYS} | {"seed": sd}
                    meta |= {k: v for k, v in it.items() if k not in meta and k != "stem"}
                    try:
                        out, info = finish_audio(yj, out_sr, render,
                                                 rng=np.random.default_rng([sd, 0xD17]))
                    except AudioError as exc:
                        folder.failed.append({"file": name, **meta, "reason": str(exc)})
                        continue
                    meta |= {"sc_db": round(float(scj), 3), **info}
                    folder.write(name, out, out_sr, render.bit_depth, meta)
                done += len(its)
                folder.write_manifest()
                if progress is not None:
                    progress(done, total)
        complete = True
    finally:
        if complete or folder.items or folder.failed:  # a run that wrote nothing leaves it be
            folder.write_manifest(complete=complete)
    return folder.items
