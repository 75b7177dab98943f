"""Export kept sounds as a kit: a folder of WAVs, a kit manifest and an SFZ instrument.

The kit folder holds ``samples/`` (byte-identical copies of the chosen WAVs, renamed
with a template), ``kit.json`` (where every sample came from, its key and layer) and
``KIT.sfz``, a plain SFZ instrument (the open SFZ format: ``<group>`` and ``<region>``
headers with ``sample``, ``lokey``/``hikey``/``pitch_keycenter``, ``lovel``/``hivel``
and ``seq_length``/``seq_position``; only opcodes of SFZ 1, so any SFZ player reads it).

On the keyboard (:mod:`pipeline.kit_layout`), each category gets keys of the chosen
layout. Sounds that belong together share a key: the steps of one interpolation as
velocity layers (soft plays the first step, hard the last), variations of one sound
as round robins. Every other sound has a key of its own.
"""

from __future__ import annotations

import hashlib
import re
import string
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from pipeline import __version__, files
from pipeline.errors import OutputError, ParameterError, ShotsmithError
from pipeline.kit_layout import GM1_PERCUSSION, LAYOUTS, assign_keys, velocity_ranges
from pipeline.listen.catalog import BankRef, Sound, read_bank, read_folders, sound_category
from pipeline.listen.picks import load_picks
from pipeline.outputs import refuse_library, safe_name
from pipeline.scan import is_inside

KIT_MANIFEST = "kit.json"
SAMPLES_DIR = "samples"
DEFAULT_TEMPLATE = "{category}_{kind}_{n:02d}"
TEMPLATE_FIELDS = {
    "category": "the sound's category ('sound' when unknown)",
    "kind": "generate, vary, interpolate or resynth",
    "n": "counts from 1 within each category and kind",
    "name": "the file name it had, without .wav",
    "folder": "the name of the folder it came from",
    "seed": "its seed",
    "step": "its step along an interpolation (from 0)",
    "key": "the MIDI key it is on",
}


@dataclass
class _Slot:
    """Sounds that share one key: a single sound, velocity layers, or round robins."""

    category: str | None
    mode: str  # "single", "velocity" or "round robin"
    sounds: list[dict[str, Any]]
    label: str
    key: int = -1
    extra: dict[str, Any] = field(default_factory=dict)


def check_template(template: str) -> list[str]:
    """The fields a ``--name`` template uses; ParameterError for unknown fields or bad syntax."""
    try:
        fields = [f for _, f, _, _ in string.Formatter().parse(template) if f is not None]
    except ValueError as exc:
        raise ParameterError(f"--name {template!r}: {exc}") from None
    for f in fields:
        if f not in TEMPLATE_FIELDS:
            raise ParameterError(f"--name {template!r}: unknown field {{{f}}}; use "
                                 + ", ".join(f"{{{k}}}" for k in TEMPLATE_FIELDS))
    return fields


def kit_file_stem(text: str) -> str:
    """A file stem that is safe on disk and in an SFZ line (no spaces, '=', '#' or '$')."""
    return safe_name(re.sub(r"[\s=#$<>]+", "_", text))


def _comment(text: str) -> str:
    """User text (category and clip names) made safe inside an SFZ ``//`` comment line."""
    return re.sub(r"[\x00-\x1f\x7f]+", " ", str(text))


def _group_key(s: Sound) -> tuple | None:
    it = s.item
    srcs = tuple(str(x) for x in it.get("sources") or [])
    if it.get("kind") == "vary":
        return ("vary", s.folder, srcs, it.get("amount"))
    if it.get("kind") == "interpolate" and isinstance(it.get("step"), int):
        return ("interpolate", s.folder, srcs, it.get("path"))
    return None


def _where(s: Sound) -> str:
    return f"{s.root.name}/{s.file}"


def _slots(chosen: list[dict[str, Any]]) -> list[_Slot]:
    """Group the chosen sounds: interpolation steps and variations share a slot."""
    groups: dict[tuple, list[dict[str, Any]]] = {}
    slots: list[_Slot] = []
    for c in chosen:
        key = _group_key(c["sound"])
        if key is None:
            slots.append(_Slot(c["category"], "single", [c], _where(c["sound"])))
        elif key in groups:
            groups[key].append(c)
        else:
            groups[key] = [c]
            slots.append(_Slot(c["category"], "", groups[key], ""))
    for slot in slots:
        if slot.mode:
            continue
        first = slot.sounds[0]["sound"].item
        srcs = " -> ".join(str(x) for x in first.get("sources") or []) or "?"
        if len(slot.sounds) == 1:
            slot.mode, slot.label = "single", _where(slot.sounds[0]["sound"])
        elif first.get("kind") == "interpolate" and len(slot.sounds) <= 127:
            slot.sounds.sort(key=lambda c: c["sound"].item["step"])
            slot.mode = "velocity"
            slot.label = f"{len(slot.sounds)} steps of {srcs} as velocity layers (soft = first)"
        else:
            slot.mode = "round robin"
            slot.label = f"{len(slot.sounds)} variations of {srcs}, round robin"
    return slots


def _choose(folders: list[Path], include_all: bool, ref: BankRef | None) -> list[dict[str, Any]]:
    catalog = read_folders(folders)
    chosen = []
    for k, root in enumerate(catalog.folders):
        marks = load_picks(root)
        for s in (x for x in catalog.sounds if x.folder == k):
            mark = marks.get(s.file)
            if include_all or mark == "keep":
                category, how = sound_category(s.item, ref)
                chosen.append({"sound": s, "mark": mark, "category": category,
                               "category_from": how})
    if not chosen:
        where = ", ".join(str(f) for f in catalog.folders)
        raise ShotsmithError(f"no kept sounds in {where} (keep some with 'shotsmith listen', "
                             "or pass --all)")
    return chosen


def _names(slots: list[_Slot], template: str) -> None:
    check_template(template)
    counts: Counter = Counter()
    taken: set[str] = set()
    for slot in slots:
        for c in slot.sounds:
            s, it = c["sound"], c["sound"].item
            kind = str(it.get("kind") or "sound")
            cat = c["category"] or "sound"
            counts[(cat, kind)] += 1
            values = {"category": cat, "kind": kind, "n": counts[(cat, kind)],
                      "name": Path(s.file).stem, "folder": s.root.name, "seed": it.get("seed"),
                      "step": it.get("step"), "key": slot.key}
            try:
                text = template.format(**values)
            except (ValueError, TypeError) as exc:
                raise ParameterError(f"--name {template!r}: cannot name {s.file} ({exc}; "
                                     "a field without a value for this sound?)") from None
            stem, k = kit_file_stem(text), 1
            name = f"{stem}.wav"
            while name.casefold() in taken:
                k += 1
                name = f"{stem}-{k}.wav"
            taken.add(name.casefold())
            c["name"] = name


def _sfz_text(kit_name: str, slots: list[_Slot], layout: str, n_sounds: int) -> str:
    lines = [
        f"// {_comment(kit_name)}: {n_sounds} one-shots exported by shotsmith {__version__}",
        f"// layout {layout}: {LAYOUTS[layout]}",
        f"// {KIT_MANIFEST} lists where every sample came from.",
        "",
    ]
    for slot in sorted(slots, key=lambda s: s.key):
        gm = GM1_PERCUSSION.get(slot.key) if layout == "gm" else None
        gm = f" ({gm})" if gm else ""
        lines.append(f"// key {slot.key}{gm}: {_comment(slot.category or 'no category')}, "
                     f"{_comment(slot.label)}")
        group = "<group> loop_mode=one_shot"
        if slot.mode == "round robin":
            group += f" seq_length={len(slot.sounds)}"
        lines.append(group)
        vel = velocity_ranges(len(slot.sounds)) if slot.mode == "velocity" else None
        for i, c in enumerate(slot.sounds):
            region = f"<region> lokey={slot.key} hikey={slot.key} pitch_keycenter={slot.key}"
            if vel is not None:
                c["lovel"], c["hivel"] = vel[i]
                region += f" lovel={vel[i][0]} hivel={vel[i][1]}"
            if slot.mode == "round robin":
                c["seq_length"], c["seq_position"] = len(slot.sounds), i + 1
                region += f" seq_position={i + 1}"
            # sample= last on the line: players read its value to the end of the line
            lines.append(f"{region} sample={SAMPLES_DIR}/{c['name']}")
        lines.append("")
    return "\n".join(lines)


def export_kit(
    folders: list[str | Path],
    out: str | Path,
    *,
    include_all: bool = False,
    name: str = DEFAULT_TEMPLATE,
    layout: str = "gm",
    bank: str | Path | None = None,
    overwrite: bool = False,
) -> dict[str, Any]:
    """Copy the kept sounds of ``folders`` (or all, ``include_all``) into a kit with an SFZ.

    Parameters
    ----------
    folders : output folders with manifests (and ``picks.json`` from ``shotsmith listen``).
    out : the kit folder (created); must not lie inside one of ``folders``.
    include_all : every sound in the manifests, marked or not.
    name : file name template (``str.format`` fields in :data:`TEMPLATE_FIELDS`).
    layout : key layout, one of :data:`pipeline.kit_layout.LAYOUTS`.
    bank : the bank the model was trained on: gives categories to sounds not made with
        ``--near`` (from their source or nearest training clip).
    overwrite : replace files of the same names in ``out``.

    Returns
    -------
    summary : dict with ``out``, ``sfz``, ``manifest``, ``sounds``, ``keys``, ``layout``.
    """
    if layout not in LAYOUTS:
        raise ParameterError(f"layout={layout!r} is not one of {', '.join(LAYOUTS)}")
    check_template(name)
    out = Path(out).expanduser()
    ref = read_bank(bank) if bank is not None else None
    chosen = _choose([Path(f) for f in folders], include_all, ref)
    for root in dict.fromkeys(c["sound"].root for c in chosen):
        if is_inside(out, root):
            raise OutputError(f"{out}: --out must not be inside {root} (a folder being exported)")
    if bank is not None:
        refuse_library(out, option="--out", banks=[bank])
    slots = _slots(chosen)
    for slot, key in zip(slots, assign_keys([s.category for s in slots], layout)):
        slot.key = key
    _names(slots, name)
    sfz = out / f"{kit_file_stem(out.name or 'kit')}.sfz"
    targets = [out / SAMPLES_DIR / c["name"] for s in slots for c in s.sounds]
    if out.exists() and not out.is_dir():
        raise OutputError(f"{out}: exists and is not a folder")
    if not overwrite:
        for path in [sfz, out / KIT_MANIFEST, *targets]:
            if path.exists():
                raise OutputError(f"{path}: already exists; pass --overwrite to replace it")
    try:
        (out / SAMPLES_DIR).mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"{out}: cannot create the kit folder ({files.reason(exc)})") from None
    text = _sfz_text(out.name or "kit", slots, layout, len(targets))
    entries = []
    for slot in slots:
        for c in slot.sounds:
            s = c["sound"]
            try:
                data = s.path.read_bytes()
            except OSError as exc:
                raise ShotsmithError(f"{s.path}: cannot read ({files.reason(exc)})") from None
            files.write_atomic(out / SAMPLES_DIR / c["name"], data, overwrite=overwrite)
            layer = {k: c[k] for k in ("lovel", "hivel", "seq_length", "seq_position") if k in c}
            entries.append({
                "file": f"{SAMPLES_DIR}/{c['name']}", "sha256": hashlib.sha256(data).hexdigest(),
                "key": slot.key, **layer, "category": c["category"],
                "category_from": c["category_from"],
                "from": {"folder": str(s.root), "file": s.file, "mark": c["mark"]},
                **{k: s.item.get(k) for k in ("kind", "seed", "sources", "step", "path",
                                              "amount", "nearest", "model")
                   if k in s.item},
            })
    manifest = {"tool": "shotsmith", "version": __version__, "kit": True, "layout": layout,
                "layout_description": LAYOUTS[layout], "sfz": sfz.name, "template": name,
                "selection": "all" if include_all else "kept", "sounds": entries}
    files.write_json_atomic(out / KIT_MANIFEST, manifest)
    files.write_atomic(sfz, text.encode("utf-8"))  # an existing one was refused above
    return {"out": str(out), "sfz": str(sfz), "manifest": str(out / KIT_MANIFEST),
            "sounds": len(entries), "keys": len(slots), "layout": layout,
            "selection": manifest["selection"]}
