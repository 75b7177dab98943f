"""generate / interpolate / vary on a model trained here on a kit of low kicks and bright hats."""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import librosa
import numpy as np
import pytest
import soundfile as sf
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.config import load_settings
from pipeline.errors import ParameterError, ShotsmithError
from pipeline.manifest import load_manifest

SR = 16000


def _kick(rng: np.random.Generator) -> np.ndarray:
    t = np.arange(int(0.4 * SR)) / SR
    f0 = rng.uniform(45, 65)
    sweep = f0 + rng.uniform(80, 140) * np.exp(-t * 40)
    phase = 2 * np.pi * np.cumsum(sweep) / SR
    return np.sin(phase) * np.exp(-t * rng.uniform(7, 10))


def _hat(rng: np.random.Generator) -> np.ndarray:
    t = np.arange(int(0.25 * SR)) / SR
    noise = rng.standard_normal(t.size)
    bright = np.diff(np.diff(noise, prepend=0), prepend=0)  # second difference: a steep high tilt
    return bright / np.max(np.abs(bright)) * np.exp(-t * rng.uniform(25, 40))


@pytest.fixture(scope="module")
def kit(tmp_path_factory) -> Path:
    root = tmp_path_factory.mktemp("kit")
    rng = np.random.default_rng(11)
    for cat, make in (("kick", _kick), ("hat", _hat)):
        (root / cat).mkdir()
        for i in range(20):
            y = make(rng)
            sf.write(root / cat / f"{cat}_{i:02d}.wav", 0.8 * y / np.max(np.abs(y)), SR)
    return root


@pytest.fixture(scope="module")
def model(kit, tmp_path_factory) -> Path:
    from pipeline.ingest import ingest_folder
    from pipeline.train import train_model

    work = tmp_path_factory.mktemp("work")
    settings = load_settings(
        "tiny", {"train": {"epochs": 60, "patience": 60, "seed": 3}, "model": {"latent_dim": 8}}
    )
    ingest_folder(kit, work / "bank", settings, jobs=1)
    train_model(work / "bank", work / "model.pt", settings)
    return work / "model.pt"


def _centroid(path: Path) -> float:
    y, sr = sf.read(path)
    # librosa.feature.spectral_centroid: magnitude-weighted mean frequency per frame
    c = librosa.feature.spectral_centroid(y=y, sr=sr, n_fft=512, hop_length=128)[0]
    energy = librosa.feature.rms(y=y, frame_length=512, hop_length=128)[0]
    n = min(c.size, energy.size)
    return float(np.average(c[:n], weights=energy[:n] + 1e-12))


def _files(folder: Path) -> list[Path]:
    return sorted(folder.glob("*.wav"))


def _check_outputs(folder: Path, peak_db: float = -1.0) -> None:
    files = _files(folder)
    assert files
    for f in files:
        y, _ = sf.read(f)
        assert np.all(np.isfinite(y)), f
        peak = np.max(np.abs(y))
        assert peak > 10 ** (-40 / 20), f"{f.name} is silent"
        # one 24-bit LSB of slack for the quantiser (soundfile PCM_24)
        assert peak <= 10 ** (peak_db / 20) + 2**-23, f"{f.name} peak {peak}"


def test_generate_near_kick_sounds_like_kicks(model, kit, tmp_path):
    from pipeline.create import generate_sounds

    kicks = np.mean([_centroid(p) for p in (kit / "kick").glob("*.wav")])
    hats = np.mean([_centroid(p) for p in (kit / "hat").glob("*.wav")])
    s = generate_sounds(model, tmp_path / "near", n=8, near="kick", seed=1)
    assert s["written"] == 8
    got = np.mean([_centroid(p) for p in _files(tmp_path / "near")])
    # "much closer to the kicks' than to the hats'": within a quarter of the kick-hat gap
    assert abs(got - kicks) < 0.25 * abs(hats - kicks), (got, kicks, hats)
    _check_outputs(tmp_path / "near")


def test_kick_to_hat_midpoint_lies_between(model, kit, tmp_path):
    from pipeline.create import interpolate_sounds

    interpolate_sounds(model, ["kick_00", "hat_00"], tmp_path / "path", steps=5, seed=2)
    files = _files(tmp_path / "path")
    assert [f.name for f in files][0] == "interpolate-kick_00-to-hat_00-00.wav"
    c = [_centroid(f) for f in files]
    assert min(c[0], c[-1]) < c[2] < max(c[0], c[-1]), c
    _check_outputs(tmp_path / "path")


def test_same_seed_writes_identical_wavs(model, tmp_path):
    from pipeline.create import generate_sounds

    digests = []
    for run in ("a", "b"):
        generate_sounds(model, tmp_path / run, n=3, seed=42)
        digests.append([hashlib.sha256(f.read_bytes()).hexdigest() for f in _files(tmp_path / run)])
    assert digests[0] == digests[1]
    generate_sounds(model, tmp_path / "c", n=3, seed=43)
    assert [hashlib.sha256(f.read_bytes()).hexdigest() for f in _files(tmp_path / "c")] != digests[
        0
    ]


def test_amount_zero_is_the_reconstruction(model):
    from pipeline.create import resolve_sound
    from pipeline.latent import variations
    from pipeline.modelfile import load_model_file

    mf = load_model_file(model)
    point = resolve_sound(mf, "kick_03")
    Z = variations(point.mu, point.logvar, 4, amount=0.0, rng=np.random.default_rng(0))
    np.testing.assert_array_equal(Z, np.repeat(point.mu[None], 4, axis=0))
    np.testing.assert_allclose(mf.decode(Z), mf.decode(point.mu[None]).repeat(4, 0), atol=1e-6)


def test_interpolation_endpoints_decode_to_the_endpoints(model):
    from pipeline.create import _path_items, resolve_sound
    from pipeline.modelfile import load_model_file

    mf = load_model_file(model)
    a, b = resolve_sound(mf, "kick_01"), resolve_sound(mf, "hat_04")
    for kind in ("slerp", "lerp"):
        Z, _ = _path_items([a, b], 6, kind, seed=0)
        U = mf.decode(Z)
        np.testing.assert_allclose(U[0], mf.decode(a.mu[None])[0], atol=1e-5)
        np.testing.assert_allclose(U[-1], mf.decode(b.mu[None])[0], atol=1e-5)


def test_vary_writes_manifest_with_nearest(model, tmp_path):
    from pipeline.create import vary_sound

    vary_sound(model, "hat_02", tmp_path / "v", n=3, amount=0.0, seed=5)
    manifest = load_manifest(tmp_path / "v")
    assert manifest["model"]["sha256"]
    items = manifest["items"]
    assert [it["file"] for it in items] == [f.name for f in _files(tmp_path / "v")]
    for it in items:
        assert it["kind"] == "vary" and it["sources"] == ["hat_02"]
        # amount 0 is the sound itself: its own code is its nearest training code
        assert it["nearest"]["name"] == "hat_02" and it["nearest"]["distance_ratio"] < 1e-6
        assert len(it["z"]) == 8


def test_audio_file_as_waypoint(model, kit, tmp_path):
    from pipeline.create import interpolate_sounds

    s = interpolate_sounds(
        model, [str(kit / "kick" / "kick_05.wav"), "hat_01"], tmp_path / "f", steps=3, seed=0
    )
    assert s["written"] == 3
    assert _files(tmp_path / "f")[0].name.startswith("interpolate-kick_05-to-hat_01")


def test_names_resolve_by_prefix_and_ambiguity_lists_candidates(model):
    from pipeline.create import resolve_sound
    from pipeline.modelfile import load_model_file

    mf = load_model_file(model)
    with pytest.raises(ParameterError, match="matches .* clips: .*kick_10"):
        resolve_sound(mf, "kick_1")
    assert resolve_sound(mf, "hat_19").label == "hat_19"
    with pytest.raises(ParameterError, match="neither a clip"):
        resolve_sound(mf, "snare_01")


def test_unknown_category_lists_known(model, tmp_path):
    from pipeline.create import generate_sounds

    with pytest.raises(ShotsmithError, match="hat.*kick|kick.*hat"):
        generate_sounds(model, tmp_path / "x", n=2, near="snare", seed=0)


def test_jobs_file_csv_and_toml(model, tmp_path):
    from pipeline.create import interpolate_jobs

    csv_file = tmp_path / "night.csv"
    csv_file.write_text(
        "start,end,via,steps,path,label\nkick_00,hat_00,,3,lerp,\nkick_02,hat_03,kick_04,4,,tour\n"
    )
    s = interpolate_jobs(model, csv_file, tmp_path / "csv", seed=0)
    assert s["written"] == 7
    assert (tmp_path / "csv" / "tour-03.wav").is_file()
    toml_file = tmp_path / "night.toml"
    toml_file.write_text('[[job]]\nsounds = ["kick_00", "hat_00"]\nsteps = 2\n')
    assert interpolate_jobs(model, toml_file, tmp_path / "toml", seed=0)["written"] == 2
    bad = tmp_path / "bad.csv"
    bad.write_text("start,end\nkick_00,nothing_here\n")
    with pytest.raises(ShotsmithError, match=r"bad\.csv: line 2: .*nothing_here"):
        interpolate_jobs(model, bad, tmp_path / "bad", seed=0)


def test_a_second_generate_adds_to_the_folder_and_overwrite_replaces(model, tmp_path):
    from pipeline.create import generate_sounds

    out = tmp_path / "g"
    assert generate_sounds(model, out, n=2, seed=0)["files"] == [
        "generate-0000.wav", "generate-0001.wav"]
    before = (out / "generate-0000.wav").read_bytes()
    # a second batch goes after the first, without --overwrite, as a second run
    assert generate_sounds(model, out, n=3, seed=9)["files"] == [
        f"generate-{i:04d}.wav" for i in (2, 3, 4)]
    assert (out / "generate-0000.wav").read_bytes() == before
    m = load_manifest(out)
    assert [(it["file"], it["run"]) for it in m["items"]] == [
        (f"generate-{i:04d}.wav", 1 if i < 2 else 2) for i in range(5)]
    assert [r["request"]["seed"] for r in m["runs"]] == [0, 9] and m["complete"] is True
    assert m["request"]["seed"] == 9  # the top level is the latest run's
    # --overwrite keeps its meaning: the same names again, replaced
    generate_sounds(model, out, n=2, seed=9, overwrite=True)
    assert (out / "generate-0000.wav").read_bytes() != before
    m = load_manifest(out)
    assert {it["file"]: it["run"] for it in m["items"]} == {
        "generate-0000.wav": 3, "generate-0001.wav": 3, "generate-0002.wav": 2,
        "generate-0003.wav": 2, "generate-0004.wav": 2}
    assert sorted(it["file"] for it in m["items"]) == sorted(p.name for p in _files(out))


def test_cli_generate_json_and_render_options(model, tmp_path):
    result = CliRunner().invoke(
        app,
        [
            "generate",
            str(model),
            "--out",
            str(tmp_path / "cli"),
            "-n",
            "2",
            "--seed",
            "1",
            "--bit-depth",
            "16",
            "--peak-db",
            "-6",
            "--iterations",
            "8",
            "--json",
        ],
    )
    assert result.exit_code == 0, result.output
    s = json.loads(result.output)
    assert s["written"] == 2
    for f in _files(tmp_path / "cli"):
        assert sf.info(f).subtype == "PCM_16"
    _check_outputs(tmp_path / "cli", peak_db=-6.0)
    # the manifest names the model's preset (it said "custom"), with the options applied
    manifest = load_manifest(tmp_path / "cli")
    stored = load_settings("tiny").render
    assert manifest["settings"]["preset"] == "tiny"
    assert manifest["settings"]["render"] == {**stored.__dict__, "bit_depth": "16",
                                              "peak_db": -6.0, "iterations": 8}


def test_render_settings_are_typed(model, tmp_path):
    from pipeline.config import RenderSpec
    from pipeline.create import generate_sounds

    with pytest.raises(ParameterError, match="render must be a RenderSpec"):
        generate_sounds(model, tmp_path / "g", n=1, render={"iterations": 1})
    s = generate_sounds(model, tmp_path / "g", n=1, seed=0, render=RenderSpec(iterations=2))
    assert load_manifest(Path(s["manifest"]).parent)["render"]["iterations"] == 2


def test_a_loudness_target_the_ceiling_forbids_is_said_on_the_console(model, tmp_path):
    # -3 LUFS under a -6 dBTP ceiling: no decaying one-shot gets there (its true peak would
    # have to sit far above its integrated loudness, BS.1770)
    args = ["generate", str(model), "--out", str(tmp_path / "loud"), "-n", "3", "--seed", "2",
            "--iterations", "8", "--loudness", "-3", "--peak-db", "-6"]
    result = CliRunner().invoke(app, args)
    assert result.exit_code == 0, result.output
    manifest = load_manifest(tmp_path / "loud")
    levels = {it["file"]: it["loudness_lufs"] for it in manifest["items"]}
    worst = min(levels, key=levels.get)
    line = result.output.strip().splitlines()[-1]
    assert line.startswith("3 of 3 sounds could not reach -3 LUFS under the -6 dBTP ceiling")
    assert f"the furthest, {worst}, is at {levels[worst]:.1f} LUFS" in line
    more = CliRunner().invoke(app, [*args, "--json"])
    short = json.loads(more.output)["loudness_unmet"]
    assert short["count"] == 3 and short["short_by_lu"] > 0
    met = CliRunner().invoke(app, [*args[:-4], "--loudness", "-30", "--json"])
    assert json.loads(met.output)["loudness_unmet"] is None
