"""shotsmith export: kept sounds to a kit folder, a kit manifest and an SFZ instrument.

The SFZ is checked by sfzlint (PyPI), an SFZ parser and linter written outside this
project, which exits 0 even when it reports errors: every line it prints fails the test.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
from listenkit import make_listen_kit
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.errors import OutputError, ParameterError, ShotsmithError
from pipeline.kit import export_kit
from pipeline.kit_layout import GM1_PERCUSSION, assign_keys, gm_keys, velocity_ranges
from pipeline.listen import load_picks, set_pick

runner = CliRunner()


@pytest.fixture(scope="module")
def kit(tmp_path_factory):
    return make_listen_kit(tmp_path_factory.mktemp("kit-export"))


@pytest.fixture
def marked(kit, tmp_path):
    """Copies of the two output folders with a few marks."""
    long, short = tmp_path / "long", tmp_path / "short"
    shutil.copytree(kit.long, long)
    shutil.copytree(kit.short, short)
    for f in ("vary-kick_01-00.wav", "vary-kick_01-02.wav", "generate-0001.wav"):
        set_pick(long, f, "keep")
    set_pick(long, "generate-0000.wav", "reject")
    set_pick(short, "short-1.wav", "keep")
    return long, short


@pytest.fixture(scope="module", autouse=True)
def _sfzlint_cache(tmp_path_factory):
    """sfzlint keeps a parsed copy of its opcode tables in the user's cache: use a private one."""
    _CACHE.append(str(tmp_path_factory.mktemp("sfzlint-cache")))


_CACHE: list[str] = []


def sfzlint(path: Path, *spec: str) -> list[str]:
    """sfzlint's report lines for ``path`` (it exits 0 whatever it finds)."""
    exe = Path(sys.executable).with_name("sfzlint")
    env = {**os.environ, "XDG_CACHE_HOME": _CACHE[-1]}
    out = subprocess.run([str(exe), *spec, str(path)], capture_output=True, text=True,
                         check=True, env=env)
    return [line for line in (out.stdout + out.stderr).splitlines() if line.strip()]


def regions(sfz: Path) -> list[dict[str, str]]:
    """Each ``<region>`` with its own opcodes merged over its ``<group>``'s (SFZ 1 inheritance)."""
    group: dict[str, str] = {}
    found = []
    for raw in sfz.read_text(encoding="utf-8").splitlines():
        line = raw.split("//", 1)[0].strip()
        if not line:
            continue
        header, _, rest = line.partition(">")
        ops = dict(tok.split("=", 1) for tok in rest.split())
        if header == "<group":
            group = ops
        else:
            assert header == "<region", line
            found.append(group | ops)
    return found


def check_sfz(sfz: Path, *, sfz1: bool = False) -> list[dict[str, str]]:
    # an outside parser: no error lines (":E"), and no lines at all; with sfz1, also when it
    # checks against the SFZ 1 opcodes only (what every SFZ player reads)
    for spec in ((), ("--spec-version", "v1", "--"))[: 2 if sfz1 else 1]:
        report = sfzlint(sfz, *spec)
        assert not [r for r in report if ":E " in r], report
        assert report == [], report
    regs = regions(sfz)
    for r in regs:
        assert (sfz.parent / r["sample"]).is_file(), r["sample"]  # relative to the .sfz
        assert r["lokey"] == r["hikey"] == r["pitch_keycenter"]
        assert r.get("loop_mode") == "one_shot"
    # regions on one key are layered on purpose: distinct velocity ranges or round robins
    by_key: dict[str, list[dict[str, str]]] = {}
    for r in regs:
        by_key.setdefault(r["lokey"], []).append(r)
    for key, rs in by_key.items():
        if len(rs) == 1:
            continue
        if "seq_length" in rs[0]:
            assert {r["seq_length"] for r in rs} == {str(len(rs))}, key
            assert sorted(int(r["seq_position"]) for r in rs) == list(range(1, len(rs) + 1))
        else:
            spans = sorted((int(r["lovel"]), int(r["hivel"])) for r in rs)
            assert spans[0][0] == 1 and spans[-1][1] == 127, key
            assert all(b[0] == a[1] + 1 for a, b in zip(spans, spans[1:])), spans
    return regs


def test_kept_sounds_become_a_kit(marked, kit, tmp_path):
    long, short = marked
    out = tmp_path / "my kit"
    s = export_kit([long, short], out, bank=kit.bank)
    assert s["sounds"] == 4 and s["selection"] == "kept"
    sfz = Path(s["sfz"])
    assert sfz.name == "my_kit.sfz"
    regs = check_sfz(sfz)
    manifest = json.loads((out / "kit.json").read_text(encoding="utf-8"))
    assert len(regs) == len(manifest["sounds"]) == 4
    sources = {(Path(e["from"]["folder"]).name, e["from"]["file"]) for e in manifest["sounds"]}
    assert sources == {("long", "vary-kick_01-00.wav"), ("long", "vary-kick_01-02.wav"),
                       ("long", "generate-0001.wav"), ("short", "short-1.wav")}
    umask = os.umask(0)
    os.umask(umask)
    for e in manifest["sounds"]:  # byte-identical copies of what was kept
        original = Path(e["from"]["folder"]) / e["from"]["file"]
        assert (out / e["file"]).read_bytes() == original.read_bytes()
        assert e["from"]["mark"] == "keep"
        assert (out / e["file"]).stat().st_mode & 0o777 == 0o666 & ~umask
    assert sfz.stat().st_mode & 0o777 == 0o666 & ~umask
    vary = [e for e in manifest["sounds"] if e["kind"] == "vary"]
    assert {e["key"] for e in vary} == {35} and {e["seq_position"] for e in vary} == {1, 2}
    kick = next(e for e in manifest["sounds"] if e["from"]["file"] == "generate-0001.wav")
    assert kick["key"] == 36 and kick["category"] == "kick"


def test_all_sounds_with_layers_and_round_robins(kit, tmp_path):
    s = export_kit([kit.long, kit.short], tmp_path / "kit", include_all=True, bank=kit.bank)
    assert s["sounds"] == 12
    regs = check_sfz(Path(s["sfz"]), sfz1=True)
    steps = sorted((int(r["lovel"]), r["sample"]) for r in regs if "lovel" in r)
    assert [v for v, _ in steps] == [lo for lo, _ in velocity_ranges(4)]
    # soft plays the first step of the interpolation, hard the last
    manifest = json.loads((tmp_path / "kit" / "kit.json").read_text())
    step_of = {e["file"]: e["step"] for e in manifest["sounds"] if e["kind"] == "interpolate"}
    assert [step_of[sample] for _, sample in steps] == [0, 1, 2, 3]
    assert sum("seq_position" in r for r in regs) == 3


def test_gm_layout_uses_the_gm1_percussion_keys(kit, tmp_path):
    # General MIDI Level 1 percussion key map (MMA 1991; tests/references.md section 13):
    # 36 Bass Drum 1, 38 Acoustic Snare, 42 Closed Hi-Hat
    assert GM1_PERCUSSION[36] == "Bass Drum 1" and GM1_PERCUSSION[38] == "Acoustic Snare"
    assert GM1_PERCUSSION[42] == "Closed Hi-Hat" and GM1_PERCUSSION[46] == "Open Hi-Hat"
    assert min(GM1_PERCUSSION) == 35 and max(GM1_PERCUSSION) == 81 and len(GM1_PERCUSSION) == 47
    assert gm_keys("Kicks")[0] == 36 and gm_keys("snare")[0] == 38 and gm_keys("hi-hat")[0] == 42
    assert gm_keys("open hat") == (46,) and gm_keys("clap") == (39,) and gm_keys("rim") == (37,)
    assert gm_keys("toms")[0] == 45 and gm_keys("cowbell") == (56,)
    assert gm_keys("ride bell") == (53,)
    assert gm_keys("pluck") == () and gm_keys("bell") == () and gm_keys("chat") == ()
    keys = assign_keys(["kick", "kick", "kick", "pluck", None, "snare", "hat"], "gm")
    assert keys[:3] == [36, 35, 82] and keys[5] == 38 and keys[6] == 42
    assert len(set(keys)) == len(keys)


@pytest.mark.parametrize("layout", ["chromatic", "octaves"])
def test_other_layouts(kit, tmp_path, layout):
    s = export_kit([kit.long], tmp_path / layout, include_all=True, bank=kit.bank, layout=layout)
    regs = check_sfz(Path(s["sfz"]))
    keys = sorted({int(r["lokey"]) for r in regs})
    if layout == "chromatic":
        assert keys == list(range(36, 36 + len(keys)))
    else:  # hat, kick, snare: one octave each from C1 (24)
        assert {k // 12 for k in keys} == {2, 3, 4}
    cats = ["a"] * 13
    with pytest.raises(ParameterError, match="do not fit one octave"):
        assign_keys(cats, "octaves")
    assert assign_keys(cats, "chromatic") == list(range(36, 49))
    assert assign_keys(["x"] * 128, "chromatic") == list(range(128))
    with pytest.raises(ParameterError, match="128 keys"):
        assign_keys(["x"] * 129, "chromatic")


def test_velocity_ranges_tile_1_to_127():
    for n in (1, 2, 3, 7, 64, 127):
        spans = velocity_ranges(n)
        covered = [v for lo, hi in spans for v in range(lo, hi + 1)]
        assert covered == list(range(1, 128)), n


def test_existing_kit_is_not_overwritten(marked, tmp_path):
    out = tmp_path / "k"
    export_kit(list(marked), out)
    before = {p: p.read_bytes() for p in out.rglob("*") if p.is_file()}
    with pytest.raises(OutputError, match="already exists; pass --overwrite"):
        export_kit(list(marked), out)
    assert {p: p.read_bytes() for p in out.rglob("*") if p.is_file()} == before
    export_kit(list(marked), out, overwrite=True)
    assert not [p for p in out.rglob(".*.tmp-*")]


def test_nothing_kept_and_bad_requests(kit, marked, tmp_path):
    with pytest.raises(ShotsmithError, match="no kept sounds.*--all"):
        export_kit([kit.long], tmp_path / "k")
    with pytest.raises(OutputError, match="must not be inside"):
        export_kit(list(marked), marked[0] / "kit")
    with pytest.raises(OutputError, match="must not be inside the library"):
        export_kit(list(marked), kit.source / "kick" / "kit", bank=kit.bank)
    assert not (kit.source / "kick" / "kit").exists()
    with pytest.raises(ParameterError, match=r"unknown field \{nope\}"):
        export_kit(list(marked), tmp_path / "k", name="{nope}_{n}")
    with pytest.raises(ParameterError, match="layout"):
        export_kit(list(marked), tmp_path / "k", layout="qwerty")
    assert not (tmp_path / "k").exists()


def test_names_are_safe_and_unique(marked, tmp_path):
    s = export_kit(list(marked), tmp_path / "k", name="../{kind} = #x")
    names = sorted(p.name for p in (tmp_path / "k" / "samples").iterdir())
    assert len(names) == s["sounds"] == 4 and len(set(names)) == 4
    assert all(re.fullmatch(r"[\w.\-]+\.wav", n) for n in names), names
    check_sfz(Path(s["sfz"]))


def test_rejected_unmarked_and_changed_sounds_stay_out(marked, tmp_path):
    long, short = marked
    (long / "generate-0001.wav").write_bytes((long / "generate-0002.wav").read_bytes())
    assert "generate-0001.wav" not in load_picks(long)  # marked before it changed
    s = export_kit([long, short], tmp_path / "k")
    files = {e["from"]["file"] for e in json.loads(Path(s["manifest"]).read_text())["sounds"]}
    assert files == {"vary-kick_01-00.wav", "vary-kick_01-02.wav", "short-1.wav"}


def test_without_a_bank_categories_come_from_near(marked, tmp_path):
    s = export_kit(list(marked), tmp_path / "k")
    manifest = json.loads(Path(s["manifest"]).read_text())
    assert {e["category"] for e in manifest["sounds"]} == {None}
    check_sfz(Path(s["sfz"]))


def test_cli_export(marked, kit, tmp_path):
    out = tmp_path / "cli-kit"
    args = ["export", *map(str, marked), "--out", str(out), "--bank", str(kit.bank)]
    result = runner.invoke(app, [*args, "--json"])
    assert result.exit_code == 0, result.output
    assert json.loads(result.stdout)["sounds"] == 4
    again = runner.invoke(app, args)
    assert again.exit_code == 1 and again.output.startswith("error: ")
    assert len(again.output.strip().splitlines()) == 1
    assert runner.invoke(app, [*args, "--overwrite", "--layout", "nope"]).exit_code == 2
    missing = runner.invoke(app, ["export", str(tmp_path), "--out", str(tmp_path / "x")])
    assert missing.exit_code == 1 and "no manifest.json" in missing.output
