"""Rendering speed: ``generate -n 64`` with the ``drums`` preset, split into its stages.

Prints seconds of audio rendered per second of wall time for the whole command
and for each stage (decode, phase reconstruction, the SC measurement the
manifest records, finishing + writing), all measured in this run on the same
model. The model is trained for a couple of epochs only: speed does not depend
on how good it is.

    python tests/benchmarks/bench_render.py [--n 64] [--iterations N]
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time
from pathlib import Path

import numpy as np


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=64)
    ap.add_argument("--iterations", type=int, default=None, help="default: the preset's")
    args = ap.parse_args()

    from pipeline import latent, spectra
    from pipeline.config import load_settings
    from pipeline.create import generate_sounds
    from pipeline.demo import find_kit, synthesize_kit
    from pipeline.ingest import ingest_folder
    from pipeline.modelfile import load_model_file
    from pipeline.phase import griffin_lim
    from pipeline.render import finish_audio, write_wav
    from pipeline.train import train_model

    settings = load_settings("drums", {"train": {"epochs": 2}})
    render = settings.render
    if args.iterations is not None:
        render = render.__class__(**{**render.__dict__, "iterations": args.iterations})
    audio = settings.audio
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        kit = find_kit()
        if kit is None:
            kit = tmp / "kit"
            synthesize_kit(kit)
        ingest_folder(kit, tmp / "bank", settings)
        train_model(tmp / "bank", tmp / "model.pt", settings)
        model = tmp / "model.pt"
        mf = load_model_file(model)

        t0 = time.perf_counter()
        generate_sounds(
            model, tmp / "gen", n=args.n, seed=0, render=render
        )
        total = time.perf_counter() - t0

        Z = latent.sample_prior(args.n, mf.mu.shape[1], rng=0)
        stage = dict.fromkeys(("decode", "phase", "measure", "write"), 0.0)
        out = tmp / "parts"
        out.mkdir()
        for s in range(0, args.n, render.batch_size):
            t = time.perf_counter()
            U = mf.decode(Z[s : s + render.batch_size])
            stage["decode"] += time.perf_counter() - t
            t = time.perf_counter()
            S = spectra.unit_to_magnitude(U, audio)
            y = griffin_lim(
                S,
                n_fft=audio.n_fft,
                hop_length=audio.hop_length,
                length=audio.n_samples,
                n_iter=render.iterations,
                momentum=render.momentum,
                init=render.phase_init,
                seed=s,
            )
            stage["phase"] += time.perf_counter() - t
            t = time.perf_counter()
            spectra.spectral_convergence_db(
                S,
                spectra.magnitude(
                    y.astype(np.float64), n_fft=audio.n_fft, hop_length=audio.hop_length
                ),
            )
            stage["measure"] += time.perf_counter() - t
            t = time.perf_counter()
            for j, yj in enumerate(y):
                fin, _ = finish_audio(yj, audio.sample_rate, render, rng=np.random.default_rng(j))
                write_wav(
                    out / f"x-{s + j:04d}.wav", fin, audio.sample_rate, bit_depth=render.bit_depth
                )
            stage["write"] += time.perf_counter() - t

    seconds = args.n * audio.duration
    cores = len(os.sched_getaffinity(0))
    print(
        f"generate -n {args.n}, preset drums ({audio.sample_rate} Hz, {audio.duration} s, "
        f"n_fft {audio.n_fft}, {render.iterations} Griffin-Lim iterations), {cores} cores, "
        f"load average {os.getloadavg()[0]:.2f}"
    )
    print(f"  whole command        {total:7.2f} s   {seconds / total:7.1f} s of audio per second")
    parts = sum(stage.values())
    for name, t in stage.items():
        print(
            f"  {name:<20} {t:7.2f} s   {seconds / t:7.1f} s of audio per second "
            f"({100 * t / parts:4.1f} % of the stages)"
        )
    print(
        f"  stages together      {parts:7.2f} s   (the rest of the command: model load, "
        f"nearest clips, manifest: {total - parts:+.2f} s)"
    )


if __name__ == "__main__":
    main()
