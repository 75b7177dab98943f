"""Resynthesis of a folder without a model: front end, spectra, fast Griffin-Lim, rendering."""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from typer.testing import CliRunner

from pipeline import spectra
from pipeline.cli import app
from pipeline.config import load_settings
from pipeline.errors import OutputError, ShotsmithError
from pipeline.manifest import load_manifest
from pipeline.resynth import resynth_folder

SETTINGS = load_settings("tiny", {"render": {"iterations": 16}})
SR = 16000


def _tree_digest(root: Path) -> dict[str, str]:
    return {p.relative_to(root).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(root.rglob("*")) if p.is_file()}


@pytest.fixture
def source(tmp_path):
    rng = np.random.default_rng(5)
    root = tmp_path / "kit"
    t = np.arange(SR // 2) / SR
    kick = np.sin(2 * np.pi * 60 * t * (1 + 2 * np.exp(-t * 30))) * np.exp(-t * 8)
    for sub, name, y in [
        ("kick", "kick.wav", kick),
        ("hat", "kick.wav", rng.standard_normal(len(t)) * np.exp(-t * 40)),  # same stem
        ("hat", "open hat é.wav", rng.standard_normal(len(t)) * np.exp(-t * 10)),
        ("", "tone.flac", 0.5 * np.sin(2 * np.pi * 440 * t) * np.exp(-t * 4)),
    ]:
        (root / sub).mkdir(parents=True, exist_ok=True)
        sf.write(root / sub / name, 0.8 * y / np.max(np.abs(y)), SR)
    (root / "hat" / "notes.wav").write_text("not audio at all")
    sf.write(root / "silent.wav", np.zeros(SR // 4), SR)
    (root / "README.txt").write_text("ignored")
    return root


def test_resynth_writes_every_usable_file_and_records_sc(source, tmp_path):
    before = _tree_digest(source)
    out = tmp_path / "out"
    s = resynth_folder(source, out, SETTINGS, jobs=1)
    assert _tree_digest(source) == before  # SOURCE is only read
    assert s["written"] == 4 and s["skipped"] == 2 and s["ignored"] == 1 and s["failed"] == 0
    manifest = load_manifest(out)
    files = sorted(p.name for p in out.glob("*.wav"))
    assert files == ["hat_kick.wav", "kick_kick.wav", "open hat é.wav", "tone.wav"]
    assert sorted(it["file"] for it in manifest["items"]) == files
    # the clips are named as a bank names them (ingest of the same folder)
    assert sorted(it["name"] for it in manifest["items"]) == [
        "hat/kick", "kick/kick", "open hat é", "tone"]
    assert manifest["complete"] is True and manifest["model"] is None
    assert manifest["settings"]["preset"] == "tiny" and manifest["render"]["iterations"] == 16
    reasons = {s["path"]: s["reason"] for s in manifest["skipped"]}
    assert set(reasons) == {"hat/notes.wav", "silent.wav"} and "silent" in reasons["silent.wav"]
    for it in manifest["items"]:
        assert it["kind"] == "resynth" and it["sources"] == [it["source"]] and it["model"] is None
        assert it["sc_db"] < -12 and it["peak_dbfs"] <= -1.0
        y, sr = sf.read(out / it["file"])
        assert sr == SR and len(y) == SETTINGS.audio.n_samples
        assert sf.info(out / it["file"]).subtype == "PCM_24"
    assert s["median_sc_db"] == pytest.approx(np.median([it["sc_db"] for it in manifest["items"]]),
                                              abs=0.01)


def test_recorded_sc_is_that_of_the_reconstruction(source, tmp_path):
    # recompute one file's SC from scratch: front end -> target magnitudes vs the
    # Griffin-Lim output (the WAV is normalised afterwards, so undo its measured gain)
    from pipeline.ingest import load_clip

    # no fades: a PGHI start reconstructs this tone to about -48 dB, where even a 20 ms
    # fade would dominate the comparison
    plain = load_settings("tiny", {"render": {"iterations": 16, "fade_in_ms": 0.0,
                                              "fade_out_ms": 0.0, "bit_depth": "32f"}})
    resynth_folder(source, tmp_path / "o", plain, jobs=1)
    item = next(it for it in load_manifest(tmp_path / "o")["items"]
                if it["file"] == "tone.wav")
    a = plain.audio
    S = spectra.unit_to_magnitude(spectra.clip_to_unit(load_clip(source / "tone.flac", a), a), a)
    y, _ = sf.read(tmp_path / "o" / "tone.wav")
    y = y / 10 ** (item["gain_db"] / 20)
    sc = spectra.spectral_convergence_db(S, spectra.magnitude(
        spectra.pad_for_analysis(y, a), n_fft=a.n_fft, hop_length=a.hop_length))
    # the finished file has its DC removed: about 1 dB at this precision (-43 dB, 0.7 %)
    assert sc == pytest.approx(item["sc_db"], abs=1.0)


def test_parallel_decoding_gives_the_same_files(source, tmp_path):
    resynth_folder(source, tmp_path / "a", SETTINGS, jobs=1)
    resynth_folder(source, tmp_path / "b", SETTINGS, jobs=2)
    assert {k: v for k, v in _tree_digest(tmp_path / "a").items() if k.endswith(".wav")} == \
        {k: v for k, v in _tree_digest(tmp_path / "b").items() if k.endswith(".wav")}


def test_output_inside_source_is_refused(source):
    before = _tree_digest(source)
    with pytest.raises(OutputError, match="must not be inside the source folder"):
        resynth_folder(source, source / "out", SETTINGS)
    assert _tree_digest(source) == before and not (source / "out").exists()


def test_existing_outputs_need_overwrite(source, tmp_path):
    resynth_folder(source, tmp_path / "o", SETTINGS, jobs=1)
    with pytest.raises(OutputError, match="already exists"):
        resynth_folder(source, tmp_path / "o", SETTINGS, jobs=1)
    s = resynth_folder(source, tmp_path / "o", SETTINGS, jobs=1, overwrite=True)
    assert s["written"] == 4


def test_no_usable_file_is_one_clear_error(tmp_path):
    src = tmp_path / "empty"
    src.mkdir()
    (src / "a.wav").write_bytes(b"")
    with pytest.raises(ShotsmithError, match=r"no usable audio files in .*a\.wav: empty file"):
        resynth_folder(src, tmp_path / "out", SETTINGS)
    manifest = load_manifest(tmp_path / "out")
    assert manifest["items"] == [] and manifest["skipped"][0]["path"] == "a.wav"


def test_cli_resynth_json(source, tmp_path):
    result = CliRunner().invoke(app, ["resynth", str(source), "--out", str(tmp_path / "c"),
                                      "--preset", "tiny", "--iterations", "4", "--bit-depth", "16",
                                      "--json"])
    assert result.exit_code == 0, result.output
    s = json.loads(result.stdout)
    assert s["written"] == 4 and s["skipped"] == 2
    assert all(sf.info(p).subtype == "PCM_16" for p in (tmp_path / "c").glob("*.wav"))
