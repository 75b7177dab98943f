"""The in-memory API (pipeline.sounds) and the package's lazy re-exports."""

from __future__ import annotations

import dataclasses
import subprocess
import sys

import numpy as np
import pytest
import soundfile as sf

import pipeline
from pipeline import sounds
from pipeline.create import generate_sounds, interpolate_sounds, vary_sound
from pipeline.errors import ParameterError
from pipeline.manifest import load_manifest
from pipeline.modelfile import load_model_file


@pytest.fixture(scope="module")
def mf(small_model):
    return load_model_file(small_model[0])


def _written(folder):
    """The WAVs of a folder in manifest order, with their manifest entries."""
    items = load_manifest(folder)["items"]
    return [sf.read(folder / it["file"], dtype="float32")[0] for it in items], items


def _same_sounds(mem, folder, *, atol=0.0):
    audio, items = _written(folder)
    assert len(audio) == len(mem.audio) == len(mem.items)
    for a, b in zip(mem.audio, audio):
        assert a.dtype == np.float32 and a.shape == b.shape
        np.testing.assert_allclose(a, b, rtol=0, atol=atol)
    for m, it in zip(mem.items, items):
        assert {k: v for k, v in it.items() if k not in ("file", "run", "model")} == m


def test_generate_in_memory_equals_the_files_before_quantisation(mf, tmp_path):
    render = mf.settings.render
    mem = sounds.generate(mf, n=5, seed=7, render=render)
    assert mem.sample_rate == mf.audio.sample_rate and mem.codes.shape == (5, mf.latent_dim)
    audio, sr, items = mem  # unpacks as the arrays, the rate and the items
    assert sr == mf.audio.sample_rate and [it["seed"] for it in items] == list(range(7, 12))
    # 32-bit float files hold exactly the finished samples: no quantisation step
    generate_sounds(mf, tmp_path / "f32", n=5, seed=7,
                    render=mf.settings.with_overrides({"render": {"bit_depth": "32f"}}).render)
    _same_sounds(mem, tmp_path / "f32")
    # 24-bit files are those samples rounded to the grid (soundfile PCM_24, one step 2^-23;
    # the ceiling check may back the gain off by two steps of the peak)
    generate_sounds(mf, tmp_path / "pcm24", n=5, seed=7, render=render)
    audio24, _ = _written(tmp_path / "pcm24")
    for a, b in zip(mem.audio, audio24):
        assert np.max(np.abs(a - b)) <= 4 * 2.0**-23


def test_interpolate_and_vary_in_memory_equal_the_files(mf, tmp_path):
    f32 = mf.settings.with_overrides({"render": {"bit_depth": "32f"}}).render
    a, b = mf.clip_names[0], mf.clip_names[-1]
    mem = sounds.interpolate(mf, [a, b], steps=4, seed=3, render=f32)
    interpolate_sounds(mf, [a, b], tmp_path / "i", steps=4, seed=3, render=f32)
    _same_sounds(mem, tmp_path / "i")
    assert [it["step"] for it in mem.items] == [0, 1, 2, 3]
    np.testing.assert_allclose(mem.codes[0], mf.mu[0], atol=1e-6)
    mem = sounds.vary(mf, a, n=3, amount=0.5, seed=4, render=f32)
    vary_sound(mf, a, tmp_path / "v", n=3, amount=0.5, seed=4, render=f32)
    _same_sounds(mem, tmp_path / "v")


def test_in_memory_calls_write_nothing(mf, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    s = sounds.generate(mf, n=2, seed=1)
    assert len(s) == 2 and all(np.isfinite(y).all() and y.size for y in s.audio)
    assert list(tmp_path.iterdir()) == []


def test_same_seed_repeats_and_checks_come_before_loading(mf, tmp_path):
    one, two = sounds.vary(mf, mf.clip_names[1], n=2, seed=9), sounds.vary(
        mf, mf.clip_names[1], n=2, seed=9)
    for a, b in zip(one.audio, two.audio):
        np.testing.assert_array_equal(a, b)
    with pytest.raises(ParameterError, match="n=0"):
        sounds.generate(tmp_path / "missing.pt", n=0)


def test_a_clip_is_found_by_its_path_in_the_library(mf):
    path = mf.clip_paths[5]
    assert path.count("/") == 1 and path.endswith(".wav")  # a category folder, then the file
    for text in (path, path.rsplit(".", 1)[0], path.replace("/", "\\")):
        point = sounds.resolve_sound(mf, text)
        assert point.label == mf.clip_names[5]
        np.testing.assert_array_equal(point.mu, mf.mu[5])


def test_the_package_re_exports_the_api_lazily():
    assert pipeline.generate is sounds.generate and pipeline.vary is sounds.vary
    assert pipeline.generate_sounds is generate_sounds
    assert set(pipeline.__all__) <= set(dir(pipeline))
    with pytest.raises(AttributeError, match="no attribute 'nothing'"):
        pipeline.nothing  # noqa: B018
    # the package, the settings and the in-memory functions themselves load no torch; the
    # model file does, when a call loads one
    code = ("import sys, pipeline\n"
            "pipeline.load_settings, pipeline.generate, pipeline.Sounds\n"
            "print('torch' in sys.modules)\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"


def test_a_path_given_to_an_older_model_file_asks_for_the_clip_name(tmp_path):
    from modelfiles import write_model_file
    from synthbank import small_settings

    older = load_model_file(write_model_file(tmp_path / "old.pt", small_settings()))
    assert older.clip_paths == []  # written without them, as before they were stored
    with pytest.raises(ParameterError, match="holds no library paths.*name the clip"):
        sounds.resolve_sound(older, "kick/kick_00.wav")
    with pytest.raises(ParameterError) as plain:
        sounds.resolve_sound(older, "nothing")
    assert "library paths" not in str(plain.value)
    assert sounds.resolve_sound(older, "kick_00").label == "kick_00"


def test_each_prior_draws_its_own_codes(mf):
    fitted = sounds.plan_generate(mf, n=64, seed=3).codes
    mixture = sounds.plan_generate(mf, n=64, seed=3, prior="mixture").codes
    normal = sounds.plan_generate(mf, n=64, seed=3, prior="normal").codes
    # kernels sit on the clips' codes: their samples lie nearer to the nearest code than
    # the prior's do (the codes of a trained VAE do not fill N(0, I))
    def nearest(Z):
        return np.median(np.min(np.linalg.norm(Z[:, None] - mf.mu[None], axis=2), axis=1))
    assert nearest(fitted) < nearest(normal)
    assert not np.allclose(fitted, mixture) and np.all(np.isfinite(mixture))
    with pytest.raises(ParameterError, match="does not combine with prior='mixture'"):
        sounds.plan_generate(mf, n=2, near=mf.clip_categories[0], prior="mixture")


def test_decoded_sounds_pass_the_gate_on_the_decoders_faint_bed(mf):
    plan = sounds.plan_generate(mf, n=8, seed=5)
    raw = mf.decode(plan.codes)
    a = mf.audio
    # a three-epoch decoder has no bed near the floor yet: gate its quietest quarter instead
    level = float(np.percentile(raw, 25))
    gate_db = a.db_floor + level * (a.db_ceiling - a.db_floor)
    spec = dataclasses.replace(sounds.render_spec(mf, None), gate_db=gate_db)
    (U, items), = sounds.decoded_batches(mf, plan, spec)
    assert len(items) == 8
    np.testing.assert_array_equal(U, np.where(raw < level, 0, raw))
    assert 0.2 < np.mean(U == 0) < 0.3
    (U_off, _), = sounds.decoded_batches(mf, plan, dataclasses.replace(spec, gate_db=a.db_floor))
    np.testing.assert_array_equal(U_off, raw)
