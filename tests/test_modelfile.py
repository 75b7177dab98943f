"""The model file: contents, safe loading, decode/encode, one-line errors."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import torch
from synthbank import small_settings

from pipeline.bank import open_bank
from pipeline.errors import ModelFileError, ParameterError
from pipeline.modelfile import (
    FORMAT_VERSION,
    MODEL_KEYS,
    load_model_file,
    remove_stale_temporaries,
    save_atomic,
)
from pipeline.train import checkpoint_path


@pytest.fixture(scope="module")
def trained(small_model) -> tuple[Path, Path]:
    return small_model  # conftest: three epochs on a shared bank of 36 clips


def payload(path: Path) -> dict:
    return torch.load(path, weights_only=True)


@pytest.mark.slow
def test_model_file_loads_with_weights_only_in_a_fresh_process(trained):
    model, _ = trained
    code = (
        "import sys, torch\n"
        "p = torch.load(sys.argv[1], weights_only=True)\n"
        "assert p['tool'] == 'shotsmith' and p['kind'] == 'model', p.keys()\n"
        "print(sorted(p), p['mu'].shape[0])\n"
    )
    out = subprocess.run([sys.executable, "-c", code, str(model)], capture_output=True,
                         text=True, check=True, env={**os.environ, "PYTHONPATH": ""},
                         cwd=model.parent)
    assert out.stdout.split()[-1] == "36"
    assert all(k in out.stdout for k in MODEL_KEYS)


def test_model_file_holds_settings_history_clips_codes_and_split(trained):
    model, bank_dir = trained
    mf, bank = load_model_file(model), open_bank(bank_dir)
    assert mf.settings.model == small_settings().model
    assert mf.settings.audio == bank.audio == mf.audio
    assert mf.settings.to_dict()["train"]["epochs"] == 3
    assert mf.clip_names == bank.names
    assert mf.clip_categories == [c["category"] for c in bank.clips]
    assert mf.categories == ["one", "three", "two"]
    assert mf.mu.shape == mf.logvar.shape == (36, 8) and mf.mu.dtype == np.float32
    train, val = mf.split["train"], mf.split["val"]
    assert np.array_equal(np.sort(np.concatenate([train, val])), np.arange(36))
    assert len(mf.history) == 3
    assert {"epoch", "train_loss", "val_loss", "val_recon", "val_kl", "lr", "seconds"} <= set(
        mf.history[0])
    assert mf.best["epoch"] in (1, 2, 3)
    assert mf.best["val_loss"] == min(h["val_loss"] for h in mf.history)
    assert len(mf.sha256) == 64
    p = payload(model)
    assert p["format"] == FORMAT_VERSION and p["bank"]["n_clips"] == 36
    assert not checkpoint_path(model).exists()


def test_stored_codes_are_the_kept_weights_encoding_of_the_bank(trained):
    model, bank_dir = trained
    mf = load_model_file(model)
    U = np.asarray(open_bank(bank_dir).spectra, dtype=np.float32)
    mu, logvar = mf.encode(U, batch_size=7)
    np.testing.assert_allclose(mu, mf.mu, atol=1e-5)
    np.testing.assert_allclose(logvar, mf.logvar, atol=1e-5)


def test_decode_is_batched_deterministic_and_in_unit_range(trained):
    mf = load_model_file(trained[0])
    z = np.random.default_rng(0).normal(size=(10, 8)).astype(np.float32) * 3
    a, b = mf.decode(z, batch_size=3), mf.decode(z)
    assert a.shape == (10, mf.audio.n_bins, mf.audio.n_frames) and a.dtype == np.float32
    np.testing.assert_allclose(a, b, atol=1e-6)
    assert a.min() >= 0 and a.max() <= 1
    with pytest.raises(ParameterError, match=r"shape \(B, 8\)"):
        mf.decode(np.zeros((2, 3)))
    with pytest.raises(ParameterError, match="shape"):
        mf.encode(np.zeros((2, 5, 5)))


def test_a_training_checkpoint_is_not_taken_for_a_model(trained, tmp_path):
    _, bank = trained
    ckpt = checkpoint_path(tmp_path / "m.pt")
    save_atomic({"format": FORMAT_VERSION, "tool": "shotsmith", "kind": "checkpoint"}, ckpt)
    with pytest.raises(ModelFileError, match="is a training checkpoint, not a model file"):
        load_model_file(ckpt)


# ------------------------------------------------------------------------- errors


def _one_line(path: Path, match: str) -> str:
    with pytest.raises(ModelFileError, match=match) as err:
        load_model_file(path)
    msg = str(err.value)
    assert "\n" not in msg and str(path) in msg
    return msg


def test_missing_file(tmp_path):
    _one_line(tmp_path / "nope.pt", "model file not found")


def test_not_a_shotsmith_file(tmp_path):
    (tmp_path / "a.pt").write_text("hello, I am text")
    _one_line(tmp_path / "a.pt", "not a shotsmith model file")
    torch.save({"weights": torch.zeros(2)}, tmp_path / "b.pt")
    _one_line(tmp_path / "b.pt", "not a shotsmith model file")
    torch.save([1, 2, 3], tmp_path / "c.pt")
    _one_line(tmp_path / "c.pt", "not a shotsmith model file")


def test_a_file_with_pickled_objects_is_refused_not_executed(tmp_path):
    torch.save({"tool": "shotsmith", "thing": Path("x")}, tmp_path / "obj.pt")
    _one_line(tmp_path / "obj.pt", "objects other than tensors and plain data")


def test_truncated_file(trained, tmp_path):
    data = trained[0].read_bytes()
    for cut in (len(data) // 2, len(data) - 30, 200):
        (tmp_path / "t.pt").write_bytes(data[:cut])
        _one_line(tmp_path / "t.pt", "truncated or corrupt model file")


def test_newer_format_asks_for_an_upgrade(trained, tmp_path):
    p = payload(trained[0])
    p["format"] = FORMAT_VERSION + 1
    torch.save(p, tmp_path / "new.pt")
    _one_line(tmp_path / "new.pt",
              rf"format {FORMAT_VERSION + 1} is newer than this shotsmith reads "
              rf"\({FORMAT_VERSION}\); upgrade shotsmith")


def test_the_fitted_sampler_is_stored_and_loads_with_weights_only(trained):
    from pipeline.sampler import fit_samplers

    model, _ = trained
    p = payload(model)  # torch.load(weights_only=True): plain tensors and containers only
    assert sorted(p["sampler"]["categories"]) == ["one", "three", "two"]
    assert p["sampler"]["library"]["covs"].dtype == torch.float64
    mf = load_model_file(model)
    library, per = mf.samplers()
    again, _ = fit_samplers(mf.mu, mf.clip_categories)  # what train stored
    np.testing.assert_allclose(library.means, again.means)
    assert set(per) == set(mf.categories)


def test_a_file_saved_mid_training_gets_its_sampler_fitted_on_load(trained, tmp_path):
    p = payload(trained[0])
    stored = p["sampler"]["library"]["means"].numpy()
    p["sampler"] = None
    torch.save(p, tmp_path / "mid.pt")
    library, _ = load_model_file(tmp_path / "mid.pt").samplers()
    np.testing.assert_allclose(library.means, stored)  # the fit is seeded: the same mixture


@pytest.mark.parametrize(("damage", "why"), [
    (lambda s: s["library"]["weights"].fill_(float("nan")), "non-finite"),
    (lambda s: s["library"]["covs"].neg_(), "positive definite"),
    (lambda s: s["categories"].pop("one"), "categories are not the model's"),
    (lambda s: s["library"].pop("means"), "library"),
])
def test_a_crafted_sampler_is_refused_in_one_line(trained, tmp_path, damage, why):
    p = payload(trained[0])
    damage(p["sampler"])
    torch.save(p, tmp_path / "bad.pt")
    _one_line(tmp_path / "bad.pt", f"damaged sampler.*{why}")


def test_older_format_asks_to_train_again(trained, tmp_path):
    # format 1 spectra had no analysis pad: a network trained on them reads the wrong frames
    p = payload(trained[0])
    p["format"] = 1
    torch.save(p, tmp_path / "old.pt")
    _one_line(tmp_path / "old.pt", r"format 1 was made by an older shotsmith .*"
                                   r"re-run 'shotsmith train'")


def test_missing_keys(trained, tmp_path):
    p = payload(trained[0])
    del p["mu"], p["history"]
    torch.save(p, tmp_path / "k.pt")
    _one_line(tmp_path / "k.pt", "damaged model file .missing history, mu")


def test_mismatched_shapes(trained, tmp_path):
    p = payload(trained[0])
    p["mu"] = p["mu"][:, :5]
    torch.save(p, tmp_path / "mu.pt")
    _one_line(tmp_path / "mu.pt", r"mu has shape \(36, 5\), expected \(36, 8\)")
    p = payload(trained[0])
    p["state_dict"]["dec_out.weight"] = torch.zeros(3, 3, 1)
    torch.save(p, tmp_path / "w.pt")
    _one_line(tmp_path / "w.pt", "weights do not fit the model settings")
    p = payload(trained[0])
    p["settings"]["model"]["latent_dim"] = 0
    torch.save(p, tmp_path / "s.pt")
    _one_line(tmp_path / "s.pt", "bad settings")


def test_atomic_save_replaces_whole_files_and_leaves_no_temporary(tmp_path):
    target = tmp_path / "x.pt"
    save_atomic({"a": torch.ones(3)}, target)
    save_atomic({"a": torch.zeros(4)}, target)
    assert torch.equal(torch.load(target, weights_only=True)["a"], torch.zeros(4))
    assert sorted(os.listdir(tmp_path)) == ["x.pt"]


def test_temporaries_of_killed_processes_are_removed_and_live_ones_kept(tmp_path):
    target = tmp_path / "m.pt"
    dead_pid = int(Path("/proc/sys/kernel/pid_max").read_text()) + 1  # no such process
    dead = tmp_path / f".m.pt.tmp-{dead_pid}"
    live = tmp_path / f".m.pt.tmp-{os.getpid()}"
    other = tmp_path / f".other.pt.tmp-{dead_pid}"
    for p in (dead, live, other):
        p.write_bytes(b"partial")
    assert remove_stale_temporaries(target) == [dead]
    assert live.exists() and other.exists() and not dead.exists()
