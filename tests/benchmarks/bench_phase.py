"""Benchmark: batched fast Griffin-Lim against librosa.griffinlim.

64 one-second synthetic percussive clips (kicks, snares, hats, toms, plucks, noise
bursts), 32 iterations, momentum 0.99, two STFT settings. Every method gets the same
magnitudes and the same initial phases, so the spectral convergence (SC) is comparable.
Prints wall times, SC and the ratios against references measured in this run:

* librosa loop: ``librosa.griffinlim`` called once per clip, in this process;
* librosa x2: the same loop split over 2 worker processes (started and warmed up first);
* FFT floor: only the 2 x 32 batched ``scipy.fft`` transforms that any such loop needs.

Targets on 2 cores, at equal or better SC: >= 4x the librosa loop, >= 2x librosa x2.
The machine may be shared: the best of ``--repeat`` runs of each method is reported;
rerun when the load average printed at the start is well above 0.

    python tests/benchmarks/bench_phase.py [--clips 64] [--repeat 3]
"""

from __future__ import annotations

import argparse
import multiprocessing as mp
import os
import sys
import time
from concurrent.futures import ProcessPoolExecutor, ThreadPoolExecutor

import librosa
import numpy as np
import scipy
import scipy.fft

from pipeline import phase, spectra

SETTINGS = [(22050, 1024, 256), (44100, 2048, 512)]
N_ITER, MOMENTUM, SEED = 32, 0.99, 0
_JOB: dict = {}  # the work, inherited by forked librosa workers


def percussive_clips(n: int, sr: int, rng: np.random.Generator) -> np.ndarray:
    """``n`` one-second one-shots of several kinds, peak 0.9."""
    t = np.arange(sr) / sr
    out = np.zeros((n, sr))
    for i in range(n):
        kind = i % 6
        noise = rng.standard_normal(sr)
        if kind == 0:  # kick: a pitch-swept sine with a click
            f = rng.uniform(45, 70) * (1 + rng.uniform(2, 5) * np.exp(-t * rng.uniform(25, 50)))
            y = np.sin(2 * np.pi * np.cumsum(f) / sr) * np.exp(-t * rng.uniform(5, 12))
            y[:40] += noise[:40]
        elif kind == 1:  # snare: a tone plus band-passed noise
            tone = np.sin(2 * np.pi * rng.uniform(160, 240) * t) * np.exp(-t * 20)
            y = tone + np.diff(noise, prepend=0) * 0.5 * np.exp(-t * rng.uniform(10, 25))
        elif kind == 2:  # hat: high-passed noise, short
            y = np.diff(np.diff(noise, prepend=0), prepend=0) * np.exp(-t * rng.uniform(30, 80))
        elif kind == 3:  # tom: a gently falling sine
            f = rng.uniform(90, 200) * (1 + 0.3 * np.exp(-t * 10))
            y = np.sin(2 * np.pi * np.cumsum(f) / sr) * np.exp(-t * rng.uniform(4, 8))
        elif kind == 4:  # pluck: decaying harmonics
            f0 = rng.uniform(100, 600)
            y = sum(np.sin(2 * np.pi * f0 * h * t) * np.exp(-t * 3 * h) / h for h in range(1, 8))
        else:  # noise burst with a slow tail
            y = noise * np.exp(-t * rng.uniform(3, 15))
        out[i] = 0.9 * y / np.max(np.abs(y))
    return out


def _librosa_one(b: int) -> np.ndarray:
    S, n_fft, hop, length = _JOB["S"], _JOB["n_fft"], _JOB["hop"], _JOB["length"]
    gen = np.random.Generator(np.random.PCG64(SEED))  # what default_rng(SEED) wraps
    gen.bit_generator.advance(b * S[b].size)  # clip b's slice of our batch draw
    return librosa.griffinlim(
        S[b] / spectra.stft_scale(n_fft), n_iter=N_ITER, hop_length=hop, win_length=n_fft,
        n_fft=n_fft, window="hann", center=True, pad_mode="constant", length=length,
        momentum=MOMENTUM, init="random", random_state=gen,
    )


def _librosa_many(indices: list[int]) -> np.ndarray:
    return np.stack([_librosa_one(b) for b in indices])


def _warm(_: int) -> int:
    return len(_librosa_many([0]))


def _best(fn, repeat: int) -> tuple[float, object]:
    best, out = float("inf"), None
    for _ in range(repeat):
        t = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t)
    return best, out


def fft_floor(B: int, n_fft: int, frames: int) -> float:
    """The transforms alone: N_ITER x (irfft + rfft) of every frame, in the cache-sized
    chunks and on the threads that phase.griffin_lim uses, with nothing else between them."""
    bins, jobs = n_fft // 2 + 1, os.cpu_count() or 1
    b = max(1, min(phase._CHUNK_BYTES // (bins * frames * 8), -(-B // jobs)))
    x = np.random.default_rng(0).standard_normal((b, frames, n_fft)).astype(np.float32)
    X = scipy.fft.rfft(x, axis=-1)

    def chunk(_: int) -> None:
        for _ in range(N_ITER):
            scipy.fft.irfft(X, n=n_fft, axis=-1)
            scipy.fft.rfft(x, axis=-1)

    t = time.perf_counter()
    with ThreadPoolExecutor(jobs) as pool:
        list(pool.map(chunk, range(0, B, b)))
    return time.perf_counter() - t


def _sc(S: np.ndarray, y: np.ndarray, n_fft: int, hop: int) -> np.ndarray:
    return spectra.spectral_convergence_db(
        S, spectra.magnitude(np.asarray(y, np.float64), n_fft=n_fft, hop_length=hop))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--clips", type=int, default=64)
    ap.add_argument("--repeat", type=int, default=2, help="best of this many runs of each method")
    args = ap.parse_args()
    print(f"python {sys.version.split()[0]}, numpy {np.__version__}, scipy {scipy.__version__}, "
          f"librosa {librosa.__version__}; {os.cpu_count()} cores, "
          f"load average {os.getloadavg()[0]:.2f} at start")
    print(f"{args.clips} clips x 1 s, {N_ITER} iterations, momentum {MOMENTUM}, "
          "the same initial phases for every method")
    ctx = mp.get_context("fork")
    for sr, n_fft, hop in SETTINGS:
        rng = np.random.default_rng(sr)
        y = percussive_clips(args.clips, sr, rng)
        S = spectra.magnitude(y, n_fft=n_fft, hop_length=hop).astype(np.float32)
        _JOB.update(S=S, n_fft=n_fft, hop=hop, length=sr)
        kw = dict(n_fft=n_fft, hop_length=hop, length=sr, n_iter=N_ITER, momentum=MOMENTUM,
                  seed=SEED)
        phase.griffin_lim(S[:2], **kw)  # warm-up
        t_ours, y_ours = _best(lambda: phase.griffin_lim(S, **kw), args.repeat)  # noqa: B023
        _librosa_many([0])  # warm-up (librosa compiles its window sum-square on first use)
        t_loop, y_loop = _best(lambda: _librosa_many(list(range(len(S)))), args.repeat)  # noqa: B023
        with ProcessPoolExecutor(2, mp_context=ctx) as pool:
            list(pool.map(_warm, range(2)))
            halves = [list(range(0, len(S), 2)), list(range(1, len(S), 2))]
            t_two, parts = _best(lambda: list(pool.map(_librosa_many, halves)), args.repeat)  # noqa: B023
        y_two = np.empty_like(y_loop)
        y_two[halves[0]], y_two[halves[1]] = parts
        t_fft = min(fft_floor(len(S), n_fft, S.shape[-1]) for _ in range(args.repeat))
        sc = {k: _sc(S, v, n_fft, hop) for k, v in
              (("ours", y_ours), ("loop", y_loop), ("two", y_two))}
        print(f"\n{sr} Hz, n_fft {n_fft}, hop {hop}: S {S.shape}; "
              f"load average {os.getloadavg()[0]:.2f} after the runs")
        for label, t, key in (("ours (batched fast GLA)", t_ours, "ours"),
                              ("librosa loop", t_loop, "loop"),
                              ("librosa x2 processes", t_two, "two")):
            print(f"  {label:26s} {t:7.3f} s   SC median {np.median(sc[key]):7.2f} dB, "
                  f"mean {np.mean(sc[key]):7.2f} dB")
        print(f"  {'FFT floor (transforms only)':26s} {t_fft:7.3f} s")
        better = np.mean(sc["ours"]) <= np.mean(sc["loop"]) + 0.01
        print(f"  speed-up vs librosa loop   {t_loop / t_ours:5.2f}x  (target >= 4x: "
              f"{'met' if t_loop / t_ours >= 4 else 'MISSED'})")
        print(f"  speed-up vs librosa x2     {t_two / t_ours:5.2f}x  (target >= 2x: "
              f"{'met' if t_two / t_ours >= 2 else 'MISSED'})")
        print(f"  ours / FFT floor           {t_ours / t_fft:5.2f}x")
        print(f"  SC equal or better than librosa: {'yes' if better else 'NO'} "
              f"(mean difference {np.mean(sc['ours'] - sc['loop']):+.4f} dB)")


if __name__ == "__main__":
    main()
