"""Ingest memory at scale: peak memory for libraries of 2,000 and 20,000 tiny one-shots.

Each library (a few ms per file, 100 category folders, synthesized here in a temp folder) is
ingested in a fresh process. The child samples its own ``/proc/self/status`` every 20 ms and
reports, with ``ru_maxrss``, the peak resident set split into anonymous memory (the Python
heap: the index, the scan, the queues) and file-backed pages (the memory-mapped spectra,
which the kernel can drop at will). The ratio of the peaks between the two library sizes is
printed against the ratio of the file counts: anonymous memory should grow no faster than
the index does (one dict per clip), far slower than the file count times a spectrogram.

    python tests/benchmarks/bench_ingest_scale.py [--sizes 2000 20000] [--jobs 1 2]
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import textwrap
import time
from pathlib import Path

import numpy as np

_CHILD = textwrap.dedent(
    """
    import json, resource, sys, threading, time
    from pipeline.config import load_settings
    from pipeline.ingest import ingest_folder

    peak = {"RssAnon": 0, "RssFile": 0, "VmRSS": 0}
    stop = threading.Event()

    def sample():
        while not stop.is_set():
            with open("/proc/self/status") as fh:
                for line in fh:
                    key = line.split(":")[0]
                    if key in peak:
                        peak[key] = max(peak[key], int(line.split()[1]) * 1024)
            time.sleep(0.02)

    settings = load_settings(sys.argv[3])
    t = threading.Thread(target=sample, daemon=True)
    t.start()
    t0 = time.perf_counter()
    s = ingest_folder(sys.argv[1], sys.argv[2], settings, jobs=int(sys.argv[4]))
    seconds = time.perf_counter() - t0
    stop.set()
    t.join()
    print(json.dumps({
        "accepted": s.accepted, "seconds": seconds, **peak,
        "maxrss": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024,
        "workers_maxrss": resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss * 1024,
    }))
    """
)


def _wav(samples: np.ndarray, sr: int) -> bytes:
    """A 16-bit mono WAV (the canonical 44-byte RIFF header) from float samples."""
    import struct

    data = np.clip(np.rint(samples * 32767), -32768, 32767).astype("<i2").tobytes()
    fmt = struct.pack("<HHIIHH", 1, 1, sr, sr * 2, 2, 16)
    return (b"RIFF" + struct.pack("<I", 36 + len(data)) + b"WAVE" + b"fmt "
            + struct.pack("<I", 16) + fmt + b"data" + struct.pack("<I", len(data)) + data)


def make_library(root: Path, n: int, *, sr: int = 16000, seed: int = 0) -> None:
    """``n`` decaying tones of 8 to 30 ms in 100 folders."""
    rng = np.random.default_rng(seed)
    for i in range(n):
        folder = root / f"cat{i % 100:02d}"
        folder.mkdir(parents=True, exist_ok=True)
        t = np.arange(int(rng.uniform(0.008, 0.03) * sr)) / sr
        y = 0.5 * np.exp(-t * 80) * np.sin(2 * np.pi * rng.uniform(100, 4000) * t)
        (folder / f"tick {i:05d}.wav").write_bytes(_wav(y, sr))


def measure(lib: Path, bank: Path, preset: str, jobs: int) -> dict:
    out = subprocess.run([sys.executable, "-c", _CHILD, str(lib), str(bank), preset, str(jobs)],
                         capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs="+", default=[2000, 20000])
    ap.add_argument("--jobs", type=int, nargs="+", default=[1, 2])
    ap.add_argument("--preset", default="tiny")
    args = ap.parse_args()
    mib = 2**20
    rows = []
    with tempfile.TemporaryDirectory(prefix="shotsmith-scale-") as tmp:
        tmp = Path(tmp)
        base = tmp / "lib-1"
        make_library(base, 1)
        for jobs in args.jobs:
            rows.append(("baseline", 1, jobs, measure(base, tmp / f"bank-1-{jobs}", args.preset,
                                                      jobs)))
        for n in args.sizes:
            lib = tmp / f"lib-{n}"
            t0 = time.perf_counter()
            make_library(lib, n)
            print(f"library of {n} files written in {time.perf_counter() - t0:.1f} s",
                  file=sys.stderr)
            for jobs in args.jobs:
                rows.append(("library", n, jobs, measure(lib, tmp / f"bank-{n}-{jobs}",
                                                         args.preset, jobs)))
    print(f"{'files':>7} {'jobs':>4} {'accepted':>8} {'s':>7} {'files/s':>8} {'maxrss':>8} "
          f"{'anon':>8} {'file':>8} {'workers':>8}  (MiB)")
    for _, n, jobs, m in rows:
        print(f"{n:>7} {jobs:>4} {m['accepted']:>8} {m['seconds']:>7.1f} "
              f"{n / m['seconds']:>8.0f} {m['maxrss'] / mib:>8.1f} {m['RssAnon'] / mib:>8.1f} "
              f"{m['RssFile'] / mib:>8.1f} {m['workers_maxrss'] / mib:>8.1f}")
    if len(args.sizes) >= 2:
        small, large = args.sizes[0], args.sizes[-1]
        by = {(n, j): m for _, n, j, m in rows}
        base_by = {j: m for kind, _, j, m in rows if kind == "baseline"}
        for jobs in args.jobs:
            a, b, z = by[(small, jobs)], by[(large, jobs)], base_by[jobs]
            grow_a = a["RssAnon"] - z["RssAnon"]
            grow_b = b["RssAnon"] - z["RssAnon"]
            print(f"jobs {jobs}: files x{large / small:.0f}; anonymous memory above the 1-file "
                  f"baseline {grow_a / mib:.1f} -> {grow_b / mib:.1f} MiB "
                  f"(x{grow_b / max(grow_a, 1):.1f}), {grow_b / large:.0f} bytes per file; "
                  f"peak RSS x{b['maxrss'] / a['maxrss']:.2f}")


if __name__ == "__main__":
    main()
