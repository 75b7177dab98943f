"""Ingest throughput: files per second and seconds of audio per second.

A synthesized library (mixed sample rates, channel counts and formats) is ingested
four ways, all measured in this run: first run and cached re-run, serial (jobs 1)
and with 2 worker processes. Ratios are printed against the serial first run.

    python tests/benchmarks/bench_ingest.py [--files 300] [--preset drums] [--repeat 2]
"""

from __future__ import annotations

import argparse
import shutil
import tempfile
import time
from pathlib import Path

import numpy as np
import soundfile as sf

from pipeline.bank import open_bank
from pipeline.config import load_settings
from pipeline.ingest import ingest_folder

RATES = (8000, 22050, 44100, 48000, 96000)
FORMATS = (  # (extension, soundfile format, subtype)
    ("wav", "WAV", "PCM_16"),
    ("wav", "WAV", "PCM_24"),
    ("flac", "FLAC", "PCM_16"),
    ("ogg", "OGG", "VORBIS"),
    ("aiff", "AIFF", "PCM_16"),
)
CATEGORIES = ("kick", "snare", "hat", "tom", "perc", "fx")


def one_shot(rng: np.random.Generator, sr: int, seconds: float, channels: int) -> np.ndarray:
    """A pitched decaying tone with a noise burst: percussive enough to look real."""
    t = np.arange(int(seconds * sr)) / sr
    f0 = rng.uniform(40, 2000)
    tone = np.sin(2 * np.pi * f0 * t * (1 + rng.uniform(0, 1) * np.exp(-30 * t)))
    noise = rng.standard_normal(t.size) * np.exp(-rng.uniform(20, 80) * t)
    y = 0.6 * np.exp(-rng.uniform(3, 15) * t) * tone + rng.uniform(0, 0.4) * noise
    lead = np.zeros(int(rng.uniform(0, 0.02) * sr))  # some files start late
    y = np.concatenate([lead, y])
    return y if channels == 1 else np.stack([y, np.roll(y, 3)], axis=1)


def make_library(root: Path, n_files: int, seed: int = 0) -> float:
    """Write ``n_files`` one-shots under ``root``; return their total duration in seconds."""
    rng = np.random.default_rng(seed)
    total = 0.0
    for i in range(n_files):
        sr = RATES[i % len(RATES)]
        ext, fmt, subtype = FORMATS[(i // len(RATES)) % len(FORMATS)]
        seconds = float(rng.uniform(0.2, 1.5))
        y = one_shot(rng, sr, seconds, channels=1 + i % 2)
        path = root / CATEGORIES[i % len(CATEGORIES)] / f"shot {i:04d}.{ext}"
        path.parent.mkdir(parents=True, exist_ok=True)
        sf.write(path, y, sr, format=fmt, subtype=subtype)
        total += len(y) / sr
    return total


def timed(source: Path, bank: Path, settings, jobs: int, fresh: bool, repeat: int):
    """Best wall time of ``repeat`` runs (a fresh bank each time when ``fresh``)."""
    best, summary = float("inf"), None
    for _ in range(repeat):
        if fresh:
            shutil.rmtree(bank, ignore_errors=True)
        t0 = time.perf_counter()
        summary = ingest_folder(source, bank, settings, jobs=jobs)
        best = min(best, time.perf_counter() - t0)
    return best, summary


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--files", type=int, default=300)
    ap.add_argument("--preset", default="drums")
    ap.add_argument("--repeat", type=int, default=2, help="best of this many runs per case")
    args = ap.parse_args()
    settings = load_settings(args.preset)
    with tempfile.TemporaryDirectory(prefix="bench-ingest-") as tmp:
        tmp = Path(tmp)
        t0 = time.perf_counter()
        audio_s = make_library(tmp / "library", args.files)
        print(f"library: {args.files} files, {audio_s:.1f} s of audio, rates {RATES}, mono/stereo,"
              f" {len(FORMATS)} formats (synthesized in {time.perf_counter() - t0:.1f} s)")
        print(f"preset {args.preset}: {settings.audio.sample_rate} Hz, {settings.audio.duration} s,"
              f" n_fft {settings.audio.n_fft}; best of {args.repeat}")
        rows = {}
        lib = tmp / "library"
        for jobs in (1, 2):
            bank = tmp / f"bank-jobs{jobs}"
            rows[("first", jobs)] = timed(lib, bank, settings, jobs, True, args.repeat)
            rows[("cached", jobs)] = timed(lib, bank, settings, jobs, False, args.repeat)
        for (kind, jobs), (sec, s) in rows.items():
            want = (args.files, 0) if kind == "first" else (0, args.files)
            assert s.accepted == args.files and (s.decoded, s.reused) == want, s.to_dict()
            print(f"{kind:>6} run, jobs {jobs}: {sec:7.3f} s  {args.files / sec:8.1f} files/s"
                  f"  {audio_s / sec:8.1f} s of audio/s  (decoded {s.decoded}, reused {s.reused})")
        one, two = open_bank(tmp / "bank-jobs1"), open_bank(tmp / "bank-jobs2")
        same = one.clips == two.clips and np.array_equal(one.spectra, two.spectra)
        ref = rows[("first", 1)][0]
        print("ratios (wall time of the serial first run / wall time of the case; >1 = faster):")
        print(f"  cached re-run vs first run, jobs 1: {ref / rows[('cached', 1)][0]:7.1f}x")
        print(f"  cached re-run vs first run, jobs 2: "
              f"{rows[('first', 2)][0] / rows[('cached', 2)][0]:7.1f}x")
        print(f"  first run, jobs 2 vs jobs 1:        {ref / rows[('first', 2)][0]:7.2f}x")
        print(f"  banks from jobs 1 and jobs 2 identical: {same}")


if __name__ == "__main__":
    main()
