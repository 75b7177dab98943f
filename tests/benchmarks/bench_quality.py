"""Sound quality on real recorded one-shots that no one here made.

    python tests/benchmarks/bench_quality.py [--library drums|strums] [--preset drums]
        [--set train.epochs=80 --set model.width=192 ...] [--tag NAME] [--seed 0]

The corpus (tests/benchmarks/corpus.py: General MIDI drum kits rendered with fluidsynth
from Debian's SoundFonts, and Debian's guitar-strum one-shots) is split 80/20 by group.
The training split goes through the same functions the CLI calls (``ingest_folder``,
``train_model``, ``generate_sounds``, ``resynth_folder``) with a fixed seed; every
figure is then computed from the WAV files written, at full length:

- held-out reconstruction: spectral convergence (Arik et al. 2018) and log-spectral
  distance of the decoded magnitudes against the true ones, the same on training clips
  (does the model fit at all?), and the descriptor Fréchet distance of the rendered
  reconstructions;
- the descriptor Fréchet distance (pipeline.quality; Dowson & Landau 1982, Heusel et
  al. 2017) of ``generate`` with each sampler, against the held-out real sounds;
- every distance as a ratio to the floor measured in the same run: the real training
  split against the held-out set. Every set is subsampled to the held-out set's size
  (median of 10 draws), since the distance is biased by set size;
- ``--near`` recognition: a 5-nearest-neighbour classifier on the real training clips'
  descriptors labels the outputs; the share recognised as the category asked for, as a
  ratio to the held-out real sounds' own recognition;
- the copy check: median descriptor distance of outputs to their nearest training
  sound, over the same figure for the held-out real sounds (below about 0.5: copies);
- resynthesis of the held-out sounds (true magnitudes, our phase reconstruction): the
  ceiling no model can pass, and training time.

The real sets are read through the front end at 44.1 kHz whatever the preset, so a
model that loses the top octave is measured as such. Results print as a table and
one JSON line (also written to ``runs/<tag>/quality.json`` in the cache folder).
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

import numpy as np
import soundfile as sf

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

HERE = Path(__file__).resolve().parent
sys.path[:0] = [str(HERE.parents[1]), str(HERE)]

import corpus  # noqa: E402

from pipeline import quality  # noqa: E402
from pipeline.config import AudioSpec, load_settings  # noqa: E402
from pipeline.frontend import load_clip  # noqa: E402
from pipeline.manifest import load_manifest  # noqa: E402
from pipeline.sounds import decode_for_render  # noqa: E402
from pipeline.spectra import (  # noqa: E402
    clip_to_unit,
    log_spectral_distance,
    spectral_convergence_db,
    unit_to_magnitude,
)

REAL_SR = 44100


def _overrides(pairs: list[str]) -> dict[str, dict]:
    out: dict[str, dict] = {}
    for pair in pairs:
        key, _, value = pair.partition("=")
        table, _, name = key.partition(".")
        out.setdefault(table, {})[name] = tomllib.loads(f"v = {value}")["v"]
    return out


def _files(folder: Path) -> tuple[list[Path], list[str]]:
    paths = sorted(p for p in folder.rglob("*") if p.is_file() or p.is_symlink())
    return paths, [p.relative_to(folder).parts[0] for p in paths]


def _real_spec(audio: AudioSpec) -> AudioSpec:
    """The preset's front end at full band, for the real reference sets."""
    return AudioSpec(**{**audio.__dict__, "sample_rate": REAL_SR, "n_fft": 2048,
                        "hop_length": 512})


def _wavs(folder: Path) -> tuple[list[np.ndarray], int, list[dict]]:
    manifest = load_manifest(folder)
    ys, srs = [], set()
    for item in manifest["items"]:
        y, sr = sf.read(folder / item["file"], dtype="float64")
        ys.append(y)
        srs.add(sr)
    assert len(srs) == 1, srs
    return ys, srs.pop(), manifest["items"]


def _render_codes(mf, Z: np.ndarray, out: Path, render) -> list[np.ndarray]:
    """Decode codes and render them as the commands do; the written waveforms."""
    from pipeline.render import render_spectra

    items = [{"stem": f"recon-{i:04d}", "kind": "reconstruction"} for i in range(len(Z))]
    batches = ((decode_for_render(mf, Z[s : s + 32], render), items[s : s + 32])
               for s in range(0, len(Z), 32))
    render_spectra(batches, out, mf.audio, render, seed=1)
    return _wavs(out)[0]


def _spectral(mf, U: np.ndarray) -> tuple[float, float]:
    """Median SC (dB) and LSD (dB) of decoded posterior means against ``U``."""
    mu, _ = mf.encode(U)
    U_hat = mf.decode(mu)
    S, S_hat = unit_to_magnitude(U, mf.audio), unit_to_magnitude(U_hat, mf.audio)
    sc = spectral_convergence_db(S.astype(np.float64), S_hat.astype(np.float64))
    lsd = log_spectral_distance(S.astype(np.float64) ** 2, S_hat.astype(np.float64) ** 2)
    return float(np.median(sc)), float(np.median(lsd))


def run(args) -> dict:
    from pipeline.create import generate_sounds
    from pipeline.ingest import ingest_folder
    from pipeline.modelfile import load_model_file
    from pipeline.resynth import resynth_folder
    from pipeline.train import train_model

    root = corpus.build(log=lambda m: print(m, file=sys.stderr))
    lib = root / args.library
    work = root / "runs" / args.tag
    import shutil

    if work.exists() and not args.reuse:
        shutil.rmtree(work)
    work.mkdir(parents=True, exist_ok=True)
    for old in work.glob("*"):  # rendered sets of an earlier evaluation
        if old.is_dir() and old.name not in ("bank",):
            shutil.rmtree(old)
    overrides = _overrides(args.set)
    overrides.setdefault("train", {}).setdefault("seed", args.seed)
    settings = load_settings(args.preset, overrides)
    log = lambda m: print(f"[{time.strftime('%H:%M:%S')}] {m}", file=sys.stderr)  # noqa: E731

    # real reference sets, full band
    train_paths, train_cats = _files(lib / "train")
    held_paths, held_cats = _files(lib / "heldout")
    real = _real_spec(settings.audio)
    X_train = quality.describe_many([load_clip(p, real) for p in train_paths], REAL_SR)
    X_held = quality.describe_many([load_clip(p, real) for p in held_paths], REAL_SR)
    scale = quality.fit_scale(X_train)
    T, H = quality.apply_scale(X_train, scale), quality.apply_scale(X_held, scale)
    n = len(H)
    log(f"{args.library}: {len(T)} training and {n} held-out real sounds")

    def fd(X):
        return quality.subsampled_frechet(X, H, size=n, draws=10, rng=0)

    floor = fd(T)
    held_pred = quality.knn_classify(T, train_cats, H, k=5)
    held_recog = float(np.mean([p == c for p, c in zip(held_pred, held_cats)]))
    held_per_cat = {c: float(np.mean([p == c for p, h in zip(held_pred, held_cats) if h == c]))
                    for c in sorted(set(held_cats))}

    # train with the CLI's code path
    bank, model = work / "bank", work / "model.pt"
    if args.reuse and model.is_file():
        trained = json.loads((work / "training.json").read_text())
    else:
        ingest_folder(lib / "train", bank, settings, jobs=2)
        t0 = time.perf_counter()
        summary = train_model(bank, model, settings, device="cpu")
        trained = {"epochs": summary.epochs, "stopped": summary.stopped,
                   "seconds": time.perf_counter() - t0,
                   "clips_per_second": summary.train_clips_per_second}
        (work / "training.json").write_text(json.dumps(trained))
    train_s = trained["seconds"]
    log(f"trained {trained['epochs']} epochs in {train_s:.0f} s ({trained['stopped']}), "
        f"{trained['clips_per_second']:.0f} clips/s of steps")
    mf = load_model_file(model)
    if args.reuse and hasattr(mf, "stored_samplers"):
        mf.stored_samplers = None  # fitted again by today's code, so runs compare alike
        import torch

        from pipeline.modelfile import save_atomic  # generate_sounds loads the file itself

        payload = torch.load(model, weights_only=True)
        payload["sampler"] = None
        save_atomic(payload, model)
    audio, render = mf.audio, mf.settings.render

    def describe(ys, sr):
        return quality.apply_scale(quality.describe_many(ys, sr), scale)

    # reconstruction: spectra, then rendered audio
    U_held = np.stack([clip_to_unit(load_clip(p, audio), audio) for p in held_paths])
    U_train = np.stack([clip_to_unit(load_clip(p, audio), audio) for p in train_paths])
    sc_held, lsd_held = _spectral(mf, U_held)
    sc_train, lsd_train = _spectral(mf, U_train)
    mu_held, _ = mf.encode(U_held)
    R = describe(_render_codes(mf, mu_held, work / "recon", render), audio.sample_rate)
    recon_fd = quality.frechet_distance(R, H)
    # in units of how far a new real sound lies from its nearest training sound
    spacing = quality.typical_spacing(T, H)
    recon_pair = float(np.median(quality.paired_distance_ratio(R, H, spacing)))

    # resynthesis ceiling
    resynth_folder(lib / "heldout", work / "resynth", settings)
    ys, sr, _ = _wavs(work / "resynth")
    S_resynth = describe(ys, sr)
    resynth_fd = quality.frechet_distance(S_resynth, H)
    sets = {"train": T, "heldout": H, "recon": R, "resynth": S_resynth}

    # generate, with every sampler it offers
    results: dict = {}
    samplers = {"default": {}}
    import inspect as _inspect

    if "prior" in _inspect.signature(generate_sounds).parameters:
        samplers["normal"] = {"prior": "normal"}
    for name, extra in samplers.items():
        generate_sounds(model, work / f"generate-{name}", n=2 * n, seed=7, **extra)
        G = describe(*_wavs(work / f"generate-{name}")[:2])
        sets[f"generate_{name}"] = G
        g_pred = quality.knn_classify(T, train_cats, G, k=5)
        results[f"generate_{name}"] = {
            "fd": fd(G), "copy_ratio": quality.copy_ratio(G, T, H),
            "category_share": {c: g_pred.count(c) / len(g_pred) for c in sorted(set(train_cats))},
        }
    log("generated")

    # --near recognition
    per_cat = {}
    for cat in sorted(set(train_cats)):
        out = work / f"near-{cat}"
        generate_sounds(model, out, n=24, near=cat, seed=11)
        G = describe(*_wavs(out)[:2])
        pred = quality.knn_classify(T, train_cats, G, k=5)
        per_cat[cat] = float(np.mean([p == cat for p in pred]))
        results.setdefault("near_copy", []).append(quality.copy_ratio(G, T, H))
    near_recog = float(np.mean(list(per_cat.values())))

    report = {
        "library": args.library, "preset": args.preset, "overrides": overrides,
        "tag": args.tag, "n_train": len(T), "n_heldout": n,
        "sample_rate": audio.sample_rate, "epochs": trained["epochs"],
        "stopped": trained["stopped"], "train_seconds": round(train_s, 1),
        "train_clips_per_second": round(trained["clips_per_second"], 1),
        "floor_fd": floor, "resynth_fd": resynth_fd,
        "recon_sc_db_heldout": sc_held, "recon_sc_db_train": sc_train,
        "recon_lsd_db_heldout": lsd_held, "recon_lsd_db_train": lsd_train,
        "recon_fd": recon_fd, "recon_paired_ratio": recon_pair,
        "heldout_recognition": held_recog, "heldout_recognition_per_category": held_per_cat,
        "near_recognition": per_cat,
        "near_recognition_mean": near_recog,
        "near_copy_ratio": float(np.median(results.pop("near_copy"))),
        **results,
    }
    (work / "quality.json").write_text(json.dumps(report, indent=1))
    np.savez(work / "descriptors.npz", **sets)  # scaled descriptors, for a closer look
    return report


def print_report(r: dict) -> None:
    floor = r["floor_fd"]
    print(f"\n{r['library']} ({r['n_train']} train / {r['n_heldout']} held out), preset "
          f"{r['preset']} {r['overrides']}, {r['sample_rate']} Hz, tag {r['tag']}")
    print(f"training: {r['epochs']} epochs ({r['stopped']}) in {r['train_seconds']:.0f} s, "
          f"{r['train_clips_per_second']:.0f} clips/s of steps")
    print(f"{'measure':44s} {'value':>9s} {'x floor':>8s}")
    rows = [("floor: real training split vs held-out (FD)", floor),
            ("resynthesis of held-out (FD)", r["resynth_fd"]),
            ("reconstruction of held-out (FD)", r["recon_fd"])]
    rows += [(f"{k.replace('_', ' ')} (FD)", v["fd"]) for k, v in r.items()
             if k.startswith("generate_")]
    for label, v in rows:
        print(f"{label:44s} {v:9.2f} {v / floor:8.2f}")
    print(f"{'reconstruction SC, training clips (dB)':44s} {r['recon_sc_db_train']:9.2f}")
    print(f"{'reconstruction SC, held-out clips (dB)':44s} {r['recon_sc_db_heldout']:9.2f}")
    print(f"{'reconstruction LSD, held-out clips (dB)':44s} {r['recon_lsd_db_heldout']:9.2f}")
    print(f"{'reconstruction paired distance ratio':44s} {r['recon_paired_ratio']:9.2f}")
    hr = r["heldout_recognition"]
    print(f"{'held-out real recognition (5-NN)':44s} {hr:9.2f}")
    print(f"{'--near recognition (mean over categories)':44s} {r['near_recognition_mean']:9.2f} "
          f"{r['near_recognition_mean'] / hr:8.2f}")
    print("  per category: " + ", ".join(f"{k} {v:.2f}" for k, v in r["near_recognition"].items()))
    print("  real held-out per category: " + ", ".join(
        f"{k} {v:.2f}" for k, v in r["heldout_recognition_per_category"].items()))
    for k, v in r.items():
        if k.startswith("generate_"):
            print(f"{k + ' copy ratio':44s} {v['copy_ratio']:9.2f}")
            print("  category share: " + ", ".join(f"{c} {s:.2f}"
                                                   for c, s in v["category_share"].items()))
    print(f"{'--near copy ratio (median over categories)':44s} {r['near_copy_ratio']:9.2f}")
    print(json.dumps(r))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--library", choices=("drums", "strums"), default="drums")
    ap.add_argument("--preset", default="drums")
    ap.add_argument("--set", action="append", default=[], metavar="TABLE.KEY=VALUE",
                    help="a settings override, TOML value syntax (repeatable)")
    ap.add_argument("--tag", default="default")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--reuse", action="store_true",
                    help="evaluate the model this tag trained before, without training again")
    args = ap.parse_args()
    try:
        print_report(run(args))
    except corpus.Missing as exc:
        print(f"bench_quality: skipped: install the Debian package {exc} "
              f"(apt-get install -y {exc})")


if __name__ == "__main__":
    main()
