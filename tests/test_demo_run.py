"""``shotsmith demo`` end to end, with a reduced epoch count."""

from __future__ import annotations

import json

import numpy as np
import pytest
import soundfile as sf
from typer.testing import CliRunner

import pipeline.demo_run as demo_run
from pipeline.cli import app
from pipeline.errors import OutputError

pytestmark = pytest.mark.slow  # the whole demo job, twice: ingest, train, render, inspect


def test_demo_runs_end_to_end_and_synthesizes_a_missing_kit(tmp_path, monkeypatch):
    monkeypatch.setattr(demo_run, "find_kit", lambda: None)  # an installed package, no repo
    out = tmp_path / "demo"
    result = CliRunner().invoke(app, ["demo", "--out", str(out), "--epochs", "2", "--json"])
    assert result.exit_code == 0, result.output
    s = json.loads(result.output)
    assert s["kit"] == str(out / "kit") and len(list((out / "kit").glob("*/*.wav"))) >= 120
    assert s["generated"]["written"] == 16
    assert [p["written"] for p in s["interpolations"]] == [8, 8]
    assert s["variations"]["written"] == 8
    for name in ("latent-map.png", "reconstructions.png", "training.png", "health.json"):
        assert (out / "inspect" / name).stat().st_size > 0
    wavs = sorted(out.glob("generated/*.wav")) + sorted(out.glob("interpolations/*/*.wav"))
    assert len(wavs) == 32
    for f in wavs:
        y, _ = sf.read(f)
        assert np.all(np.isfinite(y)) and 0 < np.max(np.abs(y)) <= 10 ** (-1 / 20) + 2**-23
    # the two interpolations run between different categories
    for p in s["interpolations"]:
        a, b = p["waypoints"]
        assert a.rsplit("_", 1)[0] != b.rsplit("_", 1)[0]
    assert "listen first" in demo_run.format_demo_summary(s)


def test_demo_refuses_an_earlier_run_without_overwrite(tmp_path):
    out = tmp_path / "demo"
    demo_run.run_demo(out, epochs=1)
    before = (out / "model.pt").read_bytes()
    with pytest.raises(OutputError, match="--overwrite"):
        demo_run.run_demo(out, epochs=1)
    assert (out / "model.pt").read_bytes() == before
    again = demo_run.run_demo(out, epochs=1, overwrite=True)
    assert again["generated"]["written"] == 16
