"""Synthesized one-shot banks for the model and training tests and the benchmark.

Six invented percussive and tonal families with a few continuous parameters
each (pitch, sweep, decay, brightness, noise mix), rendered with numpy, turned
into spectrograms with pipeline.spectra and written with BankWriter. The
parameters give the data several intrinsic dimensions, so a 16-D latent has
something to model that a 2-D latent cannot hold.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from pipeline.bank import BankWriter
from pipeline.config import AudioSpec, Settings
from pipeline.spectra import clip_to_unit

FAMILIES = ("thump", "crack", "tick", "boing", "clatter", "chime")


def _onepole(x: np.ndarray, a: float) -> np.ndarray:
    """First-order low-pass y[n] = (1 - a) x[n] + a y[n - 1], vectorised by blocks."""
    from scipy.signal import lfilter

    return lfilter([1.0 - a], [1.0, -a], x)


def synth_clip(family: str, rng: np.random.Generator, spec: AudioSpec) -> np.ndarray:
    """One fitted clip of ``spec.n_samples`` samples, peak -1 dBFS, onset after 5 ms."""
    sr, n = spec.sample_rate, spec.n_samples
    t = np.arange(n) / sr
    u = rng.uniform
    if family == "thump":  # falling-pitch sine
        f = u(40, 70) + u(60, 200) * np.exp(-t / u(0.01, 0.05))
        y = np.sin(2 * np.pi * np.cumsum(f) / sr) * np.exp(-t / u(0.05, 0.4))
    elif family == "crack":  # tone + low-passed noise
        noise = _onepole(rng.standard_normal(n), u(0.05, 0.7))
        tone = np.sin(2 * np.pi * u(150, 300) * t) * np.exp(-t / u(0.02, 0.08))
        y = u(0.2, 0.8) * tone + noise * np.exp(-t / u(0.04, 0.2))
    elif family == "tick":  # high-passed noise, short or open
        noise = np.diff(rng.standard_normal(n + 1)) * u(0.3, 1.0)
        y = noise * np.exp(-t / u(0.01, 0.25))
    elif family == "boing":  # rising or falling glide with vibrato
        f0 = u(200, 800) * np.exp(u(-1, 1) * t) * (1 + 0.02 * np.sin(2 * np.pi * u(4, 9) * t))
        y = np.sin(2 * np.pi * np.cumsum(f0) / sr) * np.exp(-t / u(0.1, 0.5))
    elif family == "clatter":  # a few noise bursts
        y = np.zeros(n)
        gap = u(0.008, 0.03)
        for k in range(int(rng.integers(2, 5))):
            y += (t >= k * gap) * np.exp(-np.maximum(t - k * gap, 0) / u(0.005, 0.05))
        y = y * _onepole(rng.standard_normal(n), u(0.0, 0.5))
    elif family == "chime":  # inharmonic partials
        f0 = u(300, min(1500, 0.45 * sr / 5.4))  # top partial below Nyquist
        y = sum(np.sin(2 * np.pi * f0 * r * t) / (i + 1) for i, r in enumerate((1.0, 2.76, 5.4)))
        y = y * np.exp(-t / u(0.1, 0.6)) * (1 - np.exp(-t / u(0.0005, 0.01)))
    else:
        raise ValueError(family)
    pre = int(0.005 * sr)
    y = np.concatenate([np.zeros(pre), y[: n - pre]])
    return (y / np.max(np.abs(y)) * 10 ** (-1 / 20)).astype(np.float32)


def make_bank(
    path: Path,
    spec: AudioSpec,
    *,
    per_family: int = 20,
    families: tuple[str, ...] = FAMILIES,
    seed: int = 0,
) -> Path:
    """Write a bank of ``per_family * len(families)`` clips in category folders."""
    rng = np.random.default_rng(seed)
    n = per_family * len(families)
    writer = BankWriter(path, spec, n)
    clips = []
    for row in range(n):
        fam = families[row % len(families)]
        y = synth_clip(fam, rng, spec)
        writer.put(row, clip_to_unit(y, spec))
        clips.append(
            {
                "name": f"{fam}_{row:04d}",
                "path": f"{fam}/{fam}_{row:04d}.wav",
                "category": fam,
                "sample_rate": spec.sample_rate,
                "channels": 1,
                "duration": spec.duration,
                "peak_dbfs": -1.0,
                "size": 0,
                "mtime_ns": 0,
            }
        )
    settings = Settings(audio=spec).to_dict()
    writer.commit(clips, settings, {"accepted": n, "skipped": []})
    return path


def param_spectra(n: int, spec: AudioSpec, *, seed: int = 0) -> tuple[np.ndarray, list[str]]:
    """``n`` smooth [0, 1] spectrograms from six independent factors, and their categories.

    Drawn straight in the dB domain (no noise texture), so all variation is
    structure: a resonance (centre, width), a spectral tilt, a decay time, an
    attack time and a level, plus one of three families (one, two or three
    resonances). A 2-D latent cannot hold six factors; a 16-D one can.
    """
    rng = np.random.default_rng(seed)
    f = np.linspace(0.0, 1.0, spec.n_bins)[:, None]  # (F, 1) bin position, 0 .. Nyquist
    t = np.arange(spec.n_frames)[None, :] * spec.hop_length / spec.sample_rate  # (1, T) s
    fams = ("one", "two", "three")
    out = np.empty((n, spec.n_bins, spec.n_frames), dtype=np.float32)
    cats = []
    for i in range(n):
        k = i % 3
        c, width = rng.uniform(0.05, 0.6), rng.uniform(0.03, 0.2)
        tilt, decay = rng.uniform(-30, 0), rng.uniform(0.03, 0.3)
        attack, level = rng.uniform(0.001, 0.03), rng.uniform(-20, -3)
        peaks = [np.exp(-0.5 * ((f - c * (j + 1)) / width) ** 2) / (j + 1) for j in range(k + 1)]
        shape = sum(peaks)
        db = (level + 20 * np.log10(shape + 1e-3) + tilt * f
              - 8.686 * t / decay + 20 * np.log10(1 - np.exp(-(t + 1e-3) / attack)))
        out[i] = np.clip((db - spec.db_floor) / (spec.db_ceiling - spec.db_floor), 0, 1)
        cats.append(fams[k])
    return out, cats


def write_spectra_bank(path: Path, spec: AudioSpec, U: np.ndarray, cats: list[str]) -> Path:
    """Write ready-made [0, 1] spectrograms as a bank."""
    writer = BankWriter(path, spec, len(U))
    clips = []
    for row, (u, c) in enumerate(zip(U, cats)):
        writer.put(row, u)
        clips.append({
            "name": f"{c}_{row:04d}", "path": f"{c}/{c}_{row:04d}.wav", "category": c,
            "sample_rate": spec.sample_rate, "channels": 1, "duration": spec.duration,
            "peak_dbfs": -1.0, "size": 0, "mtime_ns": 0,
        })
    writer.commit(clips, Settings(audio=spec).to_dict(), {"accepted": len(U), "skipped": []})
    return path


# 65 bins x 63 frames: big enough for every layer, small enough for fast tests
SMALL_AUDIO = {"sample_rate": 8000, "duration": 0.25, "n_fft": 128, "hop_length": 32}


def small_settings(*, model: dict | None = None, **train) -> Settings:
    """The tiny preset on SMALL_AUDIO with a small network and a short schedule."""
    from pipeline.config import load_settings

    t = {"epochs": 4, "batch_size": 16, "kl_warmup_epochs": 2, "lr_warmup_epochs": 1,
         "patience": 50, **train}
    m = {"latent_dim": 8, "width": 32, "depth": 2, "kernel_size": 3, **(model or {})}
    return load_settings("tiny", {"audio": SMALL_AUDIO, "model": m, "train": t})


def small_bank(path: Path, *, n: int = 48, seed: int = 0) -> Path:
    """A bank of ``n`` parametric spectrograms on SMALL_AUDIO."""
    spec = small_settings().audio
    U, cats = param_spectra(n, spec, seed=seed)
    return write_spectra_bank(path, spec, U, cats)
