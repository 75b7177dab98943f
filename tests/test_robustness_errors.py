"""Clear errors everywhere: every command, driven with bad inputs through the CLI.

A user-caused failure is one line on stderr, ``error: <file or option>: <reason>``, exit code
1; a usage error (a bad flag value, a missing argument) is exit code 2; no traceback unless
``--debug``.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest
from badfiles import hit, tree_digest, wav_bytes
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.config import load_settings

runner = CliRunner()
TINY = load_settings("tiny")


@pytest.fixture(scope="module")
def w(tmp_path_factory) -> dict[str, Path]:
    """A small world of good and bad inputs; the keys are used in the cases below."""
    from modelfiles import write_model_file

    from pipeline.ingest import ingest_folder

    root = tmp_path_factory.mktemp("world")
    src = root / "kit"
    for cat in ("kick", "hat"):
        (src / cat).mkdir(parents=True)
        for i in range(3):
            (src / cat / f"{cat}_{i:02d}.wav").write_bytes(
                wav_bytes(hit(16000, f0=80 + 40 * i if cat == "kick" else 3000, seed=i), 16000))
    (src / "bad.wav").write_bytes(b"RIFF")
    ingest_folder(src, root / "bank", TINY, jobs=1)
    paths = {
        "src": src, "bank": root / "bank", "model": write_model_file(root / "m.pt", TINY),
        "file": root / "a file.txt", "empty": root / "empty dir", "textdir": root / "only text",
        "badtoml": root / "bad.toml", "unknownkey": root / "unknown.toml",
        "jobs_bad": root / "jobs.toml", "jobs_key": root / "jobs2.toml",
        "jobs_csv": root / "jobs.csv", "jobs_ext": root / "jobs.txt",
        "foreign": root / "foreign bank", "existing": root / "existing out",
        "badwav": src / "bad.wav", "nan": root / "nan.wav", "out": root / "out",
    }
    paths["file"].write_text("not a folder")
    paths["empty"].mkdir()
    paths["textdir"].mkdir()
    (paths["textdir"] / "notes.wav").write_text("not audio")
    paths["badtoml"].write_text("[audio\nsample_rate = ")
    paths["unknownkey"].write_text("[audio]\nsample_rte = 16000\n")
    paths["jobs_bad"].write_text("[[job]]\nsounds = 3\n")
    paths["jobs_key"].write_text('[[job]]\nsounds = ["kick_00", "hat_01"]\nspeed = 2\n')
    paths["jobs_csv"].write_text("first,last\nkick_00,hat_01\n")
    paths["jobs_ext"].write_text("kick_00 hat_01\n")
    paths["foreign"].mkdir()
    (paths["foreign"] / "index.json").write_text('{"someone": "else"}')
    paths["existing"].mkdir()
    (paths["existing"] / "interpolate-kick_00-to-hat_01-00.wav").write_bytes(b"my own file")
    y = hit(16000)
    y[10] = float("nan")
    paths["nan"].write_bytes(wav_bytes(y, 16000, subtype="FLOAT"))
    # round two: non-finite and unbounded preset values, odd jobs files
    for name, line in {"p_nan": "[audio]\npreroll_ms = nan", "p_inf": "[render]\nfade_in_ms = inf",
                       "p_nfft": "[audio]\nn_fft = 1048576\nduration = 30.0",
                       "p_huge": "[train]\nepochs = 9223372036854775807",
                       "p_table": "audio = 3", "p_seed": "[train]\nseed = -1"}.items():
        paths[name] = root / f"{name}.toml"
        paths[name].write_text(line + "\n")
    job = '[[job]]\nsounds = ["kick_00", "hat_01"]\n'
    for name, text in {"j_nostart.csv": "start,end\n,hat_01\n",
                       "j_short.csv": "end,start\nhat_01\n",
                       "j_frac.csv": "start,end,steps\nkick_00,hat_01,2.7\n",
                       "j_frac.toml": job + "steps = 2.7\n",
                       "j_many.toml": job + "steps = 1000000000\n",
                       "j_total.toml": (job + "steps = 60000\n") * 2,
                       "j_notlist.toml": "job = 3\n",
                       "j_label.toml": job + "label = [1]\n"}.items():
        key = name.replace(".", "_")
        paths[key] = root / name
        paths[key].write_text(text)
    one = root / "one sound"  # a library of one file ingests, and then?
    one.mkdir()
    (one / "kick.wav").write_bytes(wav_bytes(hit(16000), 16000))
    ingest_folder(one, root / "bank1", TINY, jobs=1)
    paths["bank1"] = root / "bank1"
    paths["model1"] = write_model_file(root / "m1.pt", TINY, n_clips=1)
    paths["src_digest"] = tree_digest(src)
    return paths


# (argv with {key} placeholders, exit code, fragments the one line must contain)
CASES = [
    # ingest
    (["ingest", "{src}/missing", "--bank", "{out}/b"], 1, ["missing", "not found"]),
    (["ingest", "{file}", "--bank", "{out}/b"], 1, ["a file.txt", "must be a folder"]),
    (["ingest", "{src}", "--bank", "{src}/bank"], 1, ["bank", "inside the source folder"]),
    (["ingest", "{src}", "--bank", "{file}"], 1, ["a file.txt", "not a folder"]),
    (["ingest", "{src}", "--bank", "{foreign}"], 1, ["index.json", "not a shotsmith bank"]),
    (["ingest", "{empty}", "--bank", "{out}/b1"], 1, ["no usable audio files", "empty dir"]),
    (["ingest", "{textdir}", "--bank", "{out}/b2"], 1, ["no usable audio", "1 skipped"]),
    (["ingest", "{src}", "--bank", "{out}/b", "--preset", "nosuch"], 1, ["nosuch"]),
    (["ingest", "{src}", "--bank", "{out}/b", "--preset", "drum"], 1,
     ["unknown preset 'drum'", "did you mean 'drums'?"]),
    (["ingest", "{src}", "--bank", "{out}/b", "--preset", "{badtoml}"], 1,
     ["bad.toml", "not valid TOML"]),
    (["ingest", "{src}", "--bank", "{out}/b", "--preset", "{unknownkey}"], 1, ["sample_rte"]),
    (["ingest", "{src}", "--bank", "{out}/b", "--sample-rate", "100"], 2,
     ["--sample-rate", "100 must be between 4000 and 192000 Hz"]),
    (["ingest", "{src}", "--bank", "{out}/b", "--duration", "0"], 2, ["--duration"]),
    (["ingest", "{src}", "--bank", "{out}/b", "--jobs", "0"], 2, []),
    (["ingest", "{src}", "--bank", "{out}/b", "--jobs", "100000"], 2, ["--jobs"]),
    (["resynth", "{src}", "--out", "{out}/r", "--jobs", "100000"], 2, ["--jobs"]),
    (["ingest", "{src}"], 2, []),
    # resynth
    (["resynth", "{src}/missing", "--out", "{out}/r"], 1, ["missing", "not found"]),
    (["resynth", "{src}", "--out", "{src}/r"], 1, ["r", "inside the source folder"]),
    (["resynth", "{src}", "--out", "{file}"], 1, ["a file.txt", "not a folder"]),
    (["resynth", "{textdir}", "--out", "{out}/r2"], 1, ["no usable audio files", "notes.wav"]),
    (["resynth", "{src}", "--out", "{out}/r", "--bit-depth", "12"], 2, ["--bit-depth", "'12'"]),
    (["resynth", "{src}", "--out", "{out}/r", "--peak-db", "3"], 2, ["--peak-db", "3.0"]),
    (["resynth", "{src}", "--out", "{out}/r", "--iterations", "-1"], 2, ["--iterations"]),
    (["resynth", "{src}", "--out", "{out}/r", "--loudness", "-99"], 2, ["--loudness", "-99"]),
    (["resynth", "{src}", "--out", "{out}/r", "--preset", "tny"], 1, ["did you mean 'tiny'?"]),
    # train
    (["train", "{out}/nobank", "--model", "{out}/m.pt"], 1, ["nobank", "not found"]),
    (["train", "{empty}", "--model", "{out}/m.pt"], 1, ["index.json", "not found"]),
    (["train", "{bank}", "--model", "{out}/no/such/m.pt"], 1, ["m.pt", "does not exist"]),
    (["train", "{bank}", "--model", "{empty}"], 1, ["empty dir", "is a folder"]),
    (["train", "{bank}", "--model", "{model}"], 1, ["m.pt", "already exists"]),
    (["train", "{bank}", "--model", "{out}/r.pt", "--resume"], 1, ["r.pt.ckpt", "no checkpoint"]),
    (["train", "{bank}", "--model", "{out}/d.pt", "--device", "tpu"], 1, ["device", "tpu"]),
    (["train", "{bank}", "--model", "{out}/l.pt", "--latent-dim", "100000"], 2,
     ["--latent-dim", "100000 must be between 1 and 512"]),
    (["train", "{bank}", "--model", "{out}/e.pt", "--epochs", "0"], 2, ["--epochs"]),
    (["train", "{bank}", "--model", "{out}/b.pt", "--beta", "-1"], 2, ["--beta"]),
    (["train", "{bank}", "--model", "{out}/s.pt", "--batch-size", "0"], 2, ["--batch-size"]),
    (["train", "{bank}", "--model", "{out}/p.pt", "--preset", "dums"], 1,
     ["did you mean 'drums'?"]),
    # generate
    (["generate", "{out}/none.pt", "--out", "{out}/g"], 1, ["none.pt", "not found"]),
    (["generate", "{file}", "--out", "{out}/g"], 1, ["a file.txt", "not a shotsmith model"]),
    (["generate", "{badwav}", "--out", "{out}/g"], 1, ["bad.wav", "not a shotsmith model"]),
    (["generate", "{bank}", "--out", "{out}/g"], 1, ["bank", "is a folder"]),
    (["generate", "{model}", "--out", "{file}"], 1, ["a file.txt", "not a folder"]),
    (["generate", "{model}", "--out", "{out}/g", "--near", "snare"], 1, ["snare", "kick"]),
    (["interpolate", "{model}", "kick_00", "hat_01", "--out", "{existing}", "--steps", "2"], 1,
     ["interpolate-kick_00-to-hat_01-00.wav", "already exists", "--overwrite"]),
    (["generate", "{model}", "--out", "{out}/g", "-n", "0"], 2, []),
    (["generate", "{model}", "--out", "{out}/g", "--temperature", "-1"], 2, []),
    (["generate", "{model}", "--out", "{out}/g", "--bit-depth", "8"], 2, ["--bit-depth"]),
    (["generate", "{model}", "--out", "{out}/g", "--loudness", "-80"], 2, ["--loudness"]),
    # interpolate
    (["interpolate", "{model}", "kick_00", "--out", "{out}/i"], 2, []),
    (["interpolate", "{model}", "kick_00", "nothing", "--out", "{out}/i"], 1,
     ["'nothing'", "neither a clip"]),
    (["interpolate", "{model}", "kick_00", "{badwav}", "--out", "{out}/i"], 1,
     ["bad.wav", "not a readable audio file"]),
    (["interpolate", "{model}", "kick_00", "{nan}", "--out", "{out}/i"], 1,
     ["nan.wav", "NaN"]),
    (["interpolate", "{model}", "kick_00", "{src}", "--out", "{out}/i"], 1, ["neither a clip"]),
    (["interpolate", "{model}", "kick", "hat_01", "--out", "{out}/i"], 1,
     ["'kick' matches 3 clips"]),
    (["interpolate", "{model}", "kick_00", "hat_01", "--out", "{out}/i", "--path", "cubic"], 2,
     []),
    (["interpolate", "{model}", "kick_00", "hat_01", "--out", "{out}/i", "--steps", "1"], 2, []),
    (["interpolate", "{model}", "--jobs-file", "{out}/none.toml", "--out", "{out}/i"], 1,
     ["none.toml", "cannot read jobs file"]),
    (["interpolate", "{model}", "--jobs-file", "{badtoml}", "--out", "{out}/i"], 1,
     ["bad.toml", "not valid TOML"]),
    (["interpolate", "{model}", "--jobs-file", "{jobs_bad}", "--out", "{out}/i"], 1,
     ["jobs.toml", "job 1", "sounds"]),
    (["interpolate", "{model}", "--jobs-file", "{jobs_key}", "--out", "{out}/i"], 1,
     ["jobs2.toml", "'speed'"]),
    (["interpolate", "{model}", "--jobs-file", "{jobs_csv}", "--out", "{out}/i"], 1,
     ["jobs.csv", "'start' and 'end'"]),
    (["interpolate", "{model}", "--jobs-file", "{jobs_ext}", "--out", "{out}/i"], 1,
     ["jobs.txt", ".csv or .toml"]),
    (["interpolate", "{model}", "a", "b", "--jobs-file", "{jobs_key}", "--out", "{out}/i"], 2,
     []),
    # vary
    (["vary", "{model}", "snare_99", "--out", "{out}/v"], 1, ["'snare_99'", "neither a clip"]),
    (["vary", "{model}", "{badwav}", "--out", "{out}/v"], 1, ["bad.wav", "not a readable"]),
    (["vary", "{model}", "{out}/ghost.wav", "--out", "{out}/v"], 1, ["ghost.wav"]),
    (["vary", "{model}", "kick_00", "--out", "{out}/v", "--amount", "-1"], 2, []),
    (["vary", "{model}", "kick_00", "--out", "{out}/v", "-n", "0"], 2, []),
    (["vary", "{model}", "--out", "{out}/v"], 2, []),
    # inspect
    (["inspect", "{out}/none.pt", "--out", "{out}/x"], 1, ["none.pt", "not found"]),
    (["inspect", "{model}", "--out", "{out}/x", "--bank", "{out}/nobank"], 1, ["nobank"]),
    (["inspect", "{model}", "--out", "{file}"], 1, ["a file.txt"]),
    # demo
    (["demo", "--out", "{file}"], 1, ["a file.txt"]),
    (["demo", "--epochs", "0"], 2, []),
    # the app itself
    (["nosuchcommand"], 2, []),
    # round two (issue 13): seeds, counts, spreads, non-finite and unbounded settings, jobs
    *[([cmd, *pre, "--out", "{out}/s", "--seed", "-1"], 2, ["--seed"]) for cmd, pre in
      (("generate", ["{model}"]), ("vary", ["{model}", "kick_00"]),
       ("interpolate", ["{model}", "kick_00", "hat_01"]), ("inspect", ["{model}"]))],
    (["train", "{bank}", "--model", "{out}/s.pt", "--seed", "-1"], 2, ["--seed"]),
    (["train", "{bank}", "--model", "{out}/s.pt", "--seed", str(2**64)], 2, ["--seed"]),
    (["train", "{bank}", "--model", "{out}/s.pt", "--preset", "{p_seed}"], 1,
     ["p_seed.toml", "train.seed", "-1 must be between 0 and 4294967295"]),
    (["generate", "{model}", "--out", "{out}/g", "--temperature", "1e300"], 2, ["--temperature"]),
    (["generate", "{model}", "--out", "{out}/g", "--temperature", "nan"], 2, ["--temperature"]),
    (["vary", "{model}", "kick_00", "--out", "{out}/v", "--amount", "1e300"], 2, ["--amount"]),
    (["generate", "{model}", "--out", "{out}/g", "-n", "1000000000"], 2, ["-n"]),
    (["vary", "{model}", "kick_00", "--out", "{out}/v", "-n", "1000000000"], 2, ["-n"]),
    (["interpolate", "{model}", "kick_00", "hat_01", "--out", "{out}/i", "--steps",
      "1000000000"], 2, ["--steps"]),
    (["ingest", "{src}", "--bank", "{out}/b", "--preset", "{p_nan}"], 1,
     ["p_nan.toml", "audio.preroll_ms", "nan must be a finite number"]),
    (["ingest", "{src}", "--bank", "{out}/b", "--duration", "nan"], 2, ["--duration", "finite"]),
    (["train", "{bank}", "--model", "{out}/f.pt", "--preset", "{p_inf}"], 1,
     ["p_inf.toml", "render.fade_in_ms", "inf must be a finite number"]),
    (["train", "{bank}", "--model", "{out}/f.pt", "--beta", "nan"], 2, ["--beta", "finite"]),
    (["ingest", "{src}", "--bank", "{out}/b", "--preset", "{p_nfft}"], 1,
     ["p_nfft.toml", "audio.n_fft", "1048576 must be between 64 and 65536"]),
    (["train", "{bank}", "--model", "{out}/f.pt", "--preset", "{p_huge}"], 1,
     ["p_huge.toml", "train.epochs", "must be between 1 and 1000000"]),
    (["train", "{bank}", "--model", "{out}/f.pt", "--preset", "{p_table}"], 1,
     ["p_table.toml", "[audio] must be a table"]),
    (["interpolate", "{model}", "--jobs-file", "{j_nostart_csv}", "--out", "{out}/i"], 1,
     ["j_nostart.csv", "line 2", "'start'"]),
    (["interpolate", "{model}", "--jobs-file", "{j_short_csv}", "--out", "{out}/i"], 1,
     ["j_short.csv", "line 2", "'start'"]),
    (["interpolate", "{model}", "--jobs-file", "{j_frac_csv}", "--out", "{out}/i"], 1,
     ["j_frac.csv", "line 2", "'2.7' is not a whole number"]),
    (["interpolate", "{model}", "--jobs-file", "{j_frac_toml}", "--out", "{out}/i"], 1,
     ["j_frac.toml", "job 1", "2.7 is not a whole number"]),
    (["interpolate", "{model}", "--jobs-file", "{j_many_toml}", "--out", "{out}/i"], 1,
     ["j_many.toml", "job 1", "must be between 2 and 100000"]),
    (["interpolate", "{model}", "--jobs-file", "{j_total_toml}", "--out", "{out}/i"], 1,
     ["j_total.toml", "120000 sounds", "at most 100000"]),
    (["interpolate", "{model}", "--jobs-file", "{j_notlist_toml}", "--out", "{out}/i"], 1,
     ["j_notlist.toml", "[[job]] tables"]),
    (["interpolate", "{model}", "--jobs-file", "{j_label_toml}", "--out", "{out}/i"], 1,
     ["j_label.toml", "label [1] must be text"]),
    (["train", "{bank1}", "--model", "{out}/one.pt"], 1,
     ["bank1", "holds 1 clip", "needs at least 2"]),
    (["generate", "{model1}", "--out", "{out}/g1"], 1, ["m1.pt", "holds 1 clip", "at least 2"]),
    (["vary", "{model1}", "kick_00", "--out", "{out}/v1"], 1, ["m1.pt", "holds 1 clip"]),
    (["inspect", "{model1}", "--out", "{out}/x1"], 1, ["m1.pt", "holds 1 clip"]),
]


def _argv(args: list[str], w: dict[str, Path]) -> list[str]:
    return [a.format(**{k: str(v) for k, v in w.items()}) if "{" in a else a for a in args]


@pytest.mark.parametrize("args, code, fragments", CASES, ids=[" ".join(c[0])[:60] for c in CASES])
def test_bad_input_is_one_clear_line(w, args, code, fragments):
    argv = _argv(args, w)
    result = runner.invoke(app, argv)
    assert result.exit_code == code, (argv, result.output, result.exception)
    assert "Traceback" not in result.output
    if code == 1:
        lines = result.stderr.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith("error: "), result.output
        for frag in fragments:
            assert frag in lines[0], (frag, lines[0])
        assert result.stdout == ""  # stdout stays clean for --json consumers
    else:  # usage errors: click's usage message, naming the option
        assert result.stderr.strip(), result.output
        assert "Usage" in result.stderr or "No such command" in result.stderr
        for frag in fragments:
            assert frag in result.stderr, (frag, result.stderr)


def test_every_command_is_exercised():
    commands = {c[0][0] for c in CASES}
    assert commands >= {"ingest", "resynth", "train", "generate", "interpolate", "vary",
                        "inspect", "demo"}
    assert sum(c[1] == 1 for c in CASES) >= 40 and sum(c[1] == 2 for c in CASES) >= 20


def test_nothing_was_written_by_the_failures(w):
    """The failing commands above wrote nothing next to the good inputs."""
    mine = w["existing"] / "interpolate-kick_00-to-hat_01-00.wav"
    assert mine.read_bytes() == b"my own file"
    assert sorted(p.name for p in w["existing"].iterdir()) == [mine.name]
    assert sorted(p.name for p in w["foreign"].iterdir()) == ["index.json"]
    assert not (w["src"] / "bank").exists() and not (w["src"] / "r").exists()
    assert tree_digest(w["src"]) == w["src_digest"]  # the library is byte for byte as it was


def test_debug_shows_the_traceback(tmp_path):
    argv = ["ingest", str(tmp_path / "none"), "--bank", str(tmp_path / "b")]
    plain = subprocess.run([sys.executable, "-m", "pipeline", *argv], capture_output=True,
                           text=True, timeout=120)
    assert plain.returncode == 1 and "Traceback" not in plain.stderr
    assert plain.stderr.strip().splitlines() == [f"error: {tmp_path / 'none'}: source folder "
                                                 "not found"]
    debug = subprocess.run([sys.executable, "-m", "pipeline", "--debug", *argv],
                           capture_output=True, text=True, timeout=120)
    assert debug.returncode == 1 and "Traceback" in debug.stderr
    assert "ParameterError" in debug.stderr


def test_a_foreign_manifest_in_out_is_not_replaced_without_overwrite(w, tmp_path):
    out = tmp_path / "project"
    out.mkdir()
    (out / "manifest.json").write_text('{"my": "own notes"}')
    args = ["generate", str(w["model"]), "--out", str(out), "-n", "1", "--iterations", "1"]
    result = runner.invoke(app, args)
    assert result.exit_code == 1
    assert result.stderr.strip() == (f"error: {out / 'manifest.json'}: exists and is not a "
                                     "shotsmith manifest; pass --overwrite to replace it, or "
                                     "choose another --out")
    assert sorted(p.name for p in out.iterdir()) == ["manifest.json"]
    assert (out / "manifest.json").read_text() == '{"my": "own notes"}'
    assert runner.invoke(app, [*args, "--overwrite"]).exit_code == 0
    assert '"tool": "shotsmith"' in (out / "manifest.json").read_text()


@pytest.mark.slow
def test_a_float32_bank_trains_without_a_warning(tmp_path):
    """Issue 13: float32 spectra (a documented preset option) are read-only rows of a memory
    map; torch warned about them once per process. Any warning fails the run here."""
    from modelfiles import small_preset

    from pipeline.ingest import ingest_folder

    src = tmp_path / "kit"
    src.mkdir()
    for i in range(4):
        (src / f"hit_{i}.wav").write_bytes(wav_bytes(hit(16000, f0=100 + 300 * i, seed=i), 16000))
    preset = small_preset(tmp_path, spectra_dtype="float32", epochs=1)
    ingest_folder(src, tmp_path / "bank", load_settings(preset), jobs=1)
    run = subprocess.run([sys.executable, "-W", "error", "-m", "pipeline", "train",
                          str(tmp_path / "bank"), "--model", str(tmp_path / "m.pt")],
                         capture_output=True, text=True, timeout=300)
    assert run.returncode == 0, run.stderr[-2000:]
    assert "Warning" not in run.stderr, run.stderr


@pytest.mark.parametrize(("damage", "why", "where"), [
    (lambda d: d.update(clip_count=-1), "clip_count is -1", "index.json"),
    (lambda d: d.update(clips_file="../x.jsonl"), "clips_file is '../x.jsonl'", "index.json"),
    (lambda d: d["clips"].__setitem__(0, 3), "line 1 is not a record", "clips"),
    (lambda d: d["clips"][0].pop("name"), "line 1 has the name None", "clips"),
    (lambda d: d["clips"][0].__setitem__("name", 7), "line 1 has the name 7", "clips"),
    (lambda d: d["clips"][1].__setitem__("name", d["clips"][0]["name"]), "twice", "clips"),
    (lambda d: d["clips"][0].__setitem__("category", 7), "has the category 7", "clips"),
    (lambda d: d["clips"][0].__setitem__("path", None), "has the path None", "clips"),
    (lambda d: d["clips"][0].__setitem__("size", "big"), "has the size 'big'", "clips"),
    (lambda d: d["clips"].pop(), "the file is cut short", "clips"),
    (lambda d: d.update(audio="x"), "audio is not a table", "index.json"),
    (lambda d: d.update(settings=[1]), "settings is not a table", "index.json"),
], ids=["count", "clips file", "clip int", "no name", "name int", "names twice", "category int",
        "path none", "size text", "a line short", "audio text", "settings list"])
def test_a_damaged_bank_index_is_one_line_and_ingest_rebuilds_it(w, tmp_path, damage, why,
                                                                  where):
    """Found beyond issue 13 (a sibling of its model-file item): a hand-edited or damaged
    index.json gave TypeErrors and KeyErrors in train and inspect, and one in ingest. The
    clip table is its own file since bank format 3 (the damage goes there)."""
    import shutil

    bank = tmp_path / "bank"
    shutil.copytree(w["bank"], bank)
    index = json.loads((bank / "index.json").read_text("utf-8"))
    table = bank / index["clips_file"]
    index["clips"] = [json.loads(line) for line in table.read_text("utf-8").splitlines()]
    damage(index)
    table.write_text("".join(json.dumps(c) + "\n" for c in index.pop("clips")), "utf-8")
    (bank / "index.json").write_text(json.dumps(index), "utf-8")
    named = bank / "index.json" if where == "index.json" else table
    for args in (["train", str(bank), "--model", str(tmp_path / "m.pt")],
                 ["inspect", str(w["model"]), "--out", str(tmp_path / "x"), "--bank", str(bank)]):
        result = runner.invoke(app, args)
        assert result.exit_code == 1 and "Traceback" not in result.output, result.output
        line = result.stderr.strip()
        assert line.startswith(f"error: {named}: damaged bank index ("), line
        assert why in line and line.endswith("; re-run ingest)") and "\n" not in line, line
    assert not (tmp_path / "m.pt").exists()
    result = runner.invoke(app, ["ingest", str(w["src"]), "--bank", str(bank), "--preset", "tiny"])
    assert result.exit_code == 0, result.output
    assert tree_digest(w["src"]) == w["src_digest"]


def test_nan_in_a_bank_spectrum_names_the_file_and_clip(w, tmp_path):
    """Beyond issue 13 (its bit-rot item's sibling, in the bank): a NaN in spectra.npy made
    training stop with 'the training loss became non-finite ... try a lower learning_rate'."""
    import shutil

    import numpy as np

    from pipeline.bank import open_bank

    bank = tmp_path / "bank"
    shutil.copytree(w["bank"], bank)
    spectra = np.load(bank / "spectra.npy", mmap_mode="r+")
    spectra[2, 10, 5] = np.nan
    spectra.flush()
    del spectra
    name = open_bank(bank).names[2]
    result = runner.invoke(app, ["train", str(bank), "--model", str(tmp_path / "m.pt")])
    assert result.exit_code == 1, result.output
    assert result.stderr.strip() == (f"error: {bank / 'spectra.npy'}: clip {name} holds NaN "
                                     "or infinite values (a damaged file; delete the bank "
                                     "and ingest again)")
    assert not (tmp_path / "m.pt").exists()
