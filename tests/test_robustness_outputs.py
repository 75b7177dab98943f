"""Outputs never harm inputs: SOURCE, the bank and the model are only read; names from user
text stay inside the output folder; nothing is replaced without --overwrite."""

from __future__ import annotations

import os
from pathlib import Path

import pytest
from badfiles import hit, tree_digest, wav_bytes
from modelfiles import model_dict, small_preset
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.config import RenderSpec, load_settings

runner = CliRunner()
QUICK = ["--iterations", "2"]


def _ok(args: list[str]) -> None:
    result = runner.invoke(app, [str(a) for a in args])
    assert result.exit_code == 0, (args, result.output, result.exception)


@pytest.fixture(scope="module")
def world(tmp_path_factory):
    root = tmp_path_factory.mktemp("flow")
    preset = small_preset(root)
    src = root / "library"
    for cat, f0 in (("kick", 70.0), ("hat", 3500.0)):
        (src / cat).mkdir(parents=True)
        for i in range(4):
            (src / cat / f"{cat}_{i:02d}.wav").write_bytes(
                wav_bytes(hit(22050, f0=f0 * (1 + 0.1 * i), seed=i, ch=1 + i % 2), 22050))
    (src / "CON.wav").write_bytes(wav_bytes(hit(16000, seed=7), 16000))
    (src / "broken.wav").write_bytes(b"RIFF\0\0")
    (src / "notes.txt").write_text("kit notes")
    return root, src, preset


def test_no_command_writes_inside_source_or_changes_bank_or_model(world):
    root, src, preset = world
    bank, model = root / "bank", root / "model.pt"
    digests = {"src": tree_digest(src)}

    def unchanged(*names: str) -> None:
        paths = {"src": src, "bank": bank, "model": model}
        for n in names:
            now = tree_digest(paths[n]) if paths[n].is_dir() else paths[n].read_bytes()
            assert now == digests[n], f"{n} changed"

    _ok(["ingest", src, "--bank", bank, "--preset", preset, "--jobs", "1"])
    unchanged("src")
    digests["bank"] = tree_digest(bank)
    spectra = (bank / "spectra.npy").read_bytes()
    _ok(["train", bank, "--model", model, "--preset", preset, "--epochs", "2",
         "--latent-dim", "4"])
    unchanged("src", "bank")
    digests["model"] = model.read_bytes()
    a_file = src / "hat" / "hat_02.wav"
    steps = [
        ["generate", model, "--out", root / "g", "-n", "3", *QUICK],
        ["generate", model, "--out", root / "gn", "-n", "2", "--near", "kick", *QUICK],
        ["interpolate", model, "kick_00", a_file, "--out", root / "i", "--steps", "3", *QUICK],
        ["vary", model, a_file, "--out", root / "v", "-n", "2", *QUICK],
        ["vary", model, src / "CON.wav", "--out", root / "v2", "-n", "1", *QUICK],
        ["inspect", model, "--out", root / "x", "--bank", bank],
        ["resynth", src, "--out", root / "r", "--preset", preset, "--jobs", "1", *QUICK],
        ["ingest", src, "--bank", bank, "--preset", preset, "--jobs", "1"],  # again: reuses
    ]
    for args in steps:
        _ok(args)
        unchanged("src", "model", *(["bank"] if args[0] != "ingest" else []))
    assert (bank / "spectra.npy").read_bytes() == spectra  # the re-ingest reused every clip
    # Every output landed in its own folder and nowhere else.
    outs = {"g", "gn", "i", "v", "v2", "x", "r", "bank", "library", "model.pt", "small.toml"}
    assert {p.name for p in root.iterdir()} == outs
    assert not any(n.upper().startswith("CON.") for n in os.listdir(root / "v2"))


@pytest.mark.parametrize("command", ["generate", "interpolate", "vary", "resynth", "inspect",
                                     "train"])
def test_nothing_is_replaced_without_overwrite(world, tmp_path, command):
    root, src, preset = world
    from modelfiles import write_model_file

    model = write_model_file(tmp_path / "m.pt", load_settings(preset))
    out = tmp_path / "out"
    args = {
        "generate": ["generate", model, "--out", out, "-n", "2", "--seed", "1", *QUICK],
        "interpolate": ["interpolate", model, "kick_00", "hat_01", "--out", out, "--steps", "2",
                        *QUICK],
        "vary": ["vary", model, "kick_00", "--out", out, "-n", "2", *QUICK],
        "resynth": ["resynth", src, "--out", out, "--preset", preset, "--jobs", "1", *QUICK],
        "inspect": ["inspect", model, "--out", out],
        "train": ["train", tmp_path / "bank", "--model", model, "--preset", preset, "--epochs",
                  "1"],
    }[command]
    if command == "train":
        _ok(["ingest", src, "--bank", tmp_path / "bank", "--preset", preset, "--jobs", "1"])
    else:
        _ok(args)
    before = tree_digest(out) if out.exists() else None
    model_bytes = model.read_bytes()
    if command in ("generate", "vary"):  # numbered sounds: a second batch goes after the first
        first = {p.name: p.read_bytes() for p in out.glob("*.wav")}
        _ok(args)
        assert {n: (out / n).read_bytes() for n in first} == first
        assert len(list(out.glob("*.wav"))) == 2 * len(first)
        _ok([*args, "--overwrite"])  # and --overwrite replaces the same names again
        assert len(list(out.glob("*.wav"))) == 2 * len(first)
        return
    result = runner.invoke(app, [str(a) for a in args])  # the same again, without --overwrite
    assert result.exit_code == 1, result.output
    line = result.stderr.strip()
    assert "\n" not in line and "already exists" in line and "--overwrite" in line, line
    assert model.read_bytes() == model_bytes
    if before is not None:
        assert tree_digest(out) == before
    if command != "train":  # and with it, the files are replaced
        _ok([*args, "--overwrite"])


def test_names_from_user_text_stay_inside_the_output_folder(tmp_path):
    from pipeline.create import interpolate_jobs, vary_sound
    from pipeline.modelfile import save_atomic

    settings = load_settings("tiny")
    hostile = ["../../escape", "/etc/passwd", "CON", "nul.txt", "a/b\\c", "..", " ", "x" * 300,
               "C:\\Windows\\win.ini", "~/.bashrc", "\x00null", "com1"]
    d = model_dict(settings, n_clips=len(hostile))
    d["clip_names"] = hostile
    d["clip_categories"] = ["k"] * len(hostile)
    d["categories"] = ["k"]
    model = tmp_path / "work" / "m.pt"
    model.parent.mkdir()
    save_atomic(d, model)
    out = tmp_path / "work" / "out"
    before = set(_all_files(tmp_path))
    for name in hostile:
        vary_sound(model, name, out, n=1, seed=0, render=RenderSpec(iterations=1))
    jobs = tmp_path / "work" / "jobs.toml"
    labels = ["../../up", "/abs/path", "CON", "NUL", "..", "a/../../b", "C:\\x\\y", "lpt1.wav"]
    jobs.write_text("".join(f'[[job]]\nsounds = ["CON", "com1"]\nsteps = 2\nlabel = {lab!r}\n'
                            .replace("'", '"').replace("\\", "\\\\") for lab in labels))
    interpolate_jobs(model, jobs, out, seed=0, render=RenderSpec(iterations=1))
    new = set(_all_files(tmp_path)) - before - {jobs}
    assert new and all(p.parent == out for p in new), sorted(map(str, new))
    names = [p.name for p in new]
    assert len(names) == len(hostile) + 2 * len(labels) + 1  # + manifest.json
    reserved = {"CON", "PRN", "AUX", "NUL"} | {f"{d}{i}" for d in ("COM", "LPT") for i in range(10)}
    for n in names:
        stem = n.split(".")[0].upper()
        assert stem not in reserved and not n.startswith(".") and len(n.encode()) <= 255, n
        assert "/" not in n and "\\" not in n and "\x00" not in n and ".." not in n, n


def _all_files(root: Path) -> list[Path]:
    return [Path(d, f) for d, _, files in os.walk(root) for f in files]


@pytest.fixture(scope="module")
def library_model(world, tmp_path_factory):
    """A bank of the world's library and a model file that records that bank."""
    from modelfiles import model_dict

    from pipeline.modelfile import save_atomic

    root, src, preset = world
    work = tmp_path_factory.mktemp("lib")
    _ok(["ingest", src, "--bank", work / "bank", "--preset", preset, "--jobs", "1"])
    d = model_dict(load_settings(preset))
    d["bank"]["path"] = str((work / "bank").resolve())
    save_atomic(d, work / "m.pt")
    return work / "bank", work / "m.pt"


@pytest.mark.parametrize("via", ["path", "symlink"])
@pytest.mark.parametrize("command", ["generate", "vary", "interpolate", "train", "inspect"])
def test_no_output_goes_inside_the_library(world, library_model, tmp_path, command, via):
    """The model records its bank and the bank its source: outputs inside that library would
    be taken for library sounds by the next ingest, so each command refuses them."""
    root, src, preset = world
    bank, model = library_model
    inside = src / "renders"
    if via == "symlink":  # the same folder under another name
        (tmp_path / "lib").symlink_to(src, target_is_directory=True)
        inside = tmp_path / "lib" / "renders"
    target = inside / "m.pt" if command == "train" else inside
    args = {
        "generate": ["generate", model, "--out", target, "-n", "1", *QUICK],
        "vary": ["vary", model, "kick_00", "--out", target, "-n", "1", *QUICK],
        "interpolate": ["interpolate", model, "kick_00", "hat_01", "--out", target, *QUICK],
        "train": ["train", bank, "--model", target, "--preset", preset, "--epochs", "1"],
        "inspect": ["inspect", model, "--out", target, "--bank", bank],
    }[command]
    if command == "train":
        inside.mkdir(exist_ok=True)  # a model file needs an existing folder
    before = tree_digest(src)
    result = runner.invoke(app, [str(a) for a in args])
    assert result.exit_code == 1, result.output
    option = "--model" if command == "train" else "--out"
    assert result.stderr.strip() == (
        f"error: {target}: {option} must not be inside the library {src.resolve()} (the source "
        f"of bank {bank.resolve()}): the next ingest would take what is written there for "
        "library sounds")
    if command == "train":
        inside.rmdir()
    assert tree_digest(src) == before and not inside.exists()


def test_long_interpolation_names_keep_their_steps_and_never_collide(tmp_path):
    """Two morphs whose clip names share a long beginning: each file keeps its step number
    (so the files sort in path order) and the two requests get different names."""
    from pipeline.create import interpolate_sounds
    from pipeline.modelfile import save_atomic

    settings = load_settings("tiny")
    d = model_dict(settings, n_clips=3)
    stem = "field recording, rain on a tin roof, close microphone " * 3
    d["clip_names"] = [stem + "take 1", stem + "take 2", "kick"]
    model = tmp_path / "m.pt"
    save_atomic(d, model)
    out = tmp_path / "out"
    runs = [interpolate_sounds(model, [a, "kick"], out, steps=12, seed=0,
                               render=RenderSpec(iterations=1))["files"]
            for a in (stem + "take 1", stem + "take 2")]  # the second without --overwrite
    for files in runs:
        assert files == sorted(files) and len(set(files)) == 12
        assert [f.rsplit("-", 1)[1] for f in files] == [f"{i:02d}.wav" for i in range(12)]
        assert all(len(f.encode()) <= 255 for f in files)
    assert set(runs[0]).isdisjoint(runs[1])
    assert len(list(out.glob("*.wav"))) == 24
