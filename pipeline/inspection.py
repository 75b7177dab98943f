"""``shotsmith inspect``: is a model safe to sample from?

Loads a model file, measures how well it reconstructs held-out clips (with the
bank it was trained on) and how healthy its latent space is
(:mod:`pipeline.latent_health`), and writes three figures plus ``health.json``
into one folder. Every figure carries a rating (good / fair / poor) and a
one-line verdict in plain words; the reconstruction thresholds are our own rule
of thumb, like those of the latent metrics.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from pipeline import __version__
from pipeline.errors import BankError, OutputError

LATENT_MAP_FILE = "latent-map.png"
RECONSTRUCTIONS_FILE = "reconstructions.png"
TRAINING_FILE = "training.png"
HEALTH_FILE = "health.json"
OUTPUT_FILES = (LATENT_MAP_FILE, RECONSTRUCTIONS_FILE, TRAINING_FILE, HEALTH_FILE)

N_PRIOR_SAMPLES = 2000  # prior draws for category balance, holes and the map
FIGURE_MIN_CLIPS = 3  # rows in reconstructions.png: one per category, at least this many
FIGURE_MAX_CLIPS = 6
PHASE_MAX_CLIPS = 24  # held-out clips put through Griffin-Lim (it dominates the run time)
DECODE_BATCH = 64
HEALTH_KEYS = ("reconstruction", "active_units", "prior_match", "category_balance", "holes")
_RATINGS = ("good", "fair", "poor")

# Rule of thumb (ours): spectral convergence of decoded magnitudes on held-out clips.
SC_GOOD_DB = -10.0  # about 30 % relative magnitude error
SC_FAIR_DB = -5.0  # about 56 %
# Rule of thumb (ours): descriptor distance of each held-out clip's reconstruction to its
# original, over the typical distance between two originals (pipeline.quality).
# At 1 a reconstruction lies as far from its original as the nearest other original
# does: like a sibling (another take of the same kind of sound), details lost. Beyond
# 1.5 it may no longer be recognisable as its kind.
PAIRED_GOOD = 0.5
PAIRED_FAIR = 1.5
PAIRED_MIN_CLIPS = 4  # fewer clips cannot give a typical distance between originals
# Spectral convergence that phase reconstruction adds to the decoded spectra's own
# (audio against originals, minus decoded magnitudes against originals).
PHASE_ADDED_GOOD_DB = 1.5
PHASE_ADDED_FAIR_DB = 4.0


def _verdict(rating: str, text: str) -> dict[str, str]:
    return {"rating": rating, "verdict": f"{rating}: {text}"}


def _worst(*ratings: str) -> str:
    return max(ratings, key=_RATINGS.index)


def _split_indices(split: Any, n: int) -> tuple[np.ndarray, str]:
    """The model file's validation indices, or every clip when there are none."""
    val = None
    if isinstance(split, dict):
        val = split.get("val", split.get("validation"))
    elif isinstance(split, (list, tuple)) and len(split) == 2:
        val = split[1]
    idx = np.asarray([] if val is None else val, dtype=np.int64).reshape(-1)
    idx = idx[(idx >= 0) & (idx < n)]
    if idx.size:
        return np.unique(idx), "validation split"
    return np.arange(n), "all clips (the model has no validation split)"


def figure_clips(indices: np.ndarray, categories: Sequence[str | None], *,
                 min_clips: int = FIGURE_MIN_CLIPS, max_clips: int = FIGURE_MAX_CLIPS) -> list[int]:
    """A handful of clip indices: one per category where possible, in category order."""
    chosen: list[int] = []
    seen: set[Any] = set()
    for i in sorted(indices, key=lambda i: (categories[i] is None, str(categories[i]), i)):
        if categories[i] not in seen and len(chosen) < max_clips:
            seen.add(categories[i])
            chosen.append(int(i))
    for i in indices:
        if len(chosen) >= min(min_clips, len(indices)):
            break
        if int(i) not in chosen:
            chosen.append(int(i))
    return chosen


def _spectral_errors(S_ref: np.ndarray, S_est: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    from pipeline.spectra import log_spectral_distance, spectral_convergence_db

    sc = spectral_convergence_db(S_ref, S_est)  # Arik et al. 2018, in dB as ltfat magnitudeerrdb
    lsd = log_spectral_distance(S_ref.astype(np.float64) ** 2, S_est.astype(np.float64) ** 2)
    return np.asarray(sc, np.float64).reshape(-1), np.asarray(lsd, np.float64).reshape(-1)


def _summary(sc: np.ndarray, lsd: np.ndarray) -> dict[str, Any]:
    return {"spectral_convergence_db": float(np.median(sc)),
            "log_spectral_distance_db": float(np.median(lsd)),
            "worst_spectral_convergence_db": float(np.max(sc)), "clips": int(len(sc))}


def _decoded_verdict(sc_db: float) -> dict[str, str]:
    if sc_db <= SC_GOOD_DB:
        return _verdict("good", f"held-out clips come back close to the originals "
                        f"(spectral convergence {_db(sc_db)} dB)")
    if sc_db <= SC_FAIR_DB:
        return _verdict("fair", f"held-out clips come back recognisable but blurred "
                        f"({_db(sc_db)} dB); more epochs or a larger latent can help")
    return _verdict("poor", f"held-out clips come back far from the originals ({_db(sc_db)} dB); "
                    "train longer, use a larger latent or a smaller beta")


def _paired_verdict(ratio: float, sc_db: float) -> dict[str, str]:
    """Rated by how far reconstructions sound from their originals (descriptor distance,
    paired), in units of the typical distance between two originals. Spectral convergence
    alone would call well-reconstructed noisy sounds poor: their fine structure is random."""
    text = (f"held-out clips reconstructed {ratio:.2f} of the typical distance between two "
            f"originals away from their own (descriptors; spectral convergence {_db(sc_db)} dB)")
    if ratio <= PAIRED_GOOD:
        return _verdict("good", f"{text}: close to the originals")
    if ratio <= PAIRED_FAIR:
        return _verdict("fair", f"{text}: recognisable, with detail lost; more epochs help")
    return _verdict("poor", f"{text}: far from the originals; train longer or on more clips")


def _phase_verdict(added_db: float, ceiling_db: float, iterations: int) -> dict[str, str]:
    text = (f"phase reconstruction ({iterations} Griffin-Lim iterations) adds {_db(added_db)} dB "
            f"of error; on the originals themselves it reaches {_db(ceiling_db)} dB")
    if added_db <= PHASE_ADDED_GOOD_DB:
        return _verdict("good", text)
    if added_db <= PHASE_ADDED_FAIR_DB:
        return _verdict("fair", f"{text}; more --iterations can help")
    return _verdict("poor", f"{text}; raise --iterations, or train longer so decoded spectra "
                    "are easier to turn into audio")


def _db(x: float) -> str:
    """``x`` to one decimal, without a negative zero."""
    return f"{x:.1f}".replace("-0.0", "0.0")


def _not_measured(reason: str) -> dict[str, Any]:
    return {"measured": False, "reason": reason}


def _open_matching_bank(bank_path: Path, mf) -> Any:
    from pipeline.bank import open_bank

    bank = open_bank(bank_path)
    if dataclasses.replace(bank.audio, spectra_dtype=mf.audio.spectra_dtype) != mf.audio:
        raise BankError(f"{bank_path}: made with other audio settings than the model "
                        f"{mf.path} (re-ingest with the model's preset)")
    return bank


def _phase_section(S_ref: np.ndarray, S_dec: np.ndarray, sc_dec: np.ndarray, audio, render,
                   seed: int) -> dict[str, Any]:
    """Decoded magnitudes -> fast Griffin-Lim -> audio, measured against the originals."""
    from pipeline.phase import reconstruct
    from pipeline.spectra import magnitude, pad_for_analysis

    def heard(S: np.ndarray) -> tuple[np.ndarray, np.ndarray]:  # the audio a user would get
        y, _ = reconstruct(S, audio, n_iter=render.iterations, momentum=render.momentum,
                           init=render.phase_init, seed=seed)
        return y, magnitude(pad_for_analysis(y, audio), n_fft=audio.n_fft,
                            hop_length=audio.hop_length).astype(np.float32)

    (y_dec, A_dec), (y_ref, A_ref) = heard(S_dec), heard(S_ref)
    sc_p, lsd_p = _spectral_errors(S_ref, A_dec)  # the audio against the originals
    # Griffin-Lim on the originals (the resynthesis ceiling), and how consistent the
    # decoded spectra are (how closely any audio can have them) for comparison
    sc_c, _ = _spectral_errors(S_ref, A_ref)
    sc_k, _ = _spectral_errors(S_dec, A_dec)
    added, ceiling = float(np.median(sc_p - sc_dec)), float(np.median(sc_c))
    return {"measured": True, **_summary(sc_p, lsd_p), "added_db": added,
            "paired_descriptor_ratio": _paired_ratio(y_ref, y_dec, audio.sample_rate),
            "ceiling_spectral_convergence_db": ceiling, "consistency_db": float(np.median(sc_k)),
            "iterations": int(render.iterations), "momentum": float(render.momentum),
            **_phase_verdict(added, ceiling, render.iterations)}


def _paired_ratio(y_ref: np.ndarray, y_dec: np.ndarray, sr: int) -> float:
    """Median descriptor distance (pipeline.quality) of each clip's reconstruction to its
    original, over the typical spacing of the originals. The originals are heard through
    the same phase reconstruction, so this measures the model, not Griffin-Lim."""
    from pipeline import quality

    X_ref, X_dec = quality.describe_many(y_ref, sr), quality.describe_many(y_dec, sr)
    scale = quality.fit_scale(X_ref)
    A, B = quality.apply_scale(X_ref, scale), quality.apply_scale(X_dec, scale)
    spacing = quality.typical_spacing(A)
    return float(np.median(quality.paired_distance_ratio(B, A, spacing)))


def _measure_reconstruction(mf, bank, idx: np.ndarray, source: str, rows: list[int],
                            rng: np.random.Generator, seed: int):
    """The ``reconstruction`` section and the figure's originals / reconstructions."""
    from pipeline.sounds import decode_for_render
    from pipeline.spectra import unit_to_magnitude

    audio = mf.audio
    out: dict[str, Any] = {"clips": int(len(idx)), "source": source}
    if bank is None:
        why = "no bank given: pass --bank with the bank the model was trained on"
        decoded = decode_for_render(mf, np.asarray(mf.mu, np.float32)[rows], mf.settings.render)
        out.update(decoded=_not_measured(why), phase=_not_measured(why),
                   rating="not measured", verdict=f"not measured: {why}")
        return out, None, decoded

    row_of = bank.clips.row
    names = list(mf.clip_names)
    present = np.array([i for i in idx if row_of(names[i]) is not None], dtype=np.int64)
    if present.size == 0:
        raise BankError(f"{bank.path}: none of the model's held-out clips are in this bank "
                        "(is it the bank the model was trained on?)")
    out["missing_from_bank"] = int(len(idx) - len(present))
    # by content: another bank whose clips share the names is not the same bank
    fingerprint = (getattr(mf, "bank", None) or {}).get("fingerprint")
    out["same_bank"] = None if fingerprint is None else fingerprint == bank.fingerprint()
    mu = np.asarray(mf.mu, np.float32)
    take = np.sort(rng.choice(len(present), size=min(PHASE_MAX_CLIPS, len(present)),
                              replace=False))
    wanted = set(rows)
    keep = set(take.tolist()) | {k for k, i in enumerate(present) if i in wanted}
    sc, lsd, kept = np.zeros(len(present)), np.zeros(len(present)), {}
    for a in range(0, len(present), DECODE_BATCH):  # in chunks: a large library stays small
        part = present[a : a + DECODE_BATCH]
        U_ref = np.stack([np.asarray(bank.spectra[row_of(names[i])], np.float32) for i in part])
        U_dec = decode_for_render(mf, mu[part], mf.settings.render)
        S_ref, S_dec = unit_to_magnitude(U_ref, audio), unit_to_magnitude(U_dec, audio)
        sc[a : a + len(part)], lsd[a : a + len(part)] = _spectral_errors(S_ref, S_dec)
        for j in range(len(part)):
            if a + j in keep:
                kept[a + j] = (U_ref[j], U_dec[j], S_ref[j], S_dec[j])
    dec = {"measured": True, **_summary(sc, lsd), **_decoded_verdict(float(np.median(sc)))}
    S_ref = np.stack([kept[k][2] for k in take])
    S_dec = np.stack([kept[k][3] for k in take])

    ph = _phase_section(S_ref, S_dec, sc[take], audio, mf.settings.render, seed)
    if len(take) >= PAIRED_MIN_CLIPS:  # a listener's measure rates the decoded clips
        dec |= _paired_verdict(ph["paired_descriptor_ratio"], dec["spectral_convergence_db"])
    rating = _worst(dec["rating"], ph["rating"])
    text = dec["verdict"].split(": ", 1)[1]
    if ph["rating"] != "good":
        text += "; " + ph["verdict"].split(": ", 1)[1]
    out.update(decoded=dec, phase=ph, **_verdict(rating, text))

    pos = {int(i): k for k, i in enumerate(present)}
    shown = [pos[i] for i in rows if i in pos]
    if not shown:
        return out, None, np.zeros((0, audio.n_bins, audio.n_frames), np.float32)
    return (out, np.stack([kept[k][0] for k in shown]), np.stack([kept[k][1] for k in shown]))


def _check_outputs(out_dir: Path, overwrite: bool) -> None:
    if out_dir.exists() and not out_dir.is_dir():
        raise OutputError(f"{out_dir}: exists and is not a folder")
    if not overwrite:
        for name in OUTPUT_FILES:
            if (out_dir / name).exists():
                raise OutputError(
                    f"{out_dir / name}: already exists (use --overwrite to replace it)"
                )


def inspect_model(
    model_path: Path,
    out_dir: Path,
    *,
    bank: Path | None = None,
    seed: int | None = None,
    overwrite: bool = False,
) -> dict[str, Any]:
    """Write the latent map, reconstructions, training curves and ``health.json``.

    Parameters
    ----------
    model_path : Path of a model file written by ``shotsmith train``
    out_dir : Path of the folder for the figures (created when missing)
    bank : Path of the bank the model was trained on; without it the reconstruction
        figures are not measured (the originals live in the bank)
    seed : int, optional. Seeds the prior samples and Griffin-Lim (default 0, so
        repeated runs agree)
    overwrite : bool. Replace existing output files; otherwise an existing one
        raises :class:`~pipeline.errors.OutputError`

    Returns
    -------
    health : dict, JSON-able; the content of ``health.json``
    """
    from pipeline import files, report
    from pipeline.latent_health import health_report
    from pipeline.modelfile import load_model_file
    from pipeline.outputs import refuse_library
    from pipeline.sampler import sample_mixture
    from pipeline.sounds import check_seed

    out_dir, seed = Path(out_dir), 0 if seed is None else check_seed(seed)
    _check_outputs(out_dir, overwrite)
    mf = load_model_file(Path(model_path))
    refuse_library(out_dir, option="--out", model=mf, banks=[] if bank is None else [bank])
    bank_obj = None if bank is None else _open_matching_bank(Path(bank), mf)
    try:  # only once the inputs are known to be good
        out_dir.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"{out_dir}: cannot create the folder ({files.reason(exc)})") from None
    files.remove_stale_temporaries(out_dir, OUTPUT_FILES)  # of a killed inspect

    mu = np.asarray(mf.mu, np.float64)
    logvar = None if mf.logvar is None else np.asarray(mf.logvar, np.float64)
    cats = list(mf.clip_categories)
    names = list(mf.clip_names)
    # holes and category balance are measured where generate samples: the fitted mixture
    prior = sample_mixture(mf.samplers()[0], N_PRIOR_SAMPLES, rng=seed)
    latent = health_report(mu, logvar, cats, samples=prior,
                           sampler="the mixture fitted to the codes (what generate uses)")

    idx, source = _split_indices(mf.split, len(mu))
    rows = figure_clips(idx, cats)
    recon, U_ref, U_dec = _measure_reconstruction(
        mf, bank_obj, idx, source, rows, np.random.default_rng(seed), seed)
    if bank_obj is not None:  # rows whose clip the bank lacks were dropped
        rows = [i for i in rows if bank_obj.clips.row(names[i]) is not None]

    model_name = Path(mf.path).name
    report.plot_latent_map(mu, cats, prior, out_dir / LATENT_MAP_FILE,
                           title=f"{model_name}: {len(mu)} clips, {mu.shape[1]}-D latent")
    report.plot_reconstructions(U_ref, U_dec, [names[i] for i in rows], mf.audio,
                                out_dir / RECONSTRUCTIONS_FILE)
    best = (getattr(mf, "best", None) or {}).get("epoch")
    report.plot_training(list(mf.history or []), out_dir / TRAINING_FILE,
                         best_epoch=best if isinstance(best, int) and best > 0 else None,
                         title=f"{model_name}: training, {len(mf.history or [])} epochs")

    health = {
        "tool": "shotsmith",
        "version": __version__,
        "model": {
            "path": str(mf.path),
            "sha256": mf.sha256,
            "latent_dim": int(mu.shape[1]),
            "clips": int(len(mu)),
            "categories": [str(c) for c in mf.categories],
            "epochs": len(mf.history or []),
        },
        "bank": None if bank_obj is None else str(bank_obj.path),
        "output": str(out_dir),
        "seed": seed,
        "prior_samples": N_PRIOR_SAMPLES,
        "reconstruction": recon,
        **latent,
        "figures": {"latent_map": LATENT_MAP_FILE, "reconstructions": RECONSTRUCTIONS_FILE,
                    "training": TRAINING_FILE},
        "figure_clips": [names[i] for i in rows],
    }
    files.write_json_atomic(out_dir / HEALTH_FILE, health)
    return health


def _figures(key: str, h: dict[str, Any]) -> str:
    if key == "reconstruction":
        d = h.get("decoded", {})
        if not d.get("measured"):
            return "not measured"
        s = (f"SC {_db(d['spectral_convergence_db'])} dB, "
             f"LSD {_db(d['log_spectral_distance_db'])} dB")
        p = h.get("phase", {})
        if p.get("measured"):
            s = (f"paired distance {p['paired_descriptor_ratio']:.2f}; " + s
                 + f"; audio SC {_db(p['spectral_convergence_db'])} dB")
        return s
    if key == "active_units":
        return f"{h['active']} of {h['total']}"
    if key == "prior_match":
        return f"|mean| {h['mean_norm']:.2f}, KL {h['kl_gaussian_to_prior']:.2f} nats"
    if key == "category_balance":
        return f"TV distance {h['total_variation']:.2f}"
    if key == "holes":
        return f"{h['share']:.1%} (normal: {h['expected_share']:.0%})"
    return ""


def format_health_table(health: dict[str, Any]) -> str:
    """The health figures as a plain-text table: figure, value, verdict (one line each)."""
    m = health.get("model", {})
    lines = [f"model {m.get('path')} (sha256 {str(m.get('sha256'))[:12]}): "
             f"{m.get('clips')} clips, {len(m.get('categories', []))} categories, "
             f"{m.get('latent_dim')}-D latent"]
    rows = [(key, _figures(key, health[key]), health[key].get("verdict", ""))
            for key in HEALTH_KEYS if key in health]
    w0 = max(len(r[0]) for r in rows)
    w1 = max(len(r[1]) for r in rows)
    lines.append(f"{'figure':<{w0}}  {'value':<{w1}}  verdict")
    lines += [f"{k:<{w0}}  {v:<{w1}}  {t}" for k, v, t in rows]
    figs = health.get("figures", {})
    if figs:
        where = health.get("output", ".")
        lines.append(f"written to {where}: " + ", ".join(figs.values()) + f", {HEALTH_FILE}")
    return "\n".join(lines)
