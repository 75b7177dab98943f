"""Training on a GPU against the CPU, for someone with a CUDA machine.

    python tests/benchmarks/bench_gpu.py [--clips 2000] [--preset drums] [--epochs 2]

Builds a synthetic bank of the preset's shape in a temporary folder, then in fresh
processes runs ``train_model`` on ``cuda`` and on ``cpu`` (same settings and seed) and
prints the clips/s of training steps and of the whole loop (validation, every clip's
code, the sampler fit, the model file) with their ratio. The model trained on the GPU
is then loaded with CUDA hidden (``CUDA_VISIBLE_DEVICES=""``) and decodes its codes, as
on a CPU-only machine. Without CUDA it says so and stops.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[1]
sys.path[:0] = [str(ROOT), str(ROOT / "tests")]


def worker(kind: str, bank: str, model: str, preset: str, epochs: int) -> dict:
    from pipeline.runtime import prepare

    prepare()
    if kind == "load":
        import numpy as np
        import torch

        from pipeline.modelfile import load_model_file

        t0 = time.perf_counter()
        m = load_model_file(model)
        out = m.decode(m.mu[:64])
        return {"cuda_visible": torch.cuda.is_available(), "seconds": time.perf_counter() - t0,
                "finite": bool(np.isfinite(out).all()), "shape": list(out.shape)}
    from pipeline.config import load_settings
    from pipeline.train import train_model

    settings = load_settings(preset, {"train": {"epochs": epochs, "patience": epochs}})
    s = train_model(bank, model, settings, device=kind, overwrite=True)
    return {k: getattr(s, k) for k in ("device", "threads", "seconds", "clips_per_second",
                                       "train_clips_per_second", "best_val_loss")}


def run(*args: str, env: dict | None = None) -> dict:
    out = subprocess.run([sys.executable, __file__, "--worker", *args], capture_output=True,
                         text=True, env={**os.environ, **(env or {})})
    if out.returncode:
        raise SystemExit(f"worker {args[0]} failed:\n{out.stderr[-3000:]}")
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--clips", type=int, default=2000)
    ap.add_argument("--preset", default="drums")
    ap.add_argument("--epochs", type=int, default=2)
    ap.add_argument("--worker", nargs=5, help=argparse.SUPPRESS)
    a = ap.parse_args()
    if a.worker:
        kind, bank, model, preset, epochs = a.worker
        print(json.dumps(worker(kind, bank, model, preset, int(epochs))))
        return
    import torch

    if not torch.cuda.is_available():
        print("# bench_gpu: torch sees no CUDA device here; nothing to measure")
        return
    from bench_bank_scale import make_bank

    print(f"# bench_gpu: {torch.cuda.get_device_name(0)}, preset {a.preset}, {a.clips} clips, "
          f"{a.epochs} epochs", flush=True)
    with tempfile.TemporaryDirectory() as tmp:
        bank, model = Path(tmp) / "bank", Path(tmp) / "m.pt"
        gb = make_bank(bank, a.preset, a.clips)
        print(f"# bank {gb:.2f} GB", flush=True)
        res = {}
        for dev in ("cuda", "cpu"):
            r = res[dev] = run(dev, str(bank), str(model), a.preset, str(a.epochs))
            print(f"{dev:5s} steps {r['train_clips_per_second']:8.0f} clips/s, whole loop "
                  f"{r['clips_per_second']:7.0f} clips/s, {r['seconds']:.1f} s "
                  f"({r['threads']} CPU threads), best val loss {r['best_val_loss']:.1f}",
                  flush=True)
        ratio = res["cuda"]["train_clips_per_second"] / res["cpu"]["train_clips_per_second"]
        whole = res["cuda"]["clips_per_second"] / res["cpu"]["clips_per_second"]
        print(f"# cuda/cpu: steps {ratio:.1f}x, whole loop {whole:.1f}x")
        run("cuda", str(bank), str(model), a.preset, str(a.epochs))  # a GPU-trained file
        r = run("load", str(bank), str(model), a.preset, "0", env={"CUDA_VISIBLE_DEVICES": ""})
        print(f"# the GPU-trained model on the CPU (CUDA visible: {r['cuda_visible']}): loaded "
              f"and decoded {r['shape'][0]} codes in {r['seconds']:.1f} s, finite {r['finite']}")


if __name__ == "__main__":
    main()
