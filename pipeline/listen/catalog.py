"""What the listening page and the kit export read: output folders and, optionally, a bank.

Every sound comes from a folder's manifest (through :func:`pipeline.manifest.load_manifest`)
and is accepted only when its file name stays inside that folder: no absolute paths, no
``..``, and no symbolic link that resolves outside the folder. The bank gives each clip's
category and the folder it was ingested from (its index), so the nearest training
sound of a rendered one can be found and played.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path, PurePosixPath, PureWindowsPath
from typing import Any

from pipeline.errors import ParameterError, ShotsmithError

NEAR_COPY_RATIO = 0.5  # below this distance ratio a sound is close to a copy (see the README)


@dataclass(frozen=True)
class Sound:
    """One listed WAV: which folder, its name there, its resolved path and its manifest entry."""

    folder: int
    root: Path
    file: str
    path: Path
    item: dict[str, Any]


@dataclass
class Catalog:
    """The sounds of several output folders, and why any listed file was left out."""

    folders: list[Path]
    manifests: list[dict[str, Any]]
    sounds: list[Sound]
    notes: list[str] = field(default_factory=list)

    def find(self, folder: int, file: str) -> Sound | None:
        """The sound listed as ``file`` in folder number ``folder``: exact names only."""
        return self._by_key.get((folder, file))

    @cached_property
    def _by_key(self) -> dict[tuple[int, str], Sound]:
        return {(s.folder, s.file): s for s in self.sounds}


def _plain_relative(name: str) -> bool:
    """A relative name with no drive, root, ``..`` or backslash: it cannot name a parent."""
    if not name or "\\" in name or "\x00" in name:
        return False
    if PurePosixPath(name).is_absolute() or PureWindowsPath(name).is_absolute():
        return False
    if PureWindowsPath(name).drive:
        return False
    return all(part not in ("", ".", "..") for part in name.split("/"))


def contained_file(root: Path, name: str) -> Path | None:
    """``root/name`` resolved, if ``name`` is plain and the file (links followed) lies in ``root``.

    ``root`` must already be resolved. None for anything else: a missing file, a folder,
    a traversal, or a link whose target is outside ``root``.
    """
    if not isinstance(name, str) or not _plain_relative(name):
        return None
    try:
        real = (root / name).resolve(strict=True)
    except (OSError, RuntimeError):  # missing, or a link loop
        return None
    if not real.is_relative_to(root) or not real.is_file():
        return None
    return real


def read_folders(folders: list[str | Path]) -> Catalog:
    """Read the manifests of ``folders`` (each once, in the order given).

    Raises
    ------
    ParameterError
        A folder that does not exist, or no folder given.
    ShotsmithError
        A folder without a manifest.
    OutputError
        A manifest that cannot be read, is not a shotsmith manifest or is of a newer format
        (from :func:`pipeline.manifest.load_manifest`).
    """
    from pipeline.manifest import load_manifest

    if not folders:
        raise ParameterError("give at least one folder of rendered sounds")
    roots: list[Path] = []
    for f in folders:
        path = Path(f).expanduser()
        if not path.is_dir():
            raise ParameterError(f"{f}: folder not found" if not path.exists()
                                 else f"{f}: not a folder")
        real = path.resolve()
        if real not in roots:
            roots.append(real)
    manifests, sounds, notes = [], [], []
    for k, root in enumerate(roots):
        manifest = load_manifest(root)
        if manifest is None:
            raise ShotsmithError(f"{root}: no manifest.json here (not a folder shotsmith wrote)")
        manifests.append(manifest)
        seen = set()
        for item in manifest.get("items") or []:
            name = item.get("file")
            if name in seen:
                continue
            path = contained_file(root, name)
            if path is None:
                notes.append(f"{root / str(name)}: left out (not a plain file inside {root})")
                continue
            seen.add(name)
            sounds.append(Sound(k, root, name, path, item))
    return Catalog(roots, manifests, sounds, notes)


@dataclass(frozen=True)
class BankRef:
    """What the page needs from a bank: its clip table, the audio spec and the source folder."""

    path: Path
    audio: Any
    clips: Any  # pipeline.cliptable.ClipTable
    source: Path | None

    def category(self, name: str | None) -> str | None:
        row = self.clips.row(name) if isinstance(name, str) else None
        return None if row is None else self.clips.categories[row]

    def source_file(self, name: str) -> Path | None:
        """The source file of clip ``name``, when it still lies inside the ingested folder."""
        row = self.clips.row(name) if isinstance(name, str) else None
        if row is None or self.source is None:
            return None
        return contained_file(self.source, self.clips.paths[row])


def read_bank(path: str | Path) -> BankRef:
    """Open a bank's index (not its spectra): clips, audio spec, library folder."""
    from pipeline.bank import read_clips, read_index, source_folder
    from pipeline.config import AudioSpec, spec_from_dict
    from pipeline.errors import BankError, PresetError

    path = Path(path).expanduser()
    index = read_index(path)
    try:
        audio = spec_from_dict(AudioSpec, index["audio"], "audio")
    except (PresetError, KeyError, TypeError) as exc:
        raise BankError(f"{path}: bad audio settings in the index ({exc})") from None
    clips = read_clips(path, index)
    source = source_folder(path)
    source = source.resolve() if source is not None and source.is_dir() else None
    return BankRef(path, audio, clips, source)


def sound_category(item: dict[str, Any], bank: BankRef | None) -> tuple[str | None, str]:
    """An item's category and where it comes from.

    In order: the category asked for with ``--near``; the item's own (resynth: its source
    folder); the category of the first source clip (vary, interpolate); the category of
    the nearest training clip. The last two need the bank. ``(None, "")`` when unknown.
    """
    sources = [s for s in item.get("sources") or [] if isinstance(s, str)]
    for s in sources:
        if s.startswith("category:"):
            return s.split(":", 1)[1], "asked with --near"
    if isinstance(item.get("category"), str):
        return item["category"], "its source folder"
    if bank is not None:
        if sources and item.get("kind") in ("vary", "interpolate"):
            cat = bank.category(sources[0])
            if cat:
                return cat, f"from {sources[0]}"
        near = item.get("nearest")
        if isinstance(near, dict):
            cat = bank.category(near.get("name"))
            if cat:
                return cat, "of the nearest training sound"
    return None, ""
