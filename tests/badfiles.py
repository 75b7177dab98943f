"""A corpus of bad, odd and extreme input files, built on demand (nothing binary is committed).

:func:`build_corpus` writes the files into a folder and returns one :class:`Case` per entry
with what a reader of that folder must make of it: ``CLIP`` (a usable one-shot), a reason
fragment that the listed reason must contain, ``EITHER`` (a clip or any listed reason; used
where both are defensible, e.g. DC only) or ``HIDDEN`` (counted, not listed). The same corpus
goes through ingest, resynth and the audio-file arguments of interpolate/vary, so every command
that reads audio meets every case.

Helpers :func:`wav_bytes`, :func:`wav_header` and :func:`sparse_wav` are also used by the
property test and the memory checks.
"""

from __future__ import annotations

import io
import os
import struct
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import soundfile as sf

CLIP = "clip"
EITHER = "either"
HIDDEN = "hidden"  # dot-files and AppleDouble sidecars: skipped quietly by a folder scan, counted
UNREADABLE = "not a readable audio file"


@dataclass(frozen=True)
class Case:
    """One corpus entry: ``rel`` (posix, relative to the corpus root; folders end in ``/``),
    ``expect`` (CLIP, EITHER or a fragment of the reason), ``is_file`` (a regular file that
    a file-path argument may name)."""

    rel: str
    expect: str
    what: str
    is_file: bool = True


def hit(sr: int, *, seconds: float = 0.25, ch: int = 1, f0: float = 330.0, seed: int = 0):
    """A decaying tone with a little noise, float64 ``(n,)`` or ``(n, ch)``, peak about 0.5."""
    rng = np.random.default_rng(seed)
    t = np.arange(max(int(seconds * sr), 1)) / sr
    f = min(f0, 0.4 * sr)
    y = 0.5 * np.exp(-7.0 * t) * (np.sin(2 * np.pi * f * t) + 0.05 * rng.standard_normal(t.size))
    return y if ch == 1 else np.stack([y * (1.0 - 0.08 * c) for c in range(ch)], axis=1)


def wav_bytes(y: np.ndarray, sr: int, *, subtype: str = "PCM_16", fmt: str = "WAV") -> bytes:
    """``y`` encoded by libsndfile (soundfile) in memory."""
    buf = io.BytesIO()
    sf.write(buf, y, sr, subtype=subtype, format=fmt)
    return buf.getvalue()


def wav_header(*, sr: int, channels: int, bits: int, frames: int, float_: bool = False) -> bytes:
    """A canonical 44-byte RIFF/WAVE header (Microsoft RIFF spec, the ``fmt `` chunk of
    WAVE_FORMAT_PCM = 1 / WAVE_FORMAT_IEEE_FLOAT = 3) claiming ``frames`` frames."""
    block = channels * bits // 8
    data = frames * block
    fmt = struct.pack("<HHIIHH", 3 if float_ else 1, channels, sr, sr * block, block, bits)
    return (b"RIFF" + struct.pack("<I", min(36 + data, 0xFFFFFFFF)) + b"WAVE"
            + b"fmt " + struct.pack("<I", 16) + fmt
            + b"data" + struct.pack("<I", min(data, 0xFFFFFFFF)))


def pcm16(y: np.ndarray) -> bytes:
    return np.clip(np.rint(np.asarray(y) * 32767), -32768, 32767).astype("<i2").tobytes()


def sparse_wav(path: Path, *, sr: int, channels: int, hours: float, head_s: float = 1.0) -> int:
    """A 16-bit WAV whose header and size say ``hours`` long: ``head_s`` of real audio, then a
    hole (a sparse file, so it costs no disk). Returns the apparent size in bytes."""
    frames = int(hours * 3600 * sr)
    head = hit(sr, seconds=head_s, ch=channels)
    with open(path, "wb") as fh:
        fh.write(wav_header(sr=sr, channels=channels, bits=16, frames=frames))
        fh.write(pcm16(head))
        fh.truncate(44 + frames * channels * 2)
    return 44 + frames * channels * 2


def _write(path: Path, data: bytes) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(data)


def build_corpus(root: Path, *, long_hours: float = 1.0) -> list[Case]:
    """Write the corpus under ``root`` (created) and return its cases.

    Everything is synthesized here. Symbolic links, a FIFO, a hard link and a file with no
    permissions are included where the platform allows them.
    """
    root = Path(root)
    root.mkdir(parents=True, exist_ok=True)
    cases: list[Case] = []

    def add(rel: str, data: bytes, expect: str, what: str) -> None:
        _write(root / rel, data)
        cases.append(Case(rel, expect, what))

    sr = 16000
    good = wav_bytes(hit(sr), sr)  # 44-byte header, 4000 frames of 16-bit mono
    data_len = len(good) - 44

    # --- empty, truncated, random ----------------------------------------------------------
    add("cut/zero bytes.wav", b"", "empty file (0 bytes)", "zero-byte file")
    for k in (3, 11, 15, 24, 35, 39, 43):  # inside RIFF id/size, WAVE id, fmt chunk, data size
        add(f"cut/header cut at {k:02d}.wav", good[:k], UNREADABLE if k < 40 else EITHER,
            f"header truncated at byte {k}")
    add("cut/header only.wav", good[:44], "no audio frames", "header and no data")
    add("cut/one sample left.wav", good[:46], "too short: 1 sample", "data cut after 1 sample")
    add("cut/odd byte.wav", good[:47], "too short", "data cut mid-sample")
    for frac in (3, 2):
        add(f"cut/data cut at 1 of {frac}.wav", good[: 44 + data_len // frac + 1], CLIP,
            f"data truncated at 1/{frac} (the header promises more)")
    flac = wav_bytes(hit(sr, seconds=0.4), sr, fmt="FLAC")
    for k in (4, 20, 42):  # fLaC id, inside STREAMINFO, just after it
        add(f"cut/flac cut at {k}.flac", flac[:k], UNREADABLE, f"FLAC truncated at byte {k}")
    add("cut/flac data cut.flac", flac[: len(flac) * 2 // 3], EITHER, "FLAC frames truncated")
    rng = np.random.default_rng(6)
    for ext in (".wav", ".flac", ".aiff", ".ogg", ".mp3", ".caf"):
        add(f"random/noise{ext}", rng.bytes(3000), EITHER if ext == ".mp3" else UNREADABLE,
            f"random bytes named {ext}")
    add("random/riff then junk.wav", good[:12] + rng.bytes(3000), UNREADABLE,
        "RIFF/WAVE id, then random bytes")
    add("random/text.wav", b"kick drum notes\n" * 40, UNREADABLE, "a text file named .wav")

    # --- headers that lie ---------------------------------------------------------------
    huge = bytearray(good)
    struct.pack_into("<I", huge, 4, 0x7FFFFFF0)
    struct.pack_into("<I", huge, 40, 0x7FFFFFC0)
    add("lies/claims a billion frames.wav", bytes(huge), CLIP, "data size far beyond the file")
    stream = bytearray(good)
    struct.pack_into("<I", stream, 40, 0xFFFFFFFF)
    add("lies/unknown length.wav", bytes(stream), CLIP, "data size 0xFFFFFFFF (streaming)")
    zero_len = bytearray(good)
    struct.pack_into("<I", zero_len, 40, 0)
    add("lies/data size zero.wav", bytes(zero_len), EITHER, "data size 0 but samples follow")
    for rate in (1, 7, 3999, 10_000_000):  # issue 13: 1 Hz made a 0.25 s hit hours long
        lying = bytearray(good)
        struct.pack_into("<II", lying, 24, rate, rate * 2)  # fmt: sample rate, byte rate
        add(f"lies/claims {rate} Hz.wav", bytes(lying), f"sample rate {rate} Hz is",
            f"header sample rate {rate} Hz")

    # --- sample values ------------------------------------------------------------------
    for name, bad, subtype in (("nan", np.nan, "FLOAT"), ("inf", np.inf, "FLOAT"),
                               ("minus inf", -np.inf, "DOUBLE"), ("nan64", np.nan, "DOUBLE")):
        y = hit(sr)
        y[50] = bad
        add(f"values/{name}.wav", wav_bytes(y, sr, subtype=subtype), "NaN or infinite",
            f"{name} sample in {subtype}")
    add("values/denormal only.wav", wav_bytes(np.full(4000, 1e-40, np.float32), sr,
        subtype="FLOAT"), "silent", "float32 denormals only")
    add("values/denormal64 only.wav", wav_bytes(np.full(4000, 4e-320), sr, subtype="DOUBLE"),
        "silent", "float64 denormals only")
    y = hit(sr).astype(np.float32)
    y[::7] = np.float32(1e-41)
    add("values/denormals sprinkled.wav", wav_bytes(y, sr, subtype="FLOAT"), CLIP,
        "a real sound with denormal samples between")
    add("values/huge float.wav", wav_bytes(hit(44100) * 6e38, 44100, subtype="FLOAT"), CLIP,
        "float samples near 3.4e38 (mixing or resampling them overflowed)")
    add("values/huge float stereo.wav", wav_bytes(hit(16000, ch=2) * 6e38, 16000,
        subtype="FLOAT"), CLIP, "two channels near 3.4e38")
    y = np.stack([np.full(4000, np.inf), np.full(4000, -np.inf)], axis=1)
    add("values/inf and minus inf.wav", wav_bytes(y, 16000, subtype="FLOAT"), "NaN or infinite",
        "+inf and -inf channels (their mix is NaN)")
    add("values/dc only.wav", wav_bytes(np.full(4000, 0.5), sr), EITHER, "DC only")
    add("values/digital silence.wav", wav_bytes(np.zeros(4000), sr), "silent: peak -inf",
        "16-bit zeros")
    add("values/float silence.wav", wav_bytes(np.zeros(4000), sr, subtype="FLOAT"),
        "silent: peak -inf", "float zeros")
    add("values/one sample.wav", wav_bytes(np.array([0.5]), sr), "too short: 1 sample",
        "a single sample")
    add("values/full scale square.wav", wav_bytes(np.sign(np.sin(np.arange(4000) * 0.05)), sr),
        CLIP, "full-scale square wave")
    y = np.stack([hit(sr), -hit(sr)], axis=1)
    add("values/cancelling stereo.wav", wav_bytes(y, sr), "cancel out", "L = -R")
    y = hit(sr, seconds=0.6, ch=1)
    y[: int(0.55 * sr)] = 0.0
    add("values/late onset.wav", wav_bytes(y, sr), CLIP, "550 ms of silence before the hit")

    # --- layouts, rates, sample formats -------------------------------------------------
    for ch in range(1, 9):
        add(f"layout/{ch} channels.wav", wav_bytes(hit(44100, ch=ch), 44100), CLIP,
            f"{ch} channels")
    for rate in (8000, 11025, 22050, 32000, 44100, 48000, 88200, 96000, 176400, 192000):
        add(f"rates/{rate} Hz.wav", wav_bytes(hit(rate), rate, subtype="PCM_24"), CLIP,
            f"{rate} Hz")
    formats = [("WAV", s, ".wav") for s in ("PCM_U8", "PCM_16", "PCM_24", "PCM_32", "FLOAT",
                                            "DOUBLE", "ULAW", "ALAW", "IMA_ADPCM", "MS_ADPCM")]
    formats += [("FLAC", s, ".flac") for s in ("PCM_S8", "PCM_16", "PCM_24")]
    formats += [("AIFF", s, ".aiff") for s in ("PCM_S8", "PCM_16", "PCM_24", "PCM_32", "FLOAT")]
    formats += [("OGG", "VORBIS", ".ogg"), ("W64", "PCM_16", ".w64"), ("RF64", "FLOAT", ".rf64"),
                ("CAF", "PCM_24", ".caf"), ("AU", "PCM_16", ".au")]
    if "MP3" in sf.available_formats():
        formats.append(("MP3", "MPEG_LAYER_III", ".mp3"))
    for fmt, subtype, ext in formats:
        add(f"formats/{fmt.lower()} {subtype.lower()}{ext}",
            wav_bytes(hit(22050, ch=2), 22050, subtype=subtype, fmt=fmt), CLIP, f"{fmt} {subtype}")

    # --- long ---------------------------------------------------------------------------
    (root / "long").mkdir(exist_ok=True)
    sparse_wav(root / "long" / "hours long.wav", sr=8000, channels=1, hours=long_hours)
    cases.append(Case("long/hours long.wav", CLIP, f"{long_hours:g} h (sparse), read lazily"))

    # --- names --------------------------------------------------------------------------
    tone = wav_bytes(hit(sr, seed=3), sr)
    for name, what in (
        ("キック ドラム.wav", "Japanese"),
        ("Snäre – dünn №1.wav", "Latin-1 and punctuation"),
        ("cafe\u0301 nfd.wav", "NFD combining accent"),
        ("drum \U0001f941.wav", "emoji"),
        ("     .wav", "spaces only"),
        ("  spaced   out  .wav", "leading, inner and trailing spaces"),
        ("a" * 251 + ".wav", "255 bytes, NAME_MAX on ext4"),
        ("é" * 125 + ".wav", "254 bytes of two-byte characters"),
        ("line\nbreak.wav", "a newline in the name"),
        ("back\\slash:colon.wav", "backslash and colon"),
        ("CON.wav", "Windows reserved name"),
        ("-n.wav", "looks like an option"),
    ):
        add(f"names/{name}", tone, CLIP, f"name: {what}")

    add("names/..wav", tone, HIDDEN, "starts with a dot")
    add("names/._sidecar.wav", b"\0\5\26\7" + bytes(80), HIDDEN, "AppleDouble sidecar")

    # --- the file system ----------------------------------------------------------------
    add("fs/folder.wav/inside.wav", tone, CLIP, "a folder named like a file (its contents)")
    cases.append(Case("fs/folder.wav/", CLIP, "the folder itself (not a file)", is_file=False))
    (root / "fs" / "empty.flac").mkdir()
    add("fs/locked.wav", tone, CLIP if os.geteuid() == 0 else "permission denied",
        "mode 000 (root reads it anyway)")
    os.chmod(root / "fs" / "locked.wav", 0)
    if hasattr(os, "symlink"):
        os.symlink("self loop.wav", root / "fs" / "self loop.wav")
        cases.append(Case("fs/self loop.wav", "symlink loop", "a link to itself", False))
        os.symlink("ping.wav", root / "fs" / "pong.wav")
        os.symlink("pong.wav", root / "fs" / "ping.wav")
        cases.append(Case("fs/ping.wav", "symlink loop", "two links to each other", False))
        cases.append(Case("fs/pong.wav", "symlink loop", "two links to each other", False))
        os.symlink("nowhere.wav", root / "fs" / "dangling.wav")
        cases.append(Case("fs/dangling.wav", "broken symbolic link", "dangling link", False))
        (root / "fs" / "deep").mkdir()
        os.symlink("..", root / "fs" / "deep" / "up")
        cases.append(Case("fs/deep/up/", "symlink loop", "a link to an enclosing folder", False))
        os.symlink("inside.wav", root / "fs" / "folder.wav" / "z second name.wav")
        cases.append(Case("fs/folder.wav/z second name.wav", "same file as", "a second name"))
    if hasattr(os, "mkfifo"):
        os.mkfifo(root / "fs" / "pipe.wav")
        cases.append(Case("fs/pipe.wav", "not a regular file", "a FIFO named .wav", False))
    return cases


def tree_digest(root: Path) -> str:
    """SHA-256 over names, modes, sizes, mtimes and contents under ``root`` (links not
    followed; sparse holes read as zeros, in blocks, so memory stays small)."""
    import hashlib

    h = hashlib.sha256()
    for dirpath, dirnames, filenames in os.walk(root):
        dirnames.sort()
        for name in sorted(filenames + [d for d in dirnames if os.path.islink(Path(dirpath, d))]):
            p = Path(dirpath, name)
            st = os.lstat(p)
            h.update(os.fsencode(p.relative_to(root)))
            h.update(f"{st.st_mode} {st.st_size} {st.st_mtime_ns}".encode())
            if p.is_file() and not p.is_symlink():
                try:
                    with open(p, "rb") as fh:
                        while block := fh.read(1 << 22):
                            h.update(block)
                except PermissionError:  # mode 000 when not root: size and mtime must do
                    h.update(b"unreadable")
    return h.hexdigest()
