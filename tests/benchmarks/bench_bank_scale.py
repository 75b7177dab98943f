"""Training memory against bank size: synthetic banks of 2,000 and 100,000 clips.

    python tests/benchmarks/bench_bank_scale.py [--sizes 2000,100000] [--preset drums]
                                                [--dir /big/disk] [--epochs 1]

Each bank has the preset's shape (``drums``: 1025 bins x 89 frames, float16, about
182 kB a clip, 18 GB for 100,000) and is written with :class:`~pipeline.bank.BankWriter`
into a temporary folder that is deleted afterwards; rows repeat 96 parametric
spectrograms (content does not change speed or memory). One fresh process per bank
runs ``train_model`` for ``--epochs`` epochs while a thread samples its ``RssAnon``
(``/proc/self/status``: anonymous pages, which the kernel cannot drop; the bank's
memory-mapped pages are file pages and do not count) every 20 ms, and reports the
peak of three phases: setup (bank open, split, mean spectrogram, model), the training
steps, and the rest (validation, every clip's code, the sampler fit and the model
file). Target: the 100,000-clip peaks within 1.5x of the 2,000-clip ones.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[1]
sys.path[:0] = [str(ROOT), str(ROOT / "tests")]


def rss_anon_mb() -> float:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("RssAnon:"):
            return int(line.split()[1]) / 1024
    return float("nan")


def make_bank(path: Path, preset: str, n: int) -> float:
    """A bank of ``n`` clips of ``preset``'s shape; returns its size on disk in GB."""
    from synthbank import param_spectra

    from pipeline.bank import BankWriter
    from pipeline.config import load_settings

    settings = load_settings(preset)
    spec = settings.audio
    base, cats = param_spectra(96, spec, seed=0)
    writer = BankWriter(path, spec, n)
    clips = []
    for row in range(n):
        c = cats[row % len(cats)]
        writer.put(row, base[row % len(base)])
        clips.append({"name": f"{c}_{row:06d}", "path": f"{c}/{c}_{row:06d}.wav",
                      "category": c, "sample_rate": spec.sample_rate, "channels": 1,
                      "duration": spec.duration, "peak_dbfs": -1.0, "size": 0, "mtime_ns": 0})
    writer.commit(clips, settings.to_dict(), {"accepted": n, "skipped": []})
    return sum(p.stat().st_blocks * 512 for p in path.iterdir()) / 1e9


def worker(bank: str, preset: str, epochs: int) -> dict:
    from pipeline.runtime import prepare

    prepare()
    phase = {"now": "setup"}
    peaks = {"setup": 0.0, "steps": 0.0, "after": 0.0}
    marks: dict[str, float] = {}
    done = threading.Event()

    def sample() -> None:
        while not done.is_set():
            p = phase["now"]
            peaks[p] = max(peaks[p], rss_anon_mb())
            time.sleep(0.02)

    sampler = threading.Thread(target=sample, daemon=True)
    sampler.start()
    from pipeline.config import load_settings
    from pipeline.train import train_model

    settings = load_settings(preset, {"train": {"epochs": epochs, "patience": epochs}})

    def progress(e: dict) -> None:
        if e["event"] == "start":
            peaks["setup"] = max(peaks["setup"], rss_anon_mb())
            phase["now"], marks["start"] = "steps", time.perf_counter()
        elif e["event"] == "batch" and e["batch"] == e["batches"] and e["epoch"] == epochs:
            peaks["steps"] = max(peaks["steps"], rss_anon_mb())
            phase["now"], marks["steps_end"] = "after", time.perf_counter()
        elif e["event"] == "epoch":
            marks.setdefault("epoch_seconds", e["seconds"])

    t0 = time.perf_counter()
    with tempfile.TemporaryDirectory() as tmp:
        s = train_model(bank, Path(tmp) / "m.pt", settings, progress=progress)
        t_end = time.perf_counter()
        model_mb = (Path(tmp) / "m.pt").stat().st_size / 1e6
    total = t_end - t0
    done.set()
    sampler.join()
    return {"peaks_mb": peaks, "seconds": total, "epoch_seconds": marks.get("epoch_seconds"),
            "steps_seconds": marks.get("steps_end", 0) - marks.get("start", 0),
            "after_seconds": t_end - marks.get("steps_end", t0),
            "n_train": s.n_train, "n_val": s.n_val, "threads": s.threads,
            "train_clips_per_second": s.train_clips_per_second, "model_mb": model_mb}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default="2000,100000")
    ap.add_argument("--preset", default="drums")
    ap.add_argument("--epochs", type=int, default=1)
    ap.add_argument("--dir", default=None, help="where the temporary banks go")
    ap.add_argument("--worker", nargs=3, help=argparse.SUPPRESS)
    a = ap.parse_args()
    if a.worker:
        print(json.dumps(worker(a.worker[0], a.worker[1], int(a.worker[2]))))
        return
    sizes = [int(n) for n in a.sizes.split(",")]
    print(f"# bench_bank_scale: preset {a.preset}, {a.epochs} epoch(s), load average "
          f"{os.getloadavg()[0]:.1f}", flush=True)
    rows = {}
    for n in sizes:
        tmp = Path(tempfile.mkdtemp(prefix="shotsmith-scale-", dir=a.dir))
        try:
            free = shutil.disk_usage(tmp).free / 1e9
            t0 = time.perf_counter()
            gb = make_bank(tmp / "bank", a.preset, n)
            print(f"# {n} clips: bank {gb:.2f} GB on disk ({free:.0f} GB were free), written "
                  f"in {time.perf_counter() - t0:.0f} s", flush=True)
            out = subprocess.run([sys.executable, __file__, "--worker", str(tmp / "bank"),
                                  a.preset, str(a.epochs)], capture_output=True, text=True)
            if out.returncode:
                raise SystemExit(f"worker failed:\n{out.stderr[-3000:]}")
            r = json.loads(out.stdout.strip().splitlines()[-1])
        finally:
            shutil.rmtree(tmp, ignore_errors=True)
        rows[n] = r
        p = r["peaks_mb"]
        print(f"{n:7d} clips ({r['n_train']} train, {r['n_val']} val): RssAnon peak setup "
              f"{p['setup']:6.0f} MB, steps {p['steps']:6.0f} MB, validation + codes + model "
              f"file {p['after']:6.0f} MB; steps {r['steps_seconds']:.0f} s "
              f"({r['train_clips_per_second']:.0f} clips/s), epoch {r['epoch_seconds']:.0f} s, "
              f"after the steps {r['after_seconds']:.0f} s, model file {r['model_mb']:.1f} MB; "
              f"load {os.getloadavg()[0]:.1f}", flush=True)
    if len(sizes) >= 2:
        lo, hi = rows[min(sizes)]["peaks_mb"], rows[max(sizes)]["peaks_mb"]
        for k in ("steps", "after"):
            ratio = hi[k] / lo[k]
            print(f"# {k}: {max(sizes)} / {min(sizes)} clips RssAnon {ratio:.2f}x (target <= 1.5: "
                  f"{'met' if ratio <= 1.5 else 'NOT met'})")


if __name__ == "__main__":
    np.seterr(all="ignore")
    main()
