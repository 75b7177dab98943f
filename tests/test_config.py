"""Presets and settings: loading, overrides, validation messages."""

from __future__ import annotations

import pytest

from pipeline.config import AudioSpec, load_settings, preset_names, settings_from_dict
from pipeline.errors import PresetError


@pytest.mark.parametrize("name", ["tiny", "drums", "long"])
def test_shipped_presets_load(name):
    s = load_settings(name)
    assert s.preset == name
    assert s.audio.n_fft % s.audio.hop_length == 0
    # centred frames of the clip after its analysis pad (at least n_fft / 2 of silence)
    assert s.audio.analysis_pad >= s.audio.n_fft // 2
    assert s.audio.analysis_pad % s.audio.hop_length == 0
    assert s.audio.n_frames == 1 + (s.audio.n_samples + s.audio.analysis_pad) // s.audio.hop_length


def test_presets_are_listed():
    assert {"tiny", "drums", "long"} <= set(preset_names())


def test_drums_shape_and_latent():
    s = load_settings("drums")
    # full band: 44.1 kHz, 46 ms windows, an 11.6 ms hop; 1 s + 1024 samples of analysis pad
    assert (s.audio.sample_rate, s.audio.n_bins, s.audio.n_frames) == (44100, 1025, 89)
    assert s.model.latent_dim == 16


def test_overrides_win_and_none_is_ignored():
    s = load_settings("drums", {"audio": {"sample_rate": 44100, "duration": None}})
    assert s.audio.sample_rate == 44100
    assert s.audio.duration == load_settings("drums").audio.duration


def test_unknown_key_is_named(tmp_path):
    p = tmp_path / "mine.toml"
    p.write_text("[audio]\nsample_rat = 22050\n")
    with pytest.raises(PresetError, match=r"audio\.sample_rat: unknown key"):
        load_settings(p)


def test_unknown_table_is_named(tmp_path):
    p = tmp_path / "mine.toml"
    p.write_text("[audoi]\nsample_rate = 22050\n")
    with pytest.raises(PresetError, match=r"unknown table \[audoi\]"):
        load_settings(p)


@pytest.mark.parametrize(
    "table, key, value, message",
    [
        ("audio", "sample_rate", "fast", r"audio\.sample_rate: 'fast' must be a whole number"),
        ("audio", "hop_length", 300, r"audio\.hop_length: 300 must divide n_fft"),
        ("model", "latent_dim", 0, r"model\.latent_dim: 0 must be between"),
        ("render", "bit_depth", "12", r"render\.bit_depth: '12' must be one of"),
        ("train", "epochs", 1.5, r"train\.epochs: 1\.5 must be a whole number"),
    ],
)
def test_bad_values_are_named(table, key, value, message):
    with pytest.raises(PresetError, match=message):
        load_settings("drums", {table: {key: value}})


def test_unknown_preset_lists_known():
    with pytest.raises(PresetError, match="known presets: .*drums"):
        load_settings("marimba")


def test_bad_toml_is_one_line(tmp_path):
    p = tmp_path / "broken.toml"
    p.write_text("[audio\n")
    with pytest.raises(PresetError, match="not valid TOML") as info:
        load_settings(p)
    assert "\n" not in str(info.value)


def test_round_trip_through_dict():
    s = load_settings("tiny", {"render": {"loudness": -16.0}})
    again = settings_from_dict(s.to_dict(), name=s.preset)
    assert again == s


def test_spec_properties():
    a = AudioSpec(sample_rate=16000, duration=0.5, n_fft=512, hop_length=128)
    assert (a.n_samples, a.n_bins, a.analysis_pad, a.n_frames) == (8000, 257, 256, 65)


def test_own_preset_file_is_recorded_by_path(tmp_path):
    p = tmp_path / "my kit.toml"
    p.write_text("[audio]\nsample_rate = 16000\n")
    assert load_settings(p).preset == str(p)  # so a resume command can find it again
    assert load_settings("tiny").preset == "tiny"
