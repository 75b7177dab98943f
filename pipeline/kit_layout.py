"""Key layouts for exported kits: which MIDI keys each category's sounds go to.

Pure functions over category names and counts. Three layouts:

- ``gm`` (the default): drum categories on the keys of the General MIDI Level 1
  percussion key map (MMA, "General MIDI System Level 1", 1991, channel 10 key map:
  35-81); categories the map has no key for, and sounds beyond a category's keys, take
  free keys from 82 upwards, then from 34 downwards.
- ``chromatic``: one key per sound (or set of layered sounds), consecutive from key 36,
  categories in alphabetical order.
- ``octaves``: one octave per category (the first from key 24, C1 where 60 is C4), its
  sounds on consecutive keys of that octave.
"""

from __future__ import annotations

import re

from pipeline.errors import ParameterError

LAYOUTS = {
    "gm": "General MIDI Level 1 percussion key map (MMA 1991) for drum categories; "
    "other sounds from key 82 up",
    "chromatic": "one key per sound from key 36 up, categories in alphabetical order",
    "octaves": "one octave per category from key 24 (C1, with 60 = C4)",
}

# General MIDI Level 1 percussion key map, MMA "General MIDI System Level 1" (1991),
# channel 10: key number -> instrument name.
GM1_PERCUSSION = {
    35: "Acoustic Bass Drum", 36: "Bass Drum 1", 37: "Side Stick", 38: "Acoustic Snare",
    39: "Hand Clap", 40: "Electric Snare", 41: "Low Floor Tom", 42: "Closed Hi-Hat",
    43: "High Floor Tom", 44: "Pedal Hi-Hat", 45: "Low Tom", 46: "Open Hi-Hat",
    47: "Low-Mid Tom", 48: "Hi-Mid Tom", 49: "Crash Cymbal 1", 50: "High Tom",
    51: "Ride Cymbal 1", 52: "Chinese Cymbal", 53: "Ride Bell", 54: "Tambourine",
    55: "Splash Cymbal", 56: "Cowbell", 57: "Crash Cymbal 2", 58: "Vibraslap",
    59: "Ride Cymbal 2", 60: "Hi Bongo", 61: "Low Bongo", 62: "Mute Hi Conga",
    63: "Open Hi Conga", 64: "Low Conga", 65: "High Timbale", 66: "Low Timbale",
    67: "High Agogo", 68: "Low Agogo", 69: "Cabasa", 70: "Maracas", 71: "Short Whistle",
    72: "Long Whistle", 73: "Short Guiro", 74: "Long Guiro", 75: "Claves",
    76: "Hi Wood Block", 77: "Low Wood Block", 78: "Mute Cuica", 79: "Open Cuica",
    80: "Mute Triangle", 81: "Open Triangle",
}

# Category words -> GM1 keys, most specific first. A word matches a whole token of the
# category name (plural "s" ignored) or, for multi-word terms, the name with spaces,
# hyphens and underscores removed. The words are ours (common names of the instruments).
GM_WORDS: tuple[tuple[tuple[str, ...], tuple[int, ...]], ...] = (
    (("ridebell",), (53,)),
    (("cowbell",), (56,)),
    (("openhat", "openhihat", "oh", "ohh"), (46,)),
    (("pedalhat", "pedalhihat"), (44,)),
    (("closedhat", "closedhihat", "ch", "chh"), (42,)),
    (("hat", "hihat", "hh"), (42, 44, 46)),
    (("kick", "bassdrum", "bd", "kickdrum"), (36, 35)),
    (("rim", "rimshot", "sidestick", "stick"), (37,)),
    (("snare", "sd", "snaredrum"), (38, 40)),
    (("clap", "handclap"), (39,)),
    (("floortom",), (41, 43)),
    (("tom", "toms"), (45, 47, 48, 50, 41, 43)),
    (("crash",), (49, 57)),
    (("ride",), (51, 59)),
    (("china", "chinese"), (52,)),
    (("splash",), (55,)),
    (("cymbal",), (49, 57, 55, 52)),
    (("tambourine", "tamb"), (54,)),
    (("vibraslap",), (58,)),
    (("bongo",), (60, 61)),
    (("conga",), (62, 63, 64)),
    (("timbale",), (65, 66)),
    (("agogo",), (67, 68)),
    (("cabasa",), (69,)),
    (("maraca", "shaker"), (70,)),
    (("whistle",), (71, 72)),
    (("guiro",), (73, 74)),
    (("clave",), (75,)),
    (("woodblock", "block"), (76, 77)),
    (("cuica",), (78, 79)),
    (("triangle",), (80, 81)),
)

SPARE_KEYS = tuple(range(82, 128)) + tuple(range(34, -1, -1))


def gm_keys(category: str | None) -> tuple[int, ...]:
    """The GM1 percussion keys for a category name, best first; () when it names no drum."""
    if not category:
        return ()
    low = category.lower()
    tokens = {t[:-1] if len(t) > 3 and t.endswith("s") else t
              for t in re.split(r"[^a-z0-9]+", low) if t}
    tokens |= set(re.split(r"[^a-z0-9]+", low)) - {""}
    joined = re.sub(r"[^a-z0-9]+", "", low)
    for words, keys in GM_WORDS:
        for w in words:
            if w in tokens or (len(w) >= 6 and w in joined):
                return keys
    return ()


def assign_keys(categories: list[str | None], layout: str = "gm") -> list[int]:
    """One distinct MIDI key (0-127) for each slot, given each slot's category.

    A slot is one sound, or a set of sounds meant to share a key (velocity layers or
    round robins). Slots keep their order within a category.

    Raises
    ------
    ParameterError
        Unknown layout, or more slots than the layout has keys for.
    """
    if layout not in LAYOUTS:
        raise ParameterError(f"layout={layout!r} is not one of {', '.join(LAYOUTS)}")
    order = sorted(set(categories), key=lambda c: (c is None, c or ""))
    slots = {c: [i for i, x in enumerate(categories) if x == c] for c in order}
    keys = [-1] * len(categories)
    if layout == "gm":
        taken: set[int] = set()
        later = []
        for c in order:
            free = [k for k in gm_keys(c) if k not in taken]
            for i, slot in enumerate(slots[c]):
                if i < len(free):
                    keys[slot] = free[i]
                    taken.add(free[i])
                else:
                    later.append(slot)
        spare = [k for k in SPARE_KEYS if k not in taken]
        if len(later) > len(spare):
            raise ParameterError(f"{len(categories)} sounds or layered sets do not fit on "
                                 "128 keys; export fewer")
        for slot, k in zip(later, spare):
            keys[slot] = k
    elif layout == "chromatic":
        flat = [s for c in order for s in slots[c]]
        if len(flat) > 128:
            raise ParameterError(f"{len(flat)} sounds or layered sets do not fit on 128 keys; "
                                 "export fewer")
        start = min(36, 128 - len(flat))
        for k, slot in enumerate(flat):
            keys[slot] = start + k
    else:  # octaves
        if len(order) > 10:
            raise ParameterError(f"{len(order)} categories do not fit one octave each on 128 "
                                 "keys; use --layout chromatic")
        base = 24 if len(order) <= 8 else 0
        for j, c in enumerate(order):
            if len(slots[c]) > 12:
                raise ParameterError(f"category {c or '(none)'}: {len(slots[c])} sounds do not "
                                     "fit one octave; use --layout chromatic or gm")
            for k, slot in enumerate(slots[c]):
                keys[slot] = base + 12 * j + k
    return keys


def velocity_ranges(n: int) -> list[tuple[int, int]]:
    """``n`` contiguous velocity ranges covering 1-127, softest first (n <= 127)."""
    if not 1 <= n <= 127:
        raise ParameterError(f"{n} velocity layers: must be between 1 and 127")
    edges = [1 + (127 * i) // n for i in range(n + 1)]
    return [(edges[i], edges[i + 1] - 1 if i < n - 1 else 127) for i in range(n)]
