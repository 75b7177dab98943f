"""One path for settings: presets, a bank's own settings, options validated once."""

from __future__ import annotations

import json

import pytest
import torch
from badfiles import hit, wav_bytes
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.config import RenderSpec, choose_settings, load_settings, settings_from_dict
from pipeline.errors import PresetError

runner = CliRunner()


def test_a_misspelt_preset_gets_a_suggestion():
    with pytest.raises(PresetError, match=r"unknown preset 'drum' \(did you mean 'drums'\? "
                                          r"known presets: .*tiny"):
        load_settings("drum")
    with pytest.raises(PresetError) as far:
        load_settings("marimba")
    assert "did you mean" not in str(far.value)


def test_stored_settings_keep_the_name_they_were_made_with():
    stored = load_settings("drums", {"render": {"iterations": 3}}).to_dict()
    again = settings_from_dict(stored)
    assert again.preset == "drums" and again.render.iterations == 3
    assert settings_from_dict({"render": {}}).preset == "custom"  # no name anywhere


def test_a_preset_wins_then_the_stored_settings_then_the_default():
    stored = load_settings("tiny")
    assert choose_settings("long", stored)[0].preset == "long"
    settings, said = choose_settings(None, stored, {"train": {"epochs": 3, "beta": None}})
    assert settings.preset == "tiny" and settings.train.epochs == 3
    assert settings.model == stored.model and said == "the bank's settings (preset tiny)"
    assert choose_settings(None, None) == (load_settings("drums"), "preset drums (the default)")


def test_a_bad_value_names_its_setting_once():
    with pytest.raises(PresetError, match=r"^render\.peak_db: 3\.0 must be between") as info:
        load_settings("tiny").with_overrides({"render": {"peak_db": 3.0}})
    assert info.value.key == "render.peak_db"
    with pytest.raises(PresetError) as info:
        RenderSpec(bit_depth="12")
    assert info.value.key == "render.bit_depth"


@pytest.fixture
def kit(tmp_path):
    for cat in ("kick", "hat"):
        (tmp_path / "kit" / cat).mkdir(parents=True)
        for i in range(3):
            (tmp_path / "kit" / cat / f"{cat}{i}.wav").write_bytes(
                wav_bytes(hit(16000, f0=80 + 40 * i if cat == "kick" else 3000, seed=i), 16000))
    return tmp_path / "kit"


def test_ingest_and_train_use_the_banks_preset_unless_told_and_say_so(kit, tmp_path):
    bank = tmp_path / "bank"
    first = runner.invoke(app, ["ingest", str(kit), "--bank", str(bank), "--preset", "tiny",
                                "--jobs", "1"])
    assert first.exit_code == 0, first.output
    assert "settings: preset tiny" in first.stdout
    # re-run without --preset: the bank's own settings (it used to rebuild it with drums)
    again = runner.invoke(app, ["ingest", str(kit), "--bank", str(bank), "--jobs", "1", "--json"])
    assert again.exit_code == 0, again.output
    s = json.loads(again.stdout)
    assert s["preset"] == "tiny" and s["reused"] == 6 and s["decoded"] == 0
    assert s["settings_from"] == "the bank's settings (preset tiny)"

    model = tmp_path / "m.pt"
    trained = runner.invoke(app, ["train", str(bank), "--model", str(model), "--epochs", "1",
                                  "--json"])
    assert trained.exit_code == 0, trained.output
    assert "settings: the bank's settings (preset tiny)" in trained.stderr
    assert json.loads(trained.stdout)["preset"] == "tiny"
    stored = torch.load(model, weights_only=True)["settings"]
    tiny = load_settings("tiny").to_dict()
    assert stored["preset"] == "tiny" and stored["model"] == tiny["model"]  # not drums' tables
    assert stored["train"] == tiny["train"] | {"epochs": 1}

    # an explicit preset wins, and says so
    other = runner.invoke(app, ["ingest", str(kit), "--bank", str(bank), "--preset", "drums",
                                "--jobs", "1", "--json"])
    assert other.exit_code == 0 and json.loads(other.stdout)["preset"] == "drums"
    assert json.loads(other.stdout)["settings_from"] == "preset drums"


def test_a_new_bank_without_a_preset_says_it_uses_the_default(kit, tmp_path):
    done = runner.invoke(app, ["ingest", str(kit), "--bank", str(tmp_path / "b"), "--jobs", "1"])
    assert done.exit_code == 0, done.output
    assert "settings: preset drums (the default)" in done.stdout
