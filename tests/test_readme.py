"""The README's commands are the ones CI runs and the CLI offers."""

from __future__ import annotations

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def _quick_start_block() -> list[str]:
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    section = text.split("## Quick start", 1)[1]
    block = re.search(r"```[a-z]*\n(.*?)```", section, re.S)
    assert block, "Quick start has no fenced code block"
    return [line for line in block.group(1).splitlines() if line.strip()]


def test_quick_start_has_exactly_two_lines():
    lines = _quick_start_block()
    assert len(lines) == 2, lines
    assert "shotsmith demo" in lines[0]
    assert "pytest" in lines[1]


def test_ci_runs_the_readme_test_line_verbatim():
    test_line = _quick_start_block()[1]
    ci = (ROOT / ".ci" / "run").read_text(encoding="utf-8").splitlines()
    assert test_line in ci
    assert any("venv" in line for line in ci), ".ci/run must create a fresh virtual environment"


def test_readme_commands_exist_in_the_cli():
    from typer.testing import CliRunner

    from pipeline.cli import app

    text = (ROOT / "README.md").read_text(encoding="utf-8")
    used = set(re.findall(r"^shotsmith (\w+)", text, re.M))
    assert used, "the README shows no shotsmith commands"
    for command in used:
        result = CliRunner().invoke(app, [command, "--help"])
        assert result.exit_code == 0, (command, result.output)
