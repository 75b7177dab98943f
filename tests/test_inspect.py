"""shotsmith inspect: figures at fixed pixel sizes, health.json, the table, the CLI, and
that the KL term (beta) is what puts the codes on the prior."""

from __future__ import annotations

import json
from pathlib import Path

import matplotlib.image as mpimg
import numpy as np
import pytest
from typer.testing import CliRunner

from pipeline import report
from pipeline.bank import BankWriter
from pipeline.cli import app
from pipeline.config import load_settings
from pipeline.errors import BankError, OutputError
from pipeline.inspection import (
    HEALTH_KEYS,
    OUTPUT_FILES,
    _split_indices,
    figure_clips,
    format_health_table,
    inspect_model,
)
from pipeline.spectra import clip_to_unit

# ----------------------------------------------------------------- a synthesized bank


def _kick(t, rng):
    f = rng.uniform(45, 70) + rng.uniform(60, 140) * np.exp(-t * 40)
    return np.sin(2 * np.pi * np.cumsum(f) / 16000) * np.exp(-t * rng.uniform(6, 12))


def _hat(t, rng):
    n = np.diff(rng.standard_normal(t.size + 2), n=2)  # second difference: a steep high tilt
    return n / np.max(np.abs(n)) * np.exp(-t * rng.uniform(25, 45))


def _tone(t, rng):
    f0 = rng.uniform(300, 600)
    y = sum(np.sin(2 * np.pi * k * f0 * t) / k for k in range(1, 6))
    return y * np.exp(-t * rng.uniform(3, 6))


def _write_bank(path: Path, settings, per_category: int = 12, seed: int = 5) -> Path:
    audio = settings.audio
    rng = np.random.default_rng(seed)
    t = np.arange(audio.n_samples) / audio.sample_rate
    fade = np.minimum(1.0, np.minimum(t, t[-1] - t) / 0.005)  # 5 ms ramps: no edge clicks
    kinds = (("kick", _kick), ("hat", _hat), ("tone", _tone))
    writer = BankWriter(path, audio, per_category * len(kinds))
    clips = []
    for c, (cat, make) in enumerate(kinds):
        for i in range(per_category):
            y = make(t, rng) * fade
            y = 10 ** (audio.peak_db / 20) * y / np.max(np.abs(y))
            writer.put(c * per_category + i, clip_to_unit(y, audio))
            clips.append({"name": f"{cat}_{i:02d}", "path": f"{cat}/{cat}_{i:02d}.wav",
                          "category": cat, "sample_rate": audio.sample_rate, "channels": 1,
                          "duration": audio.duration, "peak_dbfs": audio.peak_db,
                          "size": 0, "mtime_ns": 0})
    writer.commit(clips, settings.to_dict(), {"accepted": len(clips), "skipped": []})
    return path


def _settings(beta: float = 1.0, epochs: int = 8, seed: int = 1, batch_size: int = 12,
              decoder_variance: str = "calibrated"):
    return load_settings("tiny", {
        "model": {"latent_dim": 4, "width": 32, "depth": 2},
        "train": {"epochs": epochs, "patience": epochs, "beta": beta, "kl_warmup_epochs": 2,
                  "batch_size": batch_size, "seed": seed, "decoder_variance": decoder_variance},
        "render": {"iterations": 8},
    })


@pytest.fixture(scope="module")
def trained(tmp_path_factory) -> tuple[Path, Path]:
    from pipeline.train import train_model

    work = tmp_path_factory.mktemp("inspect")
    settings = _settings()
    bank = _write_bank(work / "bank", settings)
    train_model(bank, work / "model.pt", settings)
    return work / "model.pt", bank


@pytest.fixture(scope="module")
def inspected(trained, tmp_path_factory) -> tuple[Path, dict]:
    model, bank = trained
    out = tmp_path_factory.mktemp("report") / "inspect"
    return out, inspect_model(model, out, bank=bank, seed=3)


def _pixels(path: Path) -> tuple[int, int]:
    img = mpimg.imread(path)  # matplotlib reads PNG natively: (rows, cols, channels)
    return img.shape[1], img.shape[0]


# ----------------------------------------------------------------- figures on plain arrays


@pytest.mark.parametrize("dim", [1, 2, 6])
def test_latent_map_has_fixed_size(tmp_path, dim):
    rng = np.random.default_rng(dim)
    mu = rng.normal(size=(30, dim))
    cats = ["a"] * 10 + ["b"] * 15 + [None] * 5
    path = report.plot_latent_map(mu, cats, rng.normal(size=(200, dim)), tmp_path / "m.png")
    assert path.stat().st_size > 5000
    assert _pixels(path) == report.LATENT_MAP_SIZE
    assert not list(tmp_path.glob(".*tmp*"))


@pytest.mark.parametrize("k, with_originals", [(1, True), (4, True), (2, False)])
def test_reconstructions_have_fixed_size(tmp_path, k, with_originals):
    audio = load_settings("tiny").audio
    rng = np.random.default_rng(k)
    O = rng.random((k, audio.n_bins, audio.n_frames)).astype(np.float32)  # noqa: E741
    R = np.clip(O + rng.normal(0, 0.05, O.shape), 0, 1)
    path = report.plot_reconstructions(O if with_originals else None, R, list("abcd")[:k],
                                       audio, tmp_path / "r.png")
    assert path.stat().st_size > 5000
    assert _pixels(path) == report.reconstructions_size(k)


def test_training_figure_has_fixed_size_even_when_empty(tmp_path):
    hist = [{"epoch": e, "train_loss": 9 / e, "val_loss": 10 / e, "train_recon": 8 / e,
             "val_recon": 9 / e, "train_kl": 0.1 * e, "val_kl": 0.1 * e, "kl_weight": 1.0}
            for e in range(1, 8)]
    for name, h in (("full.png", hist), ("empty.png", [])):
        path = report.plot_training(h, tmp_path / name)
        assert _pixels(path) == report.TRAINING_SIZE


def test_pca_axes_match_covariance_eigenvectors():
    # PCA directions are the eigenvectors of the sample covariance (Pearson 1901; Jolliffe,
    # "Principal Component Analysis", 2002, ch. 1); explained share = eigenvalue / trace.
    rng = np.random.default_rng(0)
    X = rng.normal(size=(500, 5)) * np.array([5.0, 2.0, 1.0, 0.5, 0.1]) + 3.0
    X = X @ np.linalg.qr(rng.normal(size=(5, 5)))[0]
    comps, explained = report.pca_axes(X, 2)
    w, v = np.linalg.eigh(np.cov(X.T))
    order = np.argsort(w)[::-1][:2]
    for i, j in enumerate(order):
        assert abs(abs(comps[i] @ v[:, j]) - 1.0) < 1e-9
    assert np.allclose(explained, w[order] / w.sum())
    assert np.allclose(comps @ comps.T, np.eye(2))


def test_figure_clips_take_one_per_category_first():
    cats = ["kick", "kick", "hat", "kick", "tone", None, "hat"]
    idx = np.array([0, 1, 2, 3, 4, 5, 6])
    rows = figure_clips(idx, cats)
    assert sorted(cats[i] or "" for i in rows) == ["", "hat", "kick", "tone"]
    assert figure_clips(np.array([0, 1, 3]), cats) == [0, 1, 3]  # one category: fill to three
    assert len(figure_clips(idx, [str(i) for i in range(7)])) == 6  # capped


# ----------------------------------------------------------------- inspect on a trained model


def test_inspect_writes_figures_of_the_expected_size(inspected):
    out, health = inspected
    for name in OUTPUT_FILES:
        assert (out / name).stat().st_size > 1000, name
    assert _pixels(out / "latent-map.png") == report.LATENT_MAP_SIZE
    assert _pixels(out / "training.png") == report.TRAINING_SIZE
    k = len(health["figure_clips"])
    assert _pixels(out / "reconstructions.png") == report.reconstructions_size(k)
    # one held-out clip per category where the validation split has it
    assert k >= min(3, health["reconstruction"]["clips"])


def test_health_json_has_every_key(inspected, trained):
    out, health = inspected
    on_disk = json.loads((out / "health.json").read_text())
    assert on_disk == health
    for key in HEALTH_KEYS:
        assert key in on_disk and on_disk[key]["verdict"].startswith(on_disk[key]["rating"])
    m = on_disk["model"]
    assert {"path", "sha256", "latent_dim", "clips", "categories"} <= set(m)
    assert (m["latent_dim"], m["clips"], m["categories"]) == (4, 36, ["hat", "kick", "tone"])
    assert len(m["sha256"]) == 64
    assert {"active", "total"} <= set(on_disk["active_units"])
    assert {"mean_norm", "kl_gaussian_to_prior"} <= set(on_disk["prior_match"])
    assert {"shares", "total_variation"} <= set(on_disk["category_balance"])
    assert {"share", "expected_share"} <= set(on_disk["holes"])


def test_reconstruction_is_measured_with_the_bank(inspected):
    _, health = inspected
    rec = health["reconstruction"]
    assert rec["source"] == "validation split"
    assert rec["same_bank"] is True and rec["missing_from_bank"] == 0
    dec, ph = rec["decoded"], rec["phase"]
    assert dec["measured"] and ph["measured"]
    for part in (dec, ph):
        assert np.isfinite(part["spectral_convergence_db"])
        assert part["log_spectral_distance_db"] > 0
    # audio after Griffin-Lim carries the decoder's error and the phase error, and
    # is no closer to the originals than Griffin-Lim on the originals themselves
    assert ph["spectral_convergence_db"] >= ph["ceiling_spectral_convergence_db"] - 0.5
    assert np.isfinite(ph["consistency_db"]) and ph["iterations"] == 8


def test_reconstruction_metrics_match_a_direct_computation(trained, inspected):
    from pipeline.bank import open_bank
    from pipeline.modelfile import load_model_file
    from pipeline.spectra import unit_to_magnitude

    model, bank_path = trained
    mf, bank = load_model_file(model), open_bank(bank_path)
    val = mf.split["val"]
    S = unit_to_magnitude(np.asarray(bank.spectra[val], np.float32), mf.audio)
    S_hat = unit_to_magnitude(mf.decode(mf.mu[val]), mf.audio)
    # spectral convergence, Arik et al. 2018: ||S - S^||_F / ||S||_F, in dB
    sc = 20 * np.log10(np.linalg.norm(S - S_hat, axis=(1, 2)) / np.linalg.norm(S, axis=(1, 2)))
    got = inspected[1]["reconstruction"]["decoded"]
    assert got["clips"] == len(val)
    assert got["spectral_convergence_db"] == pytest.approx(float(np.median(sc)), abs=1e-3)


def test_inspect_without_bank_says_audio_not_measured(trained, tmp_path):
    model, _ = trained
    health = inspect_model(model, tmp_path / "nobank", seed=3)
    rec = health["reconstruction"]
    assert rec["phase"]["measured"] is False and "--bank" in rec["phase"]["reason"]
    assert rec["decoded"]["measured"] is False
    assert rec["verdict"].startswith("not measured")
    table = format_health_table(health)
    assert "not measured" in table
    assert _pixels(tmp_path / "nobank" / "reconstructions.png") == report.reconstructions_size(
        len(health["figure_clips"]))


def test_same_seed_gives_the_same_health(trained, inspected, tmp_path):
    model, bank = trained
    again = inspect_model(model, tmp_path / "again", bank=bank, seed=3)
    first = dict(inspected[1])
    first.pop("output"), again.pop("output")
    assert again == first


def test_existing_outputs_are_not_overwritten(trained, tmp_path):
    model, _ = trained
    out = tmp_path / "out"
    out.mkdir()
    (out / "health.json").write_text("mine")
    with pytest.raises(OutputError, match=r"health\.json: already exists"):
        inspect_model(model, out)
    assert (out / "health.json").read_text() == "mine"
    assert sorted(p.name for p in out.iterdir()) == ["health.json"]
    inspect_model(model, out, overwrite=True)
    assert json.loads((out / "health.json").read_text())["model"]["clips"] == 36
    assert not list(out.glob(".*tmp*"))


def test_bank_with_other_audio_settings_is_refused(trained, tmp_path):
    model, _ = trained
    other = load_settings("tiny", {"audio": {"duration": 0.25}})
    bank = _write_bank(tmp_path / "other", other, per_category=2)
    with pytest.raises(BankError, match="other audio settings"):
        inspect_model(model, tmp_path / "out", bank=bank)
    assert not (tmp_path / "out").exists()  # nothing is created for a run that cannot go on


def test_a_model_without_validation_split_uses_every_clip():
    idx, source = _split_indices({"train": np.arange(5), "val": np.zeros(0, np.int64)}, 5)
    assert idx.tolist() == [0, 1, 2, 3, 4] and source.startswith("all clips")
    idx, source = _split_indices({"train": np.arange(3), "val": np.array([4, 3])}, 5)
    assert idx.tolist() == [3, 4] and source == "validation split"


@pytest.mark.slow
def test_cli_prints_the_table_and_json(trained, tmp_path):
    model, bank = trained
    runner = CliRunner()
    res = runner.invoke(app, ["inspect", str(model), "--out", str(tmp_path / "a"),
                              "--bank", str(bank), "--seed", "3"])
    assert res.exit_code == 0, res.output
    for key in HEALTH_KEYS:
        assert key in res.output
    assert "verdict" in res.output and "latent-map.png" in res.output
    res = runner.invoke(app, ["inspect", str(model), "--out", str(tmp_path / "b"), "--json"])
    assert res.exit_code == 0, res.output
    data = json.loads(res.stdout)
    assert set(HEALTH_KEYS) <= set(data)
    res = runner.invoke(app, ["inspect", str(model), "--out", str(tmp_path / "b")])
    assert res.exit_code == 1 and "already exists" in res.output


# ----------------------------------------------------------------- what beta does


@pytest.mark.slow
def test_plain_autoencoder_matches_the_prior_worse_than_a_vae(tmp_path):
    # Kingma & Welling 2014: the KL term pulls the aggregate posterior toward N(0, I);
    # with beta = 0 (a plain autoencoder) nothing does, so the codes drift off the prior.
    from pipeline.latent_health import prior_match
    from pipeline.modelfile import load_model_file
    from pipeline.train import train_model

    bank = _write_bank(tmp_path / "bank", _settings(), per_category=12, seed=9)
    fit = {}
    for beta in (0.0, 1.0):
        # A fixed decoder variance keeps the reconstruction term's weight known, so beta
        # alone sets the pull toward the prior (a calibrated variance sharpens the
        # reconstruction term as the fit improves and outweighs the KL on 36 clips).
        settings = _settings(beta=beta, epochs=40, seed=4, batch_size=4, decoder_variance="fixed")
        train_model(bank, tmp_path / f"b{beta}.pt", settings)
        mf = load_model_file(tmp_path / f"b{beta}.pt")
        fit[beta] = prior_match(mf.mu, mf.logvar)
    kl = {b: f["kl_gaussian_to_prior"] for b, f in fit.items()}
    # measured here with training seeds 2, 4, 7: 20-24 nats (beta 0) against 1.8-3.9 (beta 1)
    assert kl[0.0] > 3 * kl[1.0] and kl[0.0] - kl[1.0] > 5.0, kl
