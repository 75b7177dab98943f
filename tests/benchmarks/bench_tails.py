"""Benchmark: where rendered one-shots end, what is left after, and the band a session rate keeps.

Real recorded hits (the quality benchmark's corpus, tests/benchmarks/corpus.py: General MIDI
drum kits rendered by fluidsynth), the ``drums`` preset (44.1 kHz, 1 s, 64 iterations):

* natural length: ``resynth`` records where each sound ends (``natural_length_s``,
  :func:`pipeline.finish.sound_end`: the 10 ms RMS envelope stays below -60 dB re its
  peak for the rest of the clip); the source clip, as the front end fits it, is measured
  the same way. Target: within 10 % of the source's length (so tails are not gated early).
* silence after the end: every sample of every written file after its natural length is
  digital zero (the count of files where one is not is printed).
* tail level: RMS 750-950 ms after the onset (first sample within 50 dB of the peak, the
  front end's onset rule) in dB re the file's sample peak, digital silence as -inf, for the
  sources, their resynthesis and ``generate`` output of a model trained on the corpus's
  training split, and the same generated codes rendered without ``render.gate_db`` (the
  gate on the decoder's faint bed of noise). Target: ``generate`` median below -90 dB.
* full band at a session rate: the hats (GM notes 42, 44, 46) resynthesized with
  ``--output-rate 48000``; the share of each file's energy above 11 kHz against the
  source's (44.1 kHz, as fitted by the front end). Target: within 3 dB for a bright hat
  (the brightest source), and the median over the hats is printed.

The model: ``--model PATH`` uses an existing model file (read only); otherwise one is
trained here on the corpus's drums training split with the drums preset and ``--epochs``
(a quick model: the tails come from rendering, which does not depend on how well it learned).

    python tests/benchmarks/bench_tails.py [--corpus DIR] [--model PATH | --epochs 20]
        [--max-clips N] [--generate 64] [--work DIR]
"""

from __future__ import annotations

import argparse
import dataclasses
import os
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import soundfile as sf

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(HERE.parents[1]))

import corpus  # noqa: E402

from pipeline import finish  # noqa: E402
from pipeline.config import load_settings  # noqa: E402
from pipeline.frontend import load_clip  # noqa: E402
from pipeline.manifest import load_manifest  # noqa: E402

ONSET_DB = -50.0  # the front end's onset rule (presets: onset_db)
TAIL_S = (0.75, 0.95)  # the window after the onset whose level is measured
HIGH_HZ = 11000.0


def tail_db(y: np.ndarray, sr: int) -> float:
    """RMS 750-950 ms after the onset in dB re the sample peak; -inf for digital silence
    (samples past the end of a short file count as silence)."""
    y = np.asarray(y, dtype=np.float64).reshape(-1)
    peak = np.max(np.abs(y))
    if peak == 0:
        return -np.inf
    onset = int(np.argmax(np.abs(y) >= peak * 10 ** (ONSET_DB / 20)))
    a, b = onset + int(TAIL_S[0] * sr), onset + int(TAIL_S[1] * sr)
    seg = np.zeros(b - a)
    part = y[a:b]
    seg[: len(part)] = part
    rms = np.sqrt(np.mean(seg**2))
    return 20 * np.log10(rms / peak) if rms > 0 else -np.inf


def high_share_db(y: np.ndarray, sr: int) -> float:
    """Share of the energy above 11 kHz, dB (periodogram of the whole clip)."""
    P = np.abs(np.fft.rfft(np.asarray(y, dtype=np.float64).reshape(-1))) ** 2
    f = np.fft.rfftfreq(len(np.asarray(y).reshape(-1)), 1.0 / sr)
    return 10 * np.log10(max(P[f > HIGH_HZ].sum(), 1e-30) / max(P.sum(), 1e-30))


def _levels(x) -> str:
    x = np.asarray(x, dtype=np.float64)
    finite = x[np.isfinite(x)]
    med = np.median(x)
    return (f"median {med:7.1f} dB, digital silence {np.mean(~np.isfinite(x)):4.0%}, "
            f"loudest {finite.max() if finite.size else -np.inf:6.1f} dB")


def _subset(root: Path, max_clips: int | None, folder: Path) -> list[Path]:
    """Links to the drums (both splits) in ``folder/<split>-<category>/``; evenly spaced
    when ``max_clips`` is given."""
    paths = sorted((root / "drums").glob("*/*/*"))
    if max_clips and len(paths) > max_clips:
        paths = paths[:: -(-len(paths) // max_clips)]
    for p in paths:
        dest = folder / f"{p.parent.parent.name}-{p.parent.name}" / p.name
        dest.parent.mkdir(parents=True, exist_ok=True)
        dest.symlink_to(p.resolve())
    return paths


def _written(out: Path) -> list[tuple[dict, np.ndarray, int]]:
    m = load_manifest(out)
    rows = []
    for it in m["items"]:
        y, sr = sf.read(out / it["file"], dtype="float64")
        rows.append((it, y, sr))
    return rows


def _silent_after_end(rows) -> int:
    """Files with a non-zero sample after their recorded natural length."""
    bad = 0
    for it, y, sr in rows:
        end = int(round(it["natural_length_s"] * sr))
        bad += bool(np.any(y[end:] != 0))
    return bad


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--corpus", type=Path, default=corpus.DEFAULT_OUT)
    ap.add_argument("--model", type=Path, default=None, help="an existing model file")
    ap.add_argument("--epochs", type=int, default=20, help="epochs of the quick model")
    ap.add_argument("--max-clips", type=int, default=None)
    ap.add_argument("--generate", type=int, default=64, help="sounds to generate")
    ap.add_argument("--work", type=Path, default=None, help="keep the outputs here")
    args = ap.parse_args()
    from pipeline.create import generate_sounds
    from pipeline.resynth import resynth_folder

    print(f"{os.cpu_count()} cores, load average {os.getloadavg()[0]:.2f} at start")
    try:
        root = corpus.build(args.corpus, log=lambda m: print(m, file=sys.stderr))
    except corpus.Missing as exc:
        sys.exit(f"bench_tails: install the Debian package {exc}")
    work = args.work or Path(tempfile.mkdtemp(prefix="shotsmith-tails-"))
    if work.exists():
        shutil.rmtree(work)
    work.mkdir(parents=True)
    settings = load_settings("drums")
    audio = settings.audio
    sr = audio.sample_rate
    src_dir = work / "hits"
    _subset(root, args.max_clips, src_dir)

    # the sources, fitted by the front end, measured as the renderer measures its output
    t0 = time.perf_counter()
    resynth_folder(src_dir, work / "resynth", settings, jobs=2)
    rows = _written(work / "resynth")
    print(f"\nresynth: {len(rows)} real hits, {settings.render.iterations} iterations, "
          f"{time.perf_counter() - t0:.0f} s")
    src_len, out_len, src_tail, out_tail = [], [], [], []
    for it, y, _ in rows:
        x = load_clip(src_dir / it["source"], audio)
        src_len.append(finish.sound_end(x, sr) / sr)
        out_len.append(it["natural_length_s"])
        src_tail.append(tail_db(x, sr))
        out_tail.append(tail_db(y, sr))
    src_len, out_len = np.array(src_len), np.array(out_len)
    rel = out_len / np.maximum(src_len, 1e-9) - 1.0
    within = np.mean(np.abs(rel) <= 0.10)
    print(f"  natural length: sources median {np.median(src_len):.3f} s, resynthesis "
          f"{np.median(out_len):.3f} s; resynthesis / source - 1: median {np.median(rel):+.1%}, "
          f"10th-90th percentile {np.percentile(rel, 10):+.1%} .. {np.percentile(rel, 90):+.1%}")
    print(f"  within 10 % of the source's length: {within:.0%} of the hits "
          f"(target: the median within 10 %: {'met' if abs(np.median(rel)) <= 0.10 else 'MISSED'}"
          f"; {np.mean(rel < -0.10):.0%} shorter, {np.mean(rel > 0.10):.0%} longer)")
    print(f"  tail level 750-950 ms after the onset, re peak: sources      {_levels(src_tail)}")
    print(f"  {'':51s}resynthesis  {_levels(out_tail)}")
    print(f"  files with sound after their natural length: {_silent_after_end(rows)} "
          f"of {len(rows)}")

    # the hats at a session rate
    hats = work / "hats"
    for p in src_dir.glob("*-hat/*"):
        dest = hats / p.parent.name / p.name
        dest.parent.mkdir(parents=True, exist_ok=True)
        dest.symlink_to(p.resolve())
    s48 = load_settings("drums", {"render": {"output_rate": 48000}})
    resynth_folder(hats, work / "hats-48k", s48, jobs=2)
    hat_rows = _written(work / "hats-48k")
    src_share, out_share = [], []
    for it, y, rate in hat_rows:
        assert rate == 48000, rate
        src_share.append(high_share_db(load_clip(hats / it["source"], audio), sr))
        out_share.append(high_share_db(y, rate))
    src_share, out_share = np.array(src_share), np.array(out_share)
    diff = out_share - src_share
    bright = int(np.argmax(src_share))
    print(f"\nhats resynthesized at 48 kHz (--output-rate 48000): {len(hat_rows)} files")
    print(f"  energy above 11 kHz, share of the whole: sources median {np.median(src_share):.1f} "
          f"dB, 48 kHz files {np.median(out_share):.1f} dB; difference median "
          f"{np.median(diff):+.2f} dB, largest |difference| {np.max(np.abs(diff)):.2f} dB")
    print(f"  the brightest hat ({hat_rows[bright][0]['source']}): source "
          f"{src_share[bright]:.1f} dB, 48 kHz file {out_share[bright]:.1f} dB, difference "
          f"{diff[bright]:+.2f} dB (target within 3 dB: "
          f"{'met' if abs(diff[bright]) <= 3 else 'MISSED'}); {np.mean(np.abs(diff) <= 3):.0%} "
          "of the hats within 3 dB")

    # generate from a model of the corpus
    model = args.model
    if model is None:
        from pipeline.ingest import ingest_folder
        from pipeline.train import train_model

        model = work / "model.pt"
        quick = load_settings("drums", {"train": {"epochs": args.epochs}})
        ingest_folder(root / "drums" / "train", work / "bank", quick, jobs=2)
        t0 = time.perf_counter()
        summary = train_model(work / "bank", model, quick, device="cpu")
        print(f"\nmodel: drums preset, {summary.epochs} epochs on the corpus's drums training "
              f"split in {time.perf_counter() - t0:.0f} s ({summary.stopped})")
    else:
        print(f"\nmodel: {model} (given)")
    generate_sounds(model, work / "generate", n=args.generate, seed=0)
    gen = _written(work / "generate")
    gen_tail = [tail_db(y, rate) for _, y, rate in gen]
    med = float(np.median(gen_tail))
    # the same codes without the gate on the decoder's faint bed (render.gate_db at the floor)
    ungated = dataclasses.replace(settings.render, gate_db=audio.db_floor)
    generate_sounds(model, work / "generate-ungated", n=args.generate, seed=0, render=ungated)
    off_tail = [tail_db(y, rate) for _, y, rate in _written(work / "generate-ungated")]
    print(f"generate: {len(gen)} sounds at {gen[0][2]} Hz")
    print(f"  tail level 750-950 ms after the onset, re peak: {_levels(gen_tail)} "
          f"(target median < -90 dB: {'met' if med < -90 else 'MISSED'})")
    print(f"  the same codes with render.gate_db off:          {_levels(off_tail)}")
    print(f"  natural length median {np.median([it['natural_length_s'] for it, _, _ in gen]):.3f}"
          f" s; files with sound after their natural length: {_silent_after_end(gen)} of "
          f"{len(gen)}")
    if args.work is None:
        shutil.rmtree(work)


if __name__ == "__main__":
    main()
