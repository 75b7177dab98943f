"""The demo kit: our own invented one-shots, synthesized procedurally, and the demo run.

``python -m pipeline.demo`` regenerates ``demo_sounds/`` byte for byte: eight
categories of 16 one-shots each (22.05 kHz mono 16-bit WAV, peak -1 dBFS),
every sound drawn with its own random variation from a fixed seed. Each voice
is a small textbook synthesis recipe (pitch-swept sines, filtered noise,
metallic square-wave clusters, Karplus-Strong strings, inharmonic partials);
no recording or sample library is involved.
"""

from __future__ import annotations

import argparse
import io
import os
import sys
import wave
from collections.abc import Callable
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
from scipy import signal

from pipeline.errors import OutputError, ParameterError
from pipeline.files import write_atomic

KIT_SEED = 20240611
KIT_SAMPLE_RATE = 22050
PER_CATEGORY = 16
PEAK_DBFS = -1.0
TAIL_DB = -60.0  # a sound ends where its envelope falls this far below its peak

Voice = Callable[[np.random.Generator, int], np.ndarray]


# ---------------------------------------------------------------- building blocks


def _t(seconds: float, sr: int) -> np.ndarray:
    return np.arange(int(round(seconds * sr))) / sr


def _filter(x: np.ndarray, sr: int, kind: str, freq, order: int = 2) -> np.ndarray:
    return signal.sosfilt(signal.butter(order, freq, kind, fs=sr, output="sos"), x)


def _sweep(t: np.ndarray, f_end: float, f_start: float, tau: float, sr: int) -> np.ndarray:
    """Phase of a sine whose pitch glides exponentially from f_start to f_end."""
    f = f_end + (f_start - f_end) * np.exp(-t / tau)
    return 2 * np.pi * np.cumsum(f) / sr


def _square(t: np.ndarray, f: float, sr: int) -> np.ndarray:
    """Band-limited square wave: odd harmonics 1/k below Nyquist (Fourier series)."""
    ks = np.arange(1, int(sr / 2 / f) + 1, 2)
    return (4 / np.pi) * sum(np.sin(2 * np.pi * k * f * t) / k for k in ks)


# ---------------------------------------------------------------- voices


def kick(rng: np.random.Generator, sr: int) -> np.ndarray:
    """Pitch-swept sine body, soft saturation, and a short noise click."""
    t = _t(0.5, sr)
    f_end = rng.uniform(42, 62)
    body = np.sin(_sweep(t, f_end, f_end * rng.uniform(3, 6), rng.uniform(0.015, 0.045), sr))
    drive = rng.uniform(1.0, 3.0)  # waveshaping before the envelope: same colour all through
    body = np.tanh(drive * body) / np.tanh(drive) * np.exp(-t / rng.uniform(0.07, 0.16))
    click = _filter(rng.standard_normal(t.size), sr, "bandpass", [1000, 6000])
    click *= np.exp(-t / rng.uniform(0.002, 0.005)) * rng.uniform(0.15, 0.4)
    return body + click


def snare(rng: np.random.Generator, sr: int) -> np.ndarray:
    """Two drum-head tones plus band-passed noise for the wires."""
    t = _t(0.4, sr)
    f0, tau = rng.uniform(160, 240), rng.uniform(0.03, 0.07)
    tone = np.sin(_sweep(t, f0, f0 * 1.3, 0.01, sr)) + 0.5 * np.sin(2 * np.pi * 1.6 * f0 * t)
    tone *= np.exp(-t / tau)
    band = [rng.uniform(800, 1500), rng.uniform(6500, 9500)]
    wires = _filter(rng.standard_normal(t.size), sr, "bandpass", band)
    wires *= np.exp(-t / rng.uniform(0.05, 0.12))
    mix = rng.uniform(0.45, 0.75)
    return (1 - mix) * tone + mix * 4 * wires


# Six square oscillators at inharmonic frequencies make the classic metallic
# cymbal cluster (common practice in analogue drum machines; values from memory).
_METAL_HZ = np.array([205.3, 304.4, 369.6, 522.7, 540.0, 800.0])


def hat(rng: np.random.Generator, sr: int) -> np.ndarray:
    """High-passed cluster of detuned square waves plus a little noise; closed or open."""
    is_open = rng.random() < 0.3
    t = _t(0.5 if is_open else 0.2, sr)
    freqs = _METAL_HZ * rng.uniform(0.9, 1.4) * (1 + rng.uniform(-0.015, 0.015, 6))
    metal = sum(_square(t, f, sr) for f in freqs) / 6
    sizzle = rng.standard_normal(t.size) * rng.uniform(0.1, 0.4)
    y = _filter(metal + sizzle, sr, "highpass", rng.uniform(6000, 8000), order=4)
    tau = rng.uniform(0.1, 0.22) if is_open else rng.uniform(0.012, 0.035)
    return y * np.exp(-t / tau)


# Modes of an ideal circular membrane (ratios of Bessel-function zeros, from memory).
_MEMBRANE = np.array([1.0, 1.594, 2.136])


def tom(rng: np.random.Generator, sr: int) -> np.ndarray:
    """Membrane modes with a small downward pitch bend and a soft stick noise."""
    t = _t(0.6, sr)
    f0 = rng.uniform(70, 220)
    bend, tau_b = rng.uniform(0.3, 0.7), rng.uniform(0.03, 0.08)
    amps = np.array([1.0, rng.uniform(0.2, 0.45), rng.uniform(0.05, 0.2)])
    tau = rng.uniform(0.1, 0.2) * np.array([1.0, 0.6, 0.4])
    y = sum(a * np.sin(_sweep(t, r * f0, r * f0 * (1 + bend), tau_b, sr)) * np.exp(-t / d)
            for r, a, d in zip(_MEMBRANE, amps, tau, strict=True))
    stick = _filter(rng.standard_normal(t.size), sr, "lowpass", 3000) * np.exp(-t / 0.006)
    return y + 0.2 * stick


def clap(rng: np.random.Generator, sr: int) -> np.ndarray:
    """A few quick bursts of band-passed noise, then a short diffuse tail."""
    t = _t(0.4, sr)
    starts = np.cumsum(rng.uniform(0.007, 0.014, rng.integers(3, 5)))
    starts -= starts[0]
    env = np.zeros_like(t)
    for s in starts:
        env = np.maximum(env, (t >= s) * np.exp(-np.clip(t - s, 0, None) / 0.0035))
    tail = np.exp(-np.clip(t - starts[-1], 0, None) / rng.uniform(0.05, 0.12))
    env = np.maximum(env, 0.7 * (t >= starts[-1]) * tail)
    fc = rng.uniform(900, 1600)
    noise = _filter(rng.standard_normal(t.size), sr, "bandpass", [fc / 1.6, fc * 2.5])
    return noise * env


def rim(rng: np.random.Generator, sr: int) -> np.ndarray:
    """A short, high wooden knock: two quickly damped modes and a click."""
    t = _t(0.15, sr)
    f1 = rng.uniform(450, 900)
    tau = rng.uniform(0.01, 0.03)
    y = np.sin(2 * np.pi * f1 * t) + 0.4 * np.sin(2 * np.pi * f1 * rng.uniform(2.2, 2.8) * t)
    click = _filter(rng.standard_normal(t.size), sr, "bandpass", [2000, 7000])
    return y * np.exp(-t / tau) + 0.5 * click * np.exp(-t / 0.002)


# A minor pentatonic over two octaves from A2 (MIDI 45).
_PLUCK_NOTES = 45 + np.array([0, 3, 5, 7, 10, 12, 15, 17, 19, 22, 24])


def pluck(rng: np.random.Generator, sr: int) -> np.ndarray:
    """Karplus-Strong string (Karplus & Strong 1983): a noise burst in a damped delay loop."""
    n = int(round(sr * 0.8))
    f0 = 440.0 * 2 ** ((rng.choice(_PLUCK_NOTES) - 69) / 12)
    delay = max(2, int(round(sr / f0 - 0.5)))  # the two-point average adds half a sample
    burst = _filter(rng.standard_normal(delay), sr, "lowpass", rng.uniform(2000, 8000))
    x = np.zeros(n)
    x[:delay] = burst
    rho = rng.uniform(0.98, 0.995)
    # y[n] = x[n] + rho/2 (y[n-L] + y[n-L-1]): the loop as one IIR filter.
    a = np.zeros(delay + 2)
    a[0], a[delay], a[delay + 1] = 1.0, -rho / 2, -rho / 2
    return signal.lfilter([1.0], a, x)


# Partials of a free-free bar (Euler-Bernoulli beam modes, from memory), plus a
# randomised minor-third-like partial that gives a bell colour.
_BAR = np.array([1.0, 2.756, 5.404, 8.933])


def bell(rng: np.random.Generator, sr: int) -> np.ndarray:
    """Struck bar or bell: inharmonic partials, the higher ones dying faster."""
    t = _t(0.9, sr)
    f0 = rng.uniform(350, 1100)
    ratios = np.append(_BAR * (1 + rng.uniform(-0.01, 0.01, 4)), rng.uniform(1.18, 1.22))
    amps = np.array([1.0, 0.5, 0.25, 0.12, rng.uniform(0.2, 0.5)])
    tau0 = rng.uniform(0.12, 0.25)
    y = np.zeros_like(t)
    for r, a in zip(ratios, amps, strict=True):
        if r * f0 < 0.45 * sr:
            y += a * np.sin(2 * np.pi * r * f0 * t + rng.uniform(0, 2 * np.pi)) * np.exp(
                -t / (tau0 / r**0.7))
    return y * (1 - np.exp(-t / 0.0008))  # sub-millisecond strike, no click from the phases


VOICES: dict[str, Voice] = {
    "kick": kick, "snare": snare, "hat": hat, "tom": tom,
    "clap": clap, "rim": rim, "pluck": pluck, "bell": bell,
}
CATEGORIES = tuple(VOICES)


# ---------------------------------------------------------------- finishing and files


def finish(y: np.ndarray, sr: int) -> np.ndarray:
    """DC block, end at the -60 dB tail, short fades at both ends, peak -1 dBFS, 16-bit PCM."""
    y = _filter(y, sr, "highpass", 20.0)
    win = max(1, int(0.01 * sr))
    env = np.maximum.accumulate(np.abs(y)[::-1])[::-1]  # loudest from here to the end
    n, peak = y.size, env[0]
    above = np.flatnonzero(env > peak * 10 ** (TAIL_DB / 20))
    end = max(min(n, int(above[-1]) + win) if above.size else n, 5 * win)
    # Where the buffer ran out while still loud (above -40 dB), fade the last
    # quarter instead of cutting, so the decay still sounds natural.
    cut_loud = end >= n and env[n - win] > peak * 10 ** (-40 / 20)
    y = y[:end].copy()
    fade = end // 4 if cut_loud else win
    y[-fade:] *= 0.5 * (1 + np.cos(np.linspace(0, np.pi, fade)))
    rise = max(2, int(0.0005 * sr))  # half a millisecond: no step at the first sample
    y[:rise] *= 0.5 * (1 - np.cos(np.linspace(0, np.pi, rise)))
    y *= 10 ** (PEAK_DBFS / 20) / np.max(np.abs(y))
    return np.round(y * 32767).astype("<i2")


def wav_bytes(pcm: np.ndarray, sr: int) -> bytes:
    """A mono 16-bit PCM WAV file (stdlib ``wave``: a fixed 44-byte header)."""
    buf = io.BytesIO()
    with wave.open(buf, "wb") as w:
        w.setnchannels(1)
        w.setsampwidth(2)
        w.setframerate(sr)
        w.writeframes(pcm.astype("<i2").tobytes())
    return buf.getvalue()


def synthesize_sound(
    category: str, index: int, *, seed: int = KIT_SEED, sample_rate: int = KIT_SAMPLE_RATE
) -> np.ndarray:
    """One finished one-shot (int16) of the kit; its randomness depends only on its own slot."""
    if category not in VOICES:
        raise ParameterError(f"category={category!r} must be one of {', '.join(CATEGORIES)}")
    rng = np.random.default_rng([seed, CATEGORIES.index(category), index])
    return finish(VOICES[category](rng, sample_rate), sample_rate)


def kit_files(
    *, seed: int = KIT_SEED, per_category: int = PER_CATEGORY, sample_rate: int = KIT_SAMPLE_RATE
) -> dict[str, bytes]:
    """Every file of the kit as ``{"<category>/<category>_NN.wav": wav bytes}``."""
    if per_category < 1:
        raise ParameterError(f"per_category={per_category} must be at least 1")
    return {
        f"{c}/{c}_{i + 1:02d}.wav": wav_bytes(
            synthesize_sound(c, i, seed=seed, sample_rate=sample_rate), sample_rate)
        for c in CATEGORIES for i in range(per_category)
    }


@dataclass(frozen=True)
class KitSummary:
    """What :func:`synthesize_kit` did."""

    out_dir: str
    files: int
    written: int
    unchanged: int
    total_bytes: int

    def to_dict(self) -> dict:
        return asdict(self)


def synthesize_kit(
    out_dir: str | os.PathLike,
    *,
    seed: int = KIT_SEED,
    per_category: int = PER_CATEGORY,
    sample_rate: int = KIT_SAMPLE_RATE,
    overwrite: bool = False,
) -> KitSummary:
    """Write the kit into ``out_dir/<category>/<category>_NN.wav``.

    Files already holding the same bytes are left alone. A file that exists
    with other content raises :class:`OutputError` before anything is written,
    unless ``overwrite``. Each file is written to a temporary name and renamed.
    """
    out = Path(out_dir)
    files = kit_files(seed=seed, per_category=per_category, sample_rate=sample_rate)
    todo = {}
    for rel, data in files.items():
        path = out / rel
        if path.is_file() and path.read_bytes() == data:
            continue
        if path.exists() and not overwrite:
            raise OutputError(f"{path}: exists with other content; pass --overwrite to replace it")
        todo[path] = data
    for path, data in todo.items():
        path.parent.mkdir(parents=True, exist_ok=True)
        write_atomic(path, data)
    return KitSummary(str(out), len(files), len(todo), len(files) - len(todo),
                      sum(len(d) for d in files.values()))


def find_kit() -> Path | None:
    """The repository's ``demo_sounds/`` if this is a checkout that has it, else None."""
    kit = Path(__file__).resolve().parents[1] / "demo_sounds"
    return kit if kit.is_dir() and any(kit.glob("*/*.wav")) else None


# ---------------------------------------------------------------- the demo run
# (run_demo and format_demo_summary, for ``shotsmith demo``, belong below.)


def main(argv: list[str] | None = None) -> int:
    """``python -m pipeline.demo [--out DIR] [--seed N] [--overwrite]``."""
    here = Path(__file__).resolve().parents[1]
    default = here / "demo_sounds" if (here / "pyproject.toml").is_file() else Path("demo_sounds")
    p = argparse.ArgumentParser(prog="python -m pipeline.demo", description=__doc__.split("\n")[0])
    p.add_argument("--out", type=Path, default=default, help=f"kit folder (default: {default})")
    p.add_argument("--seed", type=int, default=KIT_SEED, help="kit seed")
    p.add_argument("--per-category", type=int, default=PER_CATEGORY, help="sounds per category")
    p.add_argument("--overwrite", action="store_true", help="replace files that differ")
    args = p.parse_args(argv)
    try:
        s = synthesize_kit(args.out, seed=args.seed, per_category=args.per_category,
                           overwrite=args.overwrite)
    except (OutputError, ParameterError) as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 1
    print(f"{s.files} one-shots in {s.out_dir} ({s.total_bytes / 1e6:.2f} MB): "
          f"{s.written} written, {s.unchanged} unchanged")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
