"""Training memory against bank size: synthetic banks of 2,000 and 100,000 clips.

    python tests/benchmarks/bench_bank_scale.py [--sizes 2000,100000] [--preset drums]
                                                [--dir /big/disk] [--steps 200]

Each bank has the preset's shape (``drums``: 1025 bins x 89 frames, float16, about
182 kB a clip, 18 GB for 100,000) and is written with :class:`~pipeline.bank.BankWriter`
into a temporary folder that is deleted afterwards; rows repeat 96 parametric
spectrograms (content does not change speed or memory). One fresh process per bank
runs ``train_model`` for ``--steps`` steps (then interrupts it) and then what ends an
epoch, called as the loop calls it (validation, every clip's code, the sampler fit and
the final model file), while a thread samples its ``RssAnon`` (``/proc/self/status``:
anonymous pages, which the kernel cannot drop; the bank's memory-mapped pages are file
pages and do not count) every 20 ms. It reports the bank's opening alone first (its time
and RssAnon growth: the clip table read in chunks, bank format 3), then the peak of each
phase (setup: bank open, split, mean spectrogram, model) and one epoch's time (the steps'
rate over the training split, plus validation). Target: the 100,000-clip peaks within 1.5x of the
2,000-clip ones.
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


def worker(bank: str, preset: str, steps: int) -> dict:
    """``steps`` training steps of ``train_model`` (then interrupted), then what ends an
    epoch, called as the loop calls it: validation, every clip's code, the final model
    file with the fitted sampler."""
    from pipeline.runtime import prepare

    prepare()
    phase = {"now": "open"}
    peaks = {"open": 0.0, "setup": 0.0, "steps": 0.0, "after": 0.0}
    marks: dict[str, float] = {}
    done = threading.Event()

    def sample() -> None:
        while not done.is_set():
            p = phase["now"]
            peaks[p] = max(peaks[p], rss_anon_mb())
            time.sleep(0.02)

    threading.Thread(target=sample, daemon=True).start()
    import torch

    from pipeline.bank import open_bank
    from pipeline.checkpoint import load_checkpoint
    from pipeline.config import load_settings
    from pipeline.model import build_model
    from pipeline.modelfile import names_digest
    from pipeline.train import RunFiles, keep, train_model, validate

    base = rss_anon_mb()
    t0 = time.perf_counter()
    b = open_bank(Path(bank))  # alone: what reading the index and clip table costs
    t_open = time.perf_counter() - t0
    peaks["open"] = max(peaks["open"], rss_anon_mb())
    open_mb = peaks["open"] - base
    del b
    phase["now"] = "setup"
    settings = load_settings(preset, {"train": {"epochs": 1}})
    stop = threading.Event()

    def progress(e: dict) -> None:
        if e["event"] == "start":
            phase["now"], marks["start"] = "steps", time.perf_counter()
        elif e["event"] == "batch" and e["batch"] >= steps:
            marks["steps_end"] = time.perf_counter()
            stop.set()
            phase["now"] = "between"

    peaks["between"] = 0.0
    with tempfile.TemporaryDirectory() as tmp:
        model_path = Path(tmp) / "m.pt"
        s = train_model(bank, model_path, settings, progress=progress, interrupt=stop)
        assert s.stopped == "interrupted", s.stopped
        print(json.dumps({"partial": peaks}), file=sys.stderr, flush=True)
        b = open_bank(Path(bank))
        ckpt = load_checkpoint(model_path.with_name("m.pt.ckpt"),
                               settings=settings.replace(audio=b.audio),
                               bank={"names_sha256": names_digest(b.names)})
        phase["now"] = "after"
        t0 = time.perf_counter()
        model = build_model(b.audio, settings.model)
        model.load_state_dict(ckpt.model_state)
        st, dev = ckpt.state, torch.device("cpu")
        db = b.audio.db_ceiling - b.audio.db_floor
        val = validate(model, b.spectra, st.val_rows, settings.train, db_range=db, device=dev)
        st.history.append({"epoch": 1, **val})
        st.best = {"epoch": 1, **val}
        t_val = time.perf_counter() - t0
        kept = keep(model, b.spectra, dev)
        t_codes = time.perf_counter() - t0 - t_val
        files = RunFiles(model_path, settings.replace(audio=b.audio), b,
                         {"path": bank, "n_clips": len(b), "names_sha256": ""})
        model_path.unlink(missing_ok=True)
        files.save_model(st, kept, final=True)
        t_after = time.perf_counter() - t0
        model_mb = model_path.stat().st_size / 1e6
    done.set()
    steps_s = marks["steps_end"] - marks["start"]
    clips = steps * settings.train.batch_size
    return {"peaks_mb": peaks, "open_seconds": t_open, "open_mb": open_mb,
            "steps": steps, "steps_seconds": steps_s,
            "train_clips_per_second": clips / steps_s, "validate_seconds": t_val,
            "codes_seconds": t_codes, "after_seconds": t_after,
            "epoch_seconds": s.n_train / (clips / steps_s) + t_val,
            "n_train": s.n_train, "n_val": s.n_val, "threads": s.threads, "model_mb": model_mb}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default="2000,100000")
    ap.add_argument("--preset", default="drums")
    ap.add_argument("--steps", type=int, default=200,
                    help="training steps measured (the epoch time is extrapolated from them)")
    ap.add_argument("--dir", default=None, help="where the temporary banks go")
    ap.add_argument("--worker", nargs=3, help=argparse.SUPPRESS)
    a = ap.parse_args()
    if a.worker:
        print(json.dumps(worker(a.worker[0], a.worker[1], int(a.worker[2]))))  # noqa: T201
        return
    sizes = [int(n) for n in a.sizes.split(",")]
    print(f"# bench_bank_scale: preset {a.preset}, {a.steps} steps, load average "
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
                                  a.preset, str(a.steps)], capture_output=True, text=True)
            if out.returncode:
                raise SystemExit(f"worker failed:\n{out.stderr[-3000:]}")
            r = json.loads(out.stdout.strip().splitlines()[-1])
        finally:
            shutil.rmtree(tmp, ignore_errors=True)
        rows[n] = r
        p = r["peaks_mb"]
        print(f"{n:7d} clips: bank open {r['open_seconds']:.2f} s, RssAnon +{r['open_mb']:.0f} MB",
              flush=True)
        print(f"{n:7d} clips ({r['n_train']} train, {r['n_val']} val): RssAnon peak setup "
              f"{p['setup']:6.0f} MB, steps {p['steps']:6.0f} MB, validation + codes + model "
              f"file {p['after']:6.0f} MB; {r['steps']} steps {r['steps_seconds']:.0f} s "
              f"({r['train_clips_per_second']:.0f} clips/s), validation "
              f"{r['validate_seconds']:.0f} s, codes {r['codes_seconds']:.0f} s, model file "
              f"{r['after_seconds'] - r['validate_seconds'] - r['codes_seconds']:.0f} s "
              f"({r['model_mb']:.1f} MB); one epoch (steps extrapolated + validation) "
              f"{r['epoch_seconds']:.0f} s; load {os.getloadavg()[0]:.1f}", flush=True)
    if len(sizes) >= 2:
        lo, hi = rows[min(sizes)]["peaks_mb"], rows[max(sizes)]["peaks_mb"]
        for k in ("setup", "steps", "after"):
            ratio = hi[k] / lo[k]
            print(f"# {k}: {max(sizes)} / {min(sizes)} clips RssAnon {ratio:.2f}x (target <= 1.5: "
                  f"{'met' if ratio <= 1.5 else 'NOT met'})")


if __name__ == "__main__":
    np.seterr(all="ignore")
    main()
