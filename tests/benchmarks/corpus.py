"""Real recorded one-shots for the quality benchmark, built from Debian's packages.

    python tests/benchmarks/corpus.py [--out DIR]

Needs (apt-get install -y ...):

- ``fluidsynth`` and ``fluid-soundfont-gm`` (FluidR3_GM.sf2: the drum kits of bank 128),
- ``avldrums.lv2-soundfont`` (two multi-sampled acoustic kits; notes 36-47 only, the part of
  their key map that the kits' author documents, in a MIDI name document, as General MIDI),
- ``hydrogen-drumkits-effects`` (the guitar-strum one-shots: a tonal second library).

None of this audio is ours and none of it is shipped: the corpus is rendered into a
cache folder (default ``~/.cache/shotsmith-bench``) on first use. Each package's
licence is in /usr/share/doc/<package>/copyright.

Drums: every General MIDI Level 1 percussion note 35-81 of each kit at three
velocities, rendered dry (no reverb, no chorus) at 44.1 kHz by the ``fluidsynth``
command line from small MIDI files written here; categories follow the GM Level 1
percussion key map (MMA, "General MIDI System Level 1": 35-36 kick; 37, 38, 40
snare; 41, 43, 45, 47, 48, 50 tom; 42, 44, 46 hat; 49, 51, 52, 53, 55, 57, 59
cymbal; the rest perc). Peak normalisation in the front end makes velocity layers
near-identical, and the kits of one SoundFont share samples, so renders that are
near-identical after the front end are dropped, and the 80/20 split is made by
group: all renders of one GM note from one SoundFont fall on the same side.

Strums: 296 strums (full, down, up) of 25 chords; category = strum direction,
group = chord, so no chord straddles the split.
"""

from __future__ import annotations

import argparse
import json
import shutil
import struct
import subprocess
import sys
import tempfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import soundfile as sf

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parents[1]))

from pipeline.config import AudioSpec  # noqa: E402
from pipeline.errors import AudioError  # noqa: E402
from pipeline.frontend import load_clip  # noqa: E402

SF2 = Path("/usr/share/sounds/sf2")
STRUMS = Path("/usr/share/hydrogen/data/drumkits/belofilms_GuitarStrums")
DEFAULT_OUT = Path.home() / ".cache" / "shotsmith-bench"
CORPUS_VERSION = 1
SR = 44100
HIT_SPACING_S = 3.0
VELOCITIES = (45, 85, 125)
NOTES = range(35, 82)
# (SoundFont file, MIDI channel, program, kit name); FluidR3 keeps one kit per family
KITS = (
    [("FluidR3_GM.sf2", 9, p, name) for p, name in
     [(0, "standard"), (8, "room"), (16, "power"), (24, "electronic"), (25, "tr808"),
      (32, "jazz"), (40, "brush"), (48, "orchestra")]]
    + [("Black_Pearl_4_LV2.sf2", 0, 0, "blackpearl"),
       ("Red_Zeppelin_4_LV2.sf2", 0, 0, "redzeppelin")]
)
PACKAGES = {"fluidsynth": "fluidsynth", "FluidR3_GM.sf2": "fluid-soundfont-gm",
            "Black_Pearl_4_LV2.sf2": "avldrums.lv2-soundfont",
            "Red_Zeppelin_4_LV2.sf2": "avldrums.lv2-soundfont",
            "strums": "hydrogen-drumkits-effects"}
AVL_DOCUMENTED = range(36, 48)  # kick, snares, clap, toms, hats as General MIDI
HELDOUT_FRACTION = 0.2
DUPLICATE_DB = 0.5  # RMS difference of coarse log spectra below which two renders are one sound
# the analysis used for de-duplication: full band, one second
FRONT_END = AudioSpec(sample_rate=SR, duration=1.0, n_fft=2048, hop_length=512)


def gm_category(note: int) -> str:
    """Category of a General MIDI Level 1 percussion note (MMA GM1 percussion key map)."""
    if note in (35, 36):
        return "kick"
    if note in (37, 38, 40):
        return "snare"
    if note in (41, 43, 45, 47, 48, 50):
        return "tom"
    if note in (42, 44, 46):
        return "hat"
    if note in (49, 51, 52, 53, 55, 57, 59):
        return "cymbal"
    return "perc"


class Missing(Exception):
    """A Debian package the corpus needs is not installed."""


# --- MIDI and rendering --------------------------------------------------------------------


def _vlq(n: int) -> bytes:
    out = [n & 0x7F]
    n >>= 7
    while n:
        out.append(0x80 | (n & 0x7F))
        n >>= 7
    return bytes(reversed(out))


def write_midi(path: Path, hits: list[tuple[float, int, int]], *, channel: int,
               program: int) -> None:
    """A format-0 Standard MIDI File: a program change, then the hits ``(time_s, note,
    velocity)``, each released after one second. On channel 10 (index 9) fluidsynth
    takes the program from the percussion bank 128; elsewhere from bank 0."""
    tpq, tempo = 480, 500_000  # 960 ticks per second
    tick = tpq * 1_000_000 / tempo
    events: list[tuple[int, bytes]] = [
        (0, bytes([0xFF, 0x51, 0x03]) + tempo.to_bytes(3, "big")),
        (0, bytes([0xC0 | channel, program])),
    ]
    for t, note, vel in hits:
        events.append((round(t * tick), bytes([0x90 | channel, note, vel])))
        events.append((round((t + 1.0) * tick), bytes([0x80 | channel, note, 0])))
    events.sort(key=lambda e: e[0])
    track, last = bytearray(), 0
    for when, data in events:
        track += _vlq(when - last) + data
        last = when
    track += _vlq(int(2 * tick)) + bytes([0xFF, 0x2F, 0x00])
    path.write_bytes(b"MThd" + struct.pack(">IHHH", 6, 0, 1, tpq)
                     + b"MTrk" + struct.pack(">I", len(track)) + bytes(track))


def render_kit(sf2: Path, channel: int, program: int, out: Path) -> list[Path]:
    """Render notes 35-81 at each velocity of one kit; one WAV per audible hit."""
    if shutil.which("fluidsynth") is None:
        raise Missing("fluidsynth")
    hits = [(1.0 + i * HIT_SPACING_S, note, vel)
            for i, (note, vel) in enumerate((n, v) for n in NOTES for v in VELOCITIES)]
    out.mkdir(parents=True, exist_ok=True)
    with tempfile.TemporaryDirectory() as tmp:
        mid, wav = Path(tmp) / "kit.mid", Path(tmp) / "kit.wav"
        write_midi(mid, hits, channel=channel, program=program)
        subprocess.run(["fluidsynth", "-n", "-i", "-q", "-R", "0", "-C", "0", "-g", "0.5",
                        "-r", str(SR), "-T", "wav", "-F", str(wav), str(sf2), str(mid)],
                       check=True, capture_output=True)
        y, sr = sf.read(wav, dtype="float32", always_2d=True)
    assert sr == SR, sr
    written = []
    for t, note, vel in hits:
        a = int(round((t - 0.05) * SR))
        seg = y[a : a + int((HIT_SPACING_S - 0.1) * SR)]
        if len(seg) == 0 or np.max(np.abs(seg)) < 10 ** (-60 / 20):
            continue  # the kit has no sample on this note
        path = out / f"{note:02d}-v{vel:03d}.wav"
        sf.write(path, seg, SR, subtype="FLOAT")
        written.append(path)
    return written


# --- de-duplication and the split ----------------------------------------------------------


@dataclass
class Clip:
    path: Path
    library: str
    category: str
    group: str


def _fingerprint(path: Path) -> np.ndarray | None:
    """Coarse log spectrum of the clip as the front end fits it: 32 bands x 16 time slices."""
    from pipeline.spectra import magnitude

    try:
        y = load_clip(path, FRONT_END)
    except AudioError:
        return None
    S = magnitude(y, n_fft=FRONT_END.n_fft, hop_length=FRONT_END.hop_length)
    edges = np.unique(np.geomspace(1, S.shape[0], 33).astype(int))
    bands = np.add.reduceat(S**2, edges[:-1], axis=0)
    cols = np.array_split(np.arange(bands.shape[1]), 16)
    coarse = np.stack([bands[:, c].mean(axis=1) for c in cols], axis=1)
    return 10.0 * np.log10(np.maximum(coarse, 1e-10))


def drop_duplicates(clips: list[Clip]) -> tuple[list[Clip], int]:
    """Keep one clip of every set whose coarse spectra differ by less than DUPLICATE_DB (RMS)."""
    kept: list[Clip] = []
    prints: list[np.ndarray] = []
    dropped = 0
    for clip in clips:
        fp = _fingerprint(clip.path)
        if fp is None:
            dropped += 1
            continue
        if prints:
            d = np.sqrt(np.mean((np.stack(prints) - fp) ** 2, axis=(1, 2)))
            if d.min() < DUPLICATE_DB:
                dropped += 1
                continue
        kept.append(clip)
        prints.append(fp)
    return kept, dropped


def split_by_group(clips: list[Clip], *, fraction: float = HELDOUT_FRACTION, seed: int = 0):
    """``(train, heldout)``: whole groups are held out, in a seeded order, while no category
    goes over ``fraction`` of its clips (x 1.25); then any category with two or more groups
    and none held out gives its smallest group. A group may span categories (a chord's
    strums in every direction): it is held out or kept whole."""
    rng = np.random.default_rng(seed)
    count: dict[str, dict[str, int]] = {}
    for c in clips:
        count.setdefault(c.group, {}).setdefault(c.category, 0)
        count[c.group][c.category] += 1
    totals: dict[str, int] = {}
    for per in count.values():
        for cat, n in per.items():
            totals[cat] = totals.get(cat, 0) + n
    held_n = dict.fromkeys(totals, 0)
    held: set[str] = set()

    def hold(group: str) -> None:
        held.add(group)
        for cat, n in count[group].items():
            held_n[cat] += n

    for g in rng.permutation(sorted(count)):
        g = str(g)
        if all(held_n[cat] + n <= 1.25 * fraction * totals[cat] for cat, n in count[g].items()):
            hold(g)
    for cat in sorted(totals):
        groups = sorted((sum(count[g].values()), g) for g in count if cat in count[g])
        if held_n[cat] == 0 and len(groups) >= 2:
            hold(groups[0][1])
    return [c for c in clips if c.group not in held], [c for c in clips if c.group in held]


def _link(clips: list[Clip], folder: Path) -> None:
    for c in clips:
        dest = folder / c.category / f"{c.path.parent.name}-{c.path.name}"
        dest.parent.mkdir(parents=True, exist_ok=True)
        dest.symlink_to(c.path)


def _drums(raw: Path) -> list[Clip]:
    clips = []
    for sf2_name, channel, program, kit in KITS:
        sf2 = SF2 / sf2_name
        if not sf2.is_file():
            raise Missing(PACKAGES[sf2_name])
        for path in render_kit(sf2, channel, program, raw / kit):
            note = int(path.name[:2])
            if channel != 9 and note not in AVL_DOCUMENTED:
                continue
            family = Path(sf2_name).stem  # kits of one SoundFont share samples
            clips.append(Clip(path, "drums", gm_category(note), f"{family}/{note}"))
    return clips


def _strums() -> list[Clip]:
    if not STRUMS.is_dir():
        raise Missing(PACKAGES["strums"])
    clips = []
    for path in sorted(STRUMS.glob("*.flac")):
        stem = path.stem.replace("minro", "minor")
        parts = stem.split("_")
        direction = parts[1].lower() if len(parts) > 2 else "full"
        clips.append(Clip(path, "strums", direction, parts[0].replace(" ", "")))
    return clips


def build(out: Path = DEFAULT_OUT, *, log=print) -> Path:
    """Render, de-duplicate and split both libraries under ``out`` (reused when present).

    Layout: ``out/<library>/{train,heldout}/<category>/<kit>-<file>`` (symbolic links
    to the rendered or installed files) and ``out/corpus.json``.

    Raises
    ------
    Missing
        Naming the Debian package to install.
    """
    info_path = out / "corpus.json"
    if info_path.is_file():
        info = json.loads(info_path.read_text())
        if info.get("version") == CORPUS_VERSION:
            return out
    if out.exists():
        shutil.rmtree(out)
    raw = out / "raw"
    info = {"version": CORPUS_VERSION, "libraries": {}}
    for name, make in (("drums", lambda: _drums(raw)), ("strums", _strums)):
        log(f"corpus: {name}: rendering / reading")
        clips, dropped = drop_duplicates(make())
        train, held = split_by_group(clips)
        _link(train, out / name / "train")
        _link(held, out / name / "heldout")
        cats = sorted({c.category for c in clips})
        info["libraries"][name] = {
            "clips": len(clips), "duplicates_dropped": dropped,
            "train": len(train), "heldout": len(held),
            "per_category": {k: [sum(c.category == k for c in train),
                                 sum(c.category == k for c in held)] for k in cats},
        }
        log(f"corpus: {name}: {json.dumps(info['libraries'][name])}")
    info_path.write_text(json.dumps(info, indent=1))
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--out", type=Path, default=DEFAULT_OUT)
    args = ap.parse_args()
    try:
        build(args.out)
    except Missing as exc:
        sys.exit(f"corpus: install the Debian package {exc} (apt-get install -y {exc})")


if __name__ == "__main__":
    main()
