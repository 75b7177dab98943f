"""shotsmith info: what a model holds (clips, categories, training settings)."""

from __future__ import annotations

import json
from collections import Counter

import pytest
from typer.testing import CliRunner

from pipeline.bank import open_bank
from pipeline.cli import app
from pipeline.errors import ModelFileError
from pipeline.info import format_info, model_info
from pipeline.modelfile import load_model_file


def test_model_info_lists_clips_categories_and_training(small_model):
    model, bank_dir = small_model
    info, bank, mf = model_info(model), open_bank(bank_dir), load_model_file(model)
    assert info["n_clips"] == len(bank) == 36
    assert [c["name"] for c in info["clips"]] == bank.names
    assert [c["path"] for c in info["clips"]] == [c["path"] for c in bank.clips]
    counts = Counter(c["category"] for c in bank.clips)
    assert {c["name"]: c["clips"] for c in info["categories"]} == counts
    assert info["preset"] == "tiny" and info["sample_rate"] == bank.audio.sample_rate == 8000
    assert info["latent_dim"] == 8 and info["epochs"] == 3
    assert info["epochs_trained"] == len(mf.history) == 3
    assert info["best_epoch"] == mf.best["epoch"]
    assert info["best_val_loss"] == pytest.approx(min(h["val_loss"] for h in mf.history))
    assert info["sampler"] == "stored" and info["sha256"] == mf.sha256


def test_cli_info_text_and_json(small_model, tmp_path):
    model, _ = small_model
    runner = CliRunner()
    as_json = runner.invoke(app, ["info", str(model), "--json"])
    assert as_json.exit_code == 0, as_json.output
    assert json.loads(as_json.output) == json.loads(json.dumps(model_info(model)))
    text = runner.invoke(app, ["info", str(model)])
    assert text.exit_code == 0 and text.output.strip() == format_info(model_info(model))
    first = text.output.splitlines()
    assert first[0].endswith("36 clips in 3 categories")
    assert "preset tiny; 8000 Hz" in first[1] and "latent size 8" in first[1]
    assert "trained 3 of 3 epochs" in first[2]
    assert any(line.startswith("one ") and line.split()[-1] == "12" for line in first)
    assert "one_0000" in text.output
    missing = runner.invoke(app, ["info", str(tmp_path / "none.pt")])
    assert missing.exit_code == 1 and missing.output.startswith("error: ")


def test_long_libraries_list_the_first_names_and_point_to_json(small_model):
    info = model_info(small_model[0])
    many = info | {"clips": info["clips"] * 10, "n_clips": 360}
    text = format_info(many)
    assert "first 200 of 360; --json lists all" in text


def test_a_damaged_model_is_one_line(tmp_path):
    bad = tmp_path / "m.pt"
    bad.write_bytes(b"not a model")
    with pytest.raises(ModelFileError, match="m.pt"):
        model_info(bad)
