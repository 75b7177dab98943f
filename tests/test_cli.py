"""The command line as a user meets it: start-up cost, help, one-line errors, exit codes."""

from __future__ import annotations

import subprocess
import sys

from typer.testing import CliRunner

from pipeline.cli import app

runner = CliRunner()


def _modules_after(args: list[str]) -> set[str]:
    code = (
        "import sys\n"
        "from typer.testing import CliRunner\n"
        "from pipeline.cli import app\n"
        f"CliRunner().invoke(app, {args!r})\n"
        "print(' '.join(sys.modules))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    return set(out.stdout.split())


def test_help_does_not_import_torch():
    assert "torch" not in _modules_after(["--help"])


def test_ingest_does_not_import_torch(tmp_path):
    (tmp_path / "src").mkdir()
    mods = _modules_after(["ingest", str(tmp_path / "src"), "--bank", str(tmp_path / "bank")])
    assert "torch" not in mods


def test_python_dash_m_runs_the_same_app():
    out = subprocess.run(
        [sys.executable, "-m", "pipeline", "--help"], capture_output=True, text=True
    )
    assert out.returncode == 0
    for command in (
        "ingest",
        "resynth",
        "train",
        "generate",
        "interpolate",
        "vary",
        "inspect",
        "demo",
        "listen",
        "export",
    ):
        assert command in out.stdout


def test_version():
    result = runner.invoke(app, ["--version"])
    assert result.exit_code == 0 and result.output.startswith("shotsmith ")


def test_missing_source_is_one_line_exit_1(tmp_path):
    result = runner.invoke(app, ["ingest", str(tmp_path / "nope"), "--bank", str(tmp_path / "b")])
    assert result.exit_code == 1
    lines = result.output.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: ") and "nope" in lines[0]


def test_unknown_preset_is_one_line_exit_1(tmp_path):
    result = runner.invoke(
        app, ["ingest", str(tmp_path), "--bank", str(tmp_path / "b"), "--preset", "marimba"]
    )
    assert result.exit_code == 1
    assert "unknown preset 'marimba'" in result.output


def test_usage_error_is_exit_2(tmp_path):
    result = runner.invoke(app, ["ingest", str(tmp_path)])  # --bank missing
    assert result.exit_code == 2


def test_missing_model_file_is_one_line_exit_1(tmp_path):
    result = runner.invoke(
        app, ["generate", str(tmp_path / "none.pt"), "--out", str(tmp_path / "o")]
    )
    assert result.exit_code == 1
    assert result.output.startswith("error: ") and "none.pt" in result.output
    assert "Traceback" not in result.output


def test_bad_bit_depth_is_usage_error(tmp_path):
    result = runner.invoke(
        app, ["resynth", str(tmp_path), "--out", str(tmp_path / "o"), "--bit-depth", "12"]
    )
    assert result.exit_code == 2


def test_train_refuses_then_overwrites_an_existing_model(tmp_path):
    import numpy as np

    from pipeline.bank import BankWriter
    from pipeline.config import load_settings

    settings = load_settings("tiny")
    a = settings.audio
    writer = BankWriter(tmp_path / "bank", a, 6)
    rng = np.random.default_rng(0)
    for i in range(6):
        writer.put(i, rng.random((a.n_bins, a.n_frames), dtype=np.float32))
    clips = [{"name": f"c{i}", "path": f"c{i}.wav", "category": None} for i in range(6)]
    writer.commit(clips, settings.to_dict(), {"accepted": 6})
    model = tmp_path / "m.pt"
    model.write_bytes(b"an earlier model")
    args = [
        "train",
        str(tmp_path / "bank"),
        "--model",
        str(model),
        "--preset",
        "tiny",
        "--epochs",
        "1",
    ]
    refused = runner.invoke(app, args)
    assert refused.exit_code == 1 and "--overwrite" in refused.output
    assert model.read_bytes() == b"an earlier model"
    done = runner.invoke(app, [*args, "--overwrite", "--json"])
    assert done.exit_code == 0, done.output
    assert model.read_bytes() != b"an earlier model"


def test_help_shows_flags_without_a_value_and_every_option_has_help():
    import re

    import typer.main

    commands = typer.main.get_command(app).commands
    assert "info" in commands
    for name, command in commands.items():
        result = runner.invoke(app, [name, "--help"], terminal_width=100)
        assert result.exit_code == 0, (name, result.output)
        assert "<bool>" not in result.output, name  # a flag takes no value
        for param in command.params:
            if param.param_type_name == "option":
                assert param.help, f"{name} {param.opts[0]} has no help"
        json_line = [line for line in result.output.splitlines() if "--json" in line]
        assert all(re.match(r"^\s+--json\s{2,}\S", line) for line in json_line), json_line


def test_a_value_after_a_flag_is_a_usage_error(tmp_path):
    # "--json true" is not how a flag is given: exit 2 with the usage line, nothing run
    result = runner.invoke(app, ["ingest", str(tmp_path), "--bank", str(tmp_path / "b"),
                                 "--json", "true"])
    assert result.exit_code == 2 and "unexpected extra argument" in result.output
    assert not (tmp_path / "b").exists()


def test_interpolate_needs_out_like_every_command_that_writes(tmp_path):
    for args in (["interpolate", str(tmp_path / "m.pt"), "a", "b"],
                 ["generate", str(tmp_path / "m.pt")],
                 ["vary", str(tmp_path / "m.pt"), "a"]):
        result = runner.invoke(app, args)
        assert result.exit_code == 2 and "--out" in result.output, args


def test_progress_puts_each_time_before_its_word():
    import io
    import re

    from pipeline.progress import progress_bar

    buf = io.StringIO()
    with progress_bar("train", file=buf) as update:
        update(1, 4, loss=0.5)
        update(4, 4, loss=0.25)
    text = buf.getvalue()
    assert re.search(r"\d+:\d\d:\d\d elapsed, [-\d]+:[-\d]{2}:[-\d]{2} left", text), text
    assert "loss 0.25" in text
