"""Training throughput and peak memory, tiny and drums presets, on a 400-clip synthesized bank.

    python tests/benchmarks/bench_train.py [--quick] [--threads 2]
    python tests/benchmarks/bench_train.py --busy [--presets tiny,drums,long]

``--busy`` measures the bare training step of each preset (its own batch size) and
of the conv2d reference (batch 32) on a quiet machine and with one core taken by a
spinning process that the benchmark starts beside it, side by side with their
ratio, under each thread policy (``--policies``): ``before`` (the OpenMP default
wait policy, cores threads), ``after`` (:func:`pipeline.runtime.prepare`: passive
waiting, threads from the available cores) and ``after1`` (passive, 1 thread).
Target: busy >= 50 % of quiet for each preset, quiet not below ``before``.

Every measurement runs in a fresh process (so ``ru_maxrss`` is its own peak) and
prints one JSON line; the parent prints a table. Measured in the same run:

- ``ours``: our VAE (bins as channels of 1-D time convolutions) in a bare loop;
- ``conv2d``: a plain VAE of four strided 2-D convolutions (16, 32, 64, 128
  channels, 3x3, stride 2, ReLU; mirrored with transposed convolutions), batch 32,
  the kind of network the anchor figures were measured with on this machine:
  139 clips/s on 513 x 87 and 727 clips/s on 128 x 87, peak about 1.1 GB;
- ``train_model``: the whole training loop (validation, codes, atomic saves);
- the allocator effect: the same runs with glibc's malloc told to keep freed
  buffers (``MALLOC_MMAP_THRESHOLD_`` at its 32 MiB maximum, no trimming), and the
  minor page faults per clip either way;
- the demo kit (demo_sounds/, or a synthesized stand-in): ingest and train with
  the tiny preset to early stopping; target under 90 s.

Targets: drums >= 200 clips/s of training on 2 cores; tiny trains a usable model
(validation error far below the best constant guess) on the demo kit in < 90 s.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[1]
sys.path[:0] = [str(ROOT), str(ROOT / "tests")]

ANCHOR = {(513, 87): 139.0, (128, 87): 727.0}  # conv2d clips/s measured on this machine
KEEP_BUFFERS = {"MALLOC_MMAP_THRESHOLD_": str(32 * 2**20), "MALLOC_TRIM_THRESHOLD_": str(2**40)}


def _usage() -> dict:
    r = resource.getrusage(resource.RUSAGE_SELF)
    return {"maxrss_mb": r.ru_maxrss / 1024, "minflt": r.ru_minflt, "cpu": r.ru_utime + r.ru_stime}


def _threads() -> int:
    return int(os.environ.get("OMP_NUM_THREADS", "2"))


# ---------------------------------------------------------------- the baseline


def conv2d_vae(n_bins: int, n_frames: int, latent_dim: int):
    """Four strided 3x3 2-D convolutions, 16 -> 128 channels, and the mirror image."""
    import torch
    from torch import nn

    chans = (1, 16, 32, 64, 128)

    class Conv2dVAE(nn.Module):
        def __init__(self) -> None:
            super().__init__()
            enc = []
            for a, b in zip(chans, chans[1:]):
                enc += [nn.Conv2d(a, b, 3, stride=2, padding=1), nn.ReLU()]
            self.enc = nn.Sequential(*enc)
            with torch.no_grad():
                self.shape = self.enc(torch.zeros(1, 1, n_bins, n_frames)).shape[1:]
            flat = int(np.prod(self.shape))
            self.post = nn.Linear(flat, 2 * latent_dim)
            self.lift = nn.Linear(latent_dim, flat)
            dec = []
            for a, b in zip(chans[:0:-1], chans[-2::-1]):
                dec += [nn.ConvTranspose2d(a, b, 3, stride=2, padding=1, output_padding=1),
                        nn.ReLU()]
            self.dec = nn.Sequential(*dec[:-1])

        def forward(self, x):
            mu, logvar = self.post(self.enc(x[:, None]).flatten(1)).chunk(2, dim=1)
            z = mu + torch.exp(0.5 * logvar) * torch.randn_like(mu)
            h = self.dec(self.lift(z).view(-1, *self.shape))[:, 0, :n_bins, :n_frames]
            return torch.sigmoid(h), mu, logvar, z

    return Conv2dVAE()


# ------------------------------------------------------------------- workers


def worker_loop(kind: str, bank: str, steps: int, batch: int, bins: int | None) -> dict:
    """A bare training loop: ``steps`` timed AdamW steps after 3 warm-up steps."""
    import torch

    from pipeline.bank import open_bank
    from pipeline.config import load_settings
    from pipeline.model import vae_loss

    b = open_bank(Path(bank))
    X = torch.from_numpy(np.asarray(b.spectra, dtype=np.float32))
    if bins:  # the anchor's reduced-height input
        X = X[:, :bins].contiguous()
    settings = load_settings(b.settings["preset"])
    torch.manual_seed(0)
    n_bins, n_frames = X.shape[1:]
    if kind == "ours":
        from pipeline.model import ShotVAE

        m = settings.model
        model = ShotVAE(n_bins=n_bins, n_frames=n_frames, latent_dim=m.latent_dim,
                        width=m.width, depth=m.depth, kernel_size=m.kernel_size)
    else:
        model = conv2d_vae(n_bins, n_frames, settings.model.latent_dim)
    opt = torch.optim.AdamW(model.parameters(), lr=1e-3)
    rng = np.random.default_rng(0)
    before = _usage()
    t0 = 0.0
    for i in range(steps + 3):
        if i == 3:
            t0, u0 = time.perf_counter(), _usage()
        x = X[rng.choice(len(X), batch, replace=False)]
        x_hat, mu, logvar, _ = model(x)
        loss, _, _ = vae_loss(x_hat, x, mu, logvar, kl_weight=1.0,
                              loud_weight=settings.train.loud_weight)
        opt.zero_grad(set_to_none=True)
        loss.backward()
        opt.step()
    secs = time.perf_counter() - t0
    after = _usage()
    return {"clips_per_second": steps * batch / secs, "params": sum(p.numel() for p in
            model.parameters()), "rss_before_mb": before["maxrss_mb"],
            "maxrss_mb": after["maxrss_mb"], "faults_per_clip": (after["minflt"] - u0["minflt"]) /
            (steps * batch), "cpu_rate": steps * batch * _threads() / (after["cpu"] - u0["cpu"]),
            "shape": [int(n_bins), int(n_frames)], "batch": batch}


def worker_train(bank: str, epochs: int, preset: str) -> dict:
    """The whole loop: train_model for ``epochs`` epochs."""
    import pipeline.train
    from pipeline.config import load_settings
    from pipeline.train import train_model

    # train_model keeps freed buffers itself; the plain run measures glibc's default
    pipeline.train.KEEP_FREED_BUFFERS = bool(os.environ.get("BENCH_MALLOPT"))
    settings = load_settings(preset, {"train": {"epochs": epochs, "patience": epochs}})
    before = _usage()
    with tempfile.TemporaryDirectory() as tmp:
        s = train_model(bank, Path(tmp) / "m.pt", settings).to_dict()
    after = _usage()
    return {**{k: s[k] for k in ("clips_per_second", "train_clips_per_second", "epochs",
                                 "best_val_loss", "best_val_recon", "best_val_kl",
                                 "best_val_rms_db", "seconds", "parameters", "threads")},
            "rss_before_mb": before["maxrss_mb"], "maxrss_mb": after["maxrss_mb"],
            "faults_per_clip": (after["minflt"] - before["minflt"]) /
            (s["clips_per_second"] * s["seconds"] or 1),
            "cpu_rate": s["clips_per_second"] * s["seconds"] * _threads() /
            (after["cpu"] - before["cpu"])}


def worker_demo(kit: str, work: str) -> dict:
    """Ingest the kit and train with the tiny preset until it stops; quality vs the mean."""
    from pipeline.bank import open_bank
    from pipeline.config import load_settings
    from pipeline.ingest import ingest_folder
    from pipeline.modelfile import load_model_file
    from pipeline.train import train_model

    settings = load_settings("tiny")
    t0 = time.perf_counter()
    ingest_folder(Path(kit), Path(work) / "bank", settings)
    t_ingest = time.perf_counter() - t0
    s = train_model(Path(work) / "bank", Path(work) / "m.pt", settings).to_dict()
    mf = load_model_file(Path(work) / "m.pt")
    U = np.asarray(open_bank(Path(work) / "bank").spectra, dtype=np.float32)
    tr, va = mf.split["train"], mf.split["val"]
    db = settings.audio.db_ceiling - settings.audio.db_floor
    const = db * float(np.sqrt(np.mean((U[va] - U[tr].mean(0)) ** 2)))
    model = db * float(np.sqrt(np.mean((mf.decode(mf.mu[va]) - U[va]) ** 2)))
    return {"clips": len(U), "categories": len(mf.categories), "ingest_seconds": t_ingest,
            "train_seconds": s["seconds"], "epochs": s["epochs"], "stopped": s["stopped"],
            "best_val_loss": s["best_val_loss"], "best_val_recon": s["best_val_recon"],
            "best_val_kl": s["best_val_kl"], "val_rms_db": model, "const_rms_db": const,
            "clips_per_second": s["clips_per_second"], **_usage()}


# -------------------------------------------------------------------- parent


def run(args: list[str], *, threads: int, env: dict | None = None, busy: bool = False) -> dict:
    e = {**os.environ, "OMP_NUM_THREADS": str(threads), **(env or {})}
    e = {k: v for k, v in e.items() if v is not None}  # None: unset that variable
    spinner = None
    if busy:  # another process holding one core for the whole measurement
        spinner = subprocess.Popen([sys.executable, "-c", "while True: pass"])
    try:
        out = subprocess.run([sys.executable, __file__, "--worker", *args], env=e,
                             capture_output=True, text=True)
    finally:
        if spinner is not None:
            spinner.kill()
            spinner.wait()
    if out.returncode:
        raise SystemExit(f"worker {args} failed:\n{out.stderr[-3000:]}")
    return json.loads(out.stdout.strip().splitlines()[-1])


POLICIES = {  # environment of a worker under each thread policy (None: unset)
    "before": {"OMP_WAIT_POLICY": None, "BENCH_POLICY": None},
    "after": {"OMP_WAIT_POLICY": None, "BENCH_POLICY": "after"},
    "after1": {"OMP_WAIT_POLICY": None, "BENCH_POLICY": "after", "BENCH_THREADS": "1"},
}


def busy_section(banks: dict[str, Path], presets: list[str], policies: list[str], *,
                 steps: int, reps: int, threads: int) -> None:
    """Quiet against one-core-busy training steps, ours and conv2d, per policy."""
    from pipeline.config import load_settings

    print(f"# busy: {steps} timed steps, best of {reps}; quiet and busy interleaved; "
          "ratios are busy/quiet and ours/conv2d of the same condition", flush=True)
    table = {}
    for preset in presets:
        b = str(banks[preset])
        bs = load_settings(preset).train.batch_size
        for pol in policies:
            env = POLICIES[pol]
            t = int(env.get("BENCH_THREADS") or threads)
            cps = {}
            for _ in range(reps):
                for kind, batch in (("ours", bs), ("conv2d", 32)):
                    for busy in (False, True):
                        r = run([kind, b, str(steps), str(batch)], threads=t, env=env, busy=busy)
                        cps[kind, busy] = max(cps.get((kind, busy), 0.0), r["clips_per_second"])
            table[preset, pol] = cps
            ratio = cps["ours", True] / cps["ours", False]
            print(f"{preset:6s} {pol:7s} ours b{bs:<3d} quiet {cps['ours', False]:6.0f} busy "
                  f"{cps['ours', True]:6.0f} clips/s (busy/quiet {ratio:.2f})"
                  f" | conv2d b32 quiet {cps['conv2d', False]:5.0f} busy {cps['conv2d', True]:5.0f}"
                  f" ({cps['conv2d', True] / cps['conv2d', False]:.2f}) | ours/conv2d quiet "
                  f"{cps['ours', False] / cps['conv2d', False]:.2f}x busy "
                  f"{cps['ours', True] / cps['conv2d', True]:.2f}x | load "
                  f"{os.getloadavg()[0]:.1f}", flush=True)
    for preset in presets:
        if (preset, "before") in table and (preset, "after") in table:
            q0, q1 = table[preset, "before"]["ours", False], table[preset, "after"]["ours", False]
            r1 = table[preset, "after"]["ours", True] / q1
            print(f"# {preset}: after/before quiet {q1 / q0:.2f}x; busy/quiet after {r1:.2f} "
                  f"(target >= 0.50: {'met' if r1 >= 0.5 else 'NOT met'})", flush=True)


def build_banks(root: Path, n: int, presets: tuple[str, ...] = ("tiny", "drums")
                ) -> dict[str, Path]:
    from synthbank import FAMILIES, make_bank

    from pipeline.config import load_settings

    banks = {}
    for preset in presets:
        t0 = time.perf_counter()
        path = make_bank(root / preset, load_settings(preset).audio,
                         per_family=-(-n // len(FAMILIES)))
        index = json.loads((path / "index.json").read_text())
        index["settings"]["preset"] = preset  # workers read the preset's model settings
        (path / "index.json").write_text(json.dumps(index))
        banks[preset] = path
        print(f"# {preset} bank: {index['clip_count']} clips in {time.perf_counter() - t0:.1f} s",
              flush=True)
    return banks


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="fewer steps and epochs")
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--clips", type=int, default=400)
    ap.add_argument("--repeats", type=int, default=2, help="fresh processes per row (best kept)")
    ap.add_argument("--skip-demo", action="store_true")
    ap.add_argument("--presets", default="tiny,drums", help="comma-separated")
    ap.add_argument("--skip-alloc", action="store_true", help="no allocator variants")
    ap.add_argument("--busy", action="store_true",
                    help="only quiet vs one-core-busy training steps (see the docstring)")
    ap.add_argument("--policies", default="before,after,after1", help="comma-separated")
    ap.add_argument("--busy-steps", type=int, default=16, help="timed steps per --busy run")
    ap.add_argument("--worker", nargs="+", help=argparse.SUPPRESS)
    a = ap.parse_args()
    if a.worker:
        n_threads = int(os.environ.get("OMP_NUM_THREADS", "2"))
        if os.environ.get("BENCH_POLICY") == "after":  # what the CLI does at its entry
            from pipeline.runtime import prepare

            n_threads = prepare(int(os.environ["BENCH_THREADS"])
                                if os.environ.get("BENCH_THREADS") else None)
        import torch

        torch.set_num_threads(n_threads)
        torch.optim.AdamW([torch.zeros(1, requires_grad=True)])  # its one-time imports (~2 s)
        if os.environ.get("BENCH_MALLOPT"):
            from pipeline.train import keep_freed_buffers

            assert keep_freed_buffers()
        kind, *rest = a.worker
        if kind == "train":
            res = worker_train(rest[0], int(rest[1]), rest[2])
        elif kind == "demo":
            res = worker_demo(rest[0], rest[1])
        else:
            res = worker_loop(kind, rest[0], int(rest[1]), int(rest[2]),
                              int(rest[3]) if len(rest) > 3 else None)
        print(json.dumps(res))
        return

    steps, epochs, reps = (8, 2, 1) if a.quick else (25, 4, a.repeats)
    batch = {"tiny": 16, "drums": 32}
    allocs = {"": None, " keep (env)": KEEP_BUFFERS, " keep (mallopt)": {"BENCH_MALLOPT": "1"}}
    print(f"# bench_train: {a.threads} threads, best of {reps} fresh processes per row, "
          f"load average {os.getloadavg()[0]:.2f}")
    if a.busy:
        presets = a.presets.split(",")
        print(f"# bench_train --busy: {a.threads} threads, load average {os.getloadavg()[0]:.2f}")
        with tempfile.TemporaryDirectory() as tmp:
            banks = build_banks(Path(tmp), a.clips, tuple(presets))
            busy_section(banks, presets, a.policies.split(","), steps=a.busy_steps, reps=reps,
                         threads=a.threads)
        return
    with tempfile.TemporaryDirectory() as tmp:
        banks = build_banks(Path(tmp), a.clips)
        rows: dict[str, dict] = {}

        def show(label: str, runs: list[dict], note: str = "") -> dict:
            r = max(runs, key=lambda x: x["clips_per_second"])
            r["spread"] = [min(x["clips_per_second"] for x in runs), r["clips_per_second"]]
            rows[label] = r
            print(f"{label:36s} {r['clips_per_second']:6.0f} clips/s "
                  f"({r['spread'][0]:.0f}-{r['spread'][1]:.0f})  peak {r['maxrss_mb']:5.0f} MB "
                  f"(setup {r.get('rss_before_mb', 0):4.0f})  "
                  f"{r.get('faults_per_clip', 0):7.1f} faults/clip  "
                  f"{r['cpu_rate']:5.0f} per {a.threads} CPU-s  load "
                  f"{os.getloadavg()[0]:.1f}  {note}", flush=True)
            return r

        def pair(label_a, args_a, label_b, args_b, env, note, env_b=None) -> None:
            # interleaved, so both see the same load; the ratio is the median of the pairs
            runs_a, runs_b = [], []
            for _ in range(reps):
                runs_a.append(run(args_a, threads=a.threads, env=env))
                runs_b.append(run(args_b, threads=a.threads, env=env_b or env))
            ratio = float(np.median([x["clips_per_second"] / y["clips_per_second"]
                                     for x, y in zip(runs_a, runs_b)]))
            best = lambda runs: max(runs, key=lambda x: x["clips_per_second"])  # noqa: E731
            ra = show(label_a, runs_a, note(best(runs_a)))
            show(label_b, runs_b, f"{note(best(runs_b))}; first/second {ratio:.2f}x (median)")
            ra["ratio"] = ratio

        params = lambda r: f"{r['params'] / 1e6:.2f} M params"  # noqa: E731
        for preset in a.presets.split(","):
            b = str(banks[preset])
            for name, env in list(allocs.items())[: 1 if a.skip_alloc else None]:
                pair(f"{preset} ours b{batch[preset]}{name}",
                     ["ours", b, str(steps), str(batch[preset])],
                     f"{preset} conv2d b32{name}", ["conv2d", b, str(steps), "32"], env, params)

            def trained(r):
                return (f"steps only {r['train_clips_per_second']:.0f} clips/s; best val "
                        f"{r['best_val_loss']:.1f} = recon {r['best_val_recon']:.1f} + KL "
                        f"{r['best_val_kl']:.1f}; {r['best_val_rms_db']:.2f} dB RMS")

            pair(f"{preset} train_model {epochs} ep", ["train", b, str(epochs), preset],
                 f"{preset} train_model {epochs} ep keep (mallopt)",
                 ["train", b, str(epochs), preset], None, trained, allocs[" keep (mallopt)"])
        runs = [run(["conv2d", str(banks["drums"]), str(steps), "32", "128"], threads=a.threads)
                for _ in range(reps)]
        show("conv2d 128 x 87 b32 (anchor shape)", runs,
             f"vs anchor 727: {max(r['clips_per_second'] for r in runs) / 727:.2f}x")
        d, base = rows.get(f"drums train_model {epochs} ep"), rows.get("drums conv2d b32")
        if d and base:
            print(f"# drums: {d['train_clips_per_second']:.0f} clips/s of training steps, "
                  f"{d['clips_per_second']:.0f} overall (target >= 200: "
                  f"{'met' if d['train_clips_per_second'] >= 200 else 'NOT met'}); conv2d here "
                  f"{base['clips_per_second']:.0f} vs anchor 139 "
                  f"({base['clips_per_second'] / ANCHOR[(513, 87)]:.2f}x); ours/conv2d "
                  f"{rows['drums ours b32']['ratio']:.2f}x (median of interleaved pairs)")

        if not a.skip_demo:
            from pipeline.demo import find_kit, synthesize_kit

            kit = find_kit()
            if kit is None:
                kit = Path(tmp) / "kit"
                synthesize_kit(kit)
                print("# demo_sounds/ not found: synthesized stand-in kit")
            work = Path(tmp) / "demo"
            work.mkdir()
            d = run(["demo", str(kit), str(work)], threads=a.threads)
            print(f"demo kit ({d['clips']} clips, {d['categories']} categories): ingest "
                  f"{d['ingest_seconds']:.1f} s, train {d['train_seconds']:.1f} s "
                  f"({d['epochs']} epochs, {d['stopped']}, {d['clips_per_second']:.0f} clips/s), "
                  f"peak {d['maxrss_mb']:.0f} MB")
            print(f"  best val loss {d['best_val_loss']:.1f} (recon {d['best_val_recon']:.1f} + "
                  f"KL {d['best_val_kl']:.1f}); held-out error {d['val_rms_db']:.2f} dB RMS vs "
                  f"{d['const_rms_db']:.2f} dB for the training mean "
                  f"(ratio {d['val_rms_db'] / d['const_rms_db']:.2f})")
            total = d["ingest_seconds"] + d["train_seconds"]
            print(f"# demo: {total:.1f} s ingest + train (target < 90 s: "
                  f"{'met' if total < 90 else 'NOT met'})")
        shutil.rmtree(Path(tmp), ignore_errors=True)


if __name__ == "__main__":
    main()
