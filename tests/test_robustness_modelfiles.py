"""Untrusted model files: loading never runs code hidden in a file, and damage is one clear line.

A model file is a torch zip archive read with ``torch.load(weights_only=True)``. The hostile
files here carry a pickle whose ``__reduce__`` would create a marker file; a check in a
separate process proves that an unrestricted unpickler really would run it, so the tests
that it does not are not vacuous.
"""

from __future__ import annotations

import io
import json
import pathlib
import pickle
import resource
import subprocess
import sys
import textwrap
import zipfile
from pathlib import Path

import pytest
from modelfiles import model_dict, write_model_file
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.config import load_settings
from pipeline.errors import ModelFileError

torch = pytest.importorskip("torch")
from pipeline.modelfile import FORMAT_VERSION, load_model_file, save_atomic  # noqa: E402

TINY = load_settings("tiny")


class Planted:
    """Unpickling this creates ``marker``: a stand-in for any code an attacker would run."""

    def __init__(self, marker: Path) -> None:
        self.marker = marker

    def __reduce__(self):
        return (pathlib.Path.touch, (pathlib.Path(self.marker),))


def _one_line(exc: BaseException, path: Path) -> str:
    msg = str(exc)
    assert "\n" not in msg and msg.startswith(f"{path}: "), msg
    return msg


def _hostile_files(folder: Path, marker: Path) -> dict[str, Path]:
    """Ways to smuggle a pickle into something that looks like a model file."""
    files = {}
    # 1. torch.save of a plausible model dict with one planted object inside.
    payload = model_dict(TINY) | {"history": [Planted(marker)]}
    files["torch.save"] = folder / "planted.pt"
    torch.save(payload, files["torch.save"])
    # 2. the planted object alone, in torch's zip layout, written by hand.
    files["hand-made zip"] = folder / "zip.pt"
    with zipfile.ZipFile(files["hand-made zip"], "w") as z:
        z.writestr("archive/data.pkl", pickle.dumps(Planted(marker), protocol=2))
        z.writestr("archive/byteorder", "little")
        z.writestr("archive/version", "3\n")
    # 3. a bare pickle (no zip), and torch's legacy non-zip format.
    files["raw pickle"] = folder / "raw.pt"
    files["raw pickle"].write_bytes(pickle.dumps({"tool": "shotsmith", "x": Planted(marker)}))
    files["legacy torch"] = folder / "legacy.pt"
    torch.save({"x": Planted(marker)}, files["legacy torch"], _use_new_zipfile_serialization=False)
    # 4. a training checkpoint (read by train --resume) with the planted object.
    files["checkpoint"] = folder / "model.pt.ckpt"
    torch.save({"format": FORMAT_VERSION, "tool": "shotsmith", "kind": "checkpoint",
                "state": Planted(marker)}, files["checkpoint"])
    return files


def test_the_planted_pickle_really_runs_code_when_unrestricted(tmp_path):
    """Control: an ordinary torch.load(weights_only=False) would create the marker."""
    marker = tmp_path / "control-marker"
    files = _hostile_files(tmp_path, marker)
    code = "import sys, torch; torch.load(sys.argv[1], weights_only=False)"
    run = subprocess.run([sys.executable, "-c", code, str(files["torch.save"])],
                         capture_output=True, text=True, timeout=120)
    assert run.returncode == 0, run.stderr[-1500:]
    assert marker.exists()


@pytest.mark.parametrize("kind", ["torch.save", "hand-made zip", "raw pickle", "legacy torch"])
def test_a_model_file_that_would_run_code_is_refused_and_runs_nothing(tmp_path, kind):
    marker = tmp_path / "marker"
    path = _hostile_files(tmp_path, marker)[kind]
    with pytest.raises(ModelFileError) as info:
        load_model_file(path)
    msg = _one_line(info.value, path)
    assert "not a shotsmith model file" in msg or "refusing" in msg
    assert not marker.exists()


def test_cli_commands_refuse_a_planted_model_in_one_line(tmp_path):
    marker = tmp_path / "marker"
    path = _hostile_files(tmp_path, marker)["torch.save"]
    runner = CliRunner()
    for args in (["generate", str(path), "--out", str(tmp_path / "g"), "-n", "1"],
                 ["vary", str(path), "kick_00", "--out", str(tmp_path / "v")],
                 ["interpolate", str(path), "kick_00", "hat_01", "--out", str(tmp_path / "i")],
                 ["inspect", str(path), "--out", str(tmp_path / "x")]):
        result = runner.invoke(app, args)
        assert result.exit_code == 1, (args, result.output)
        lines = result.output.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith(f"error: {path}: "), result.output
        assert "refusing" in lines[0]
    assert not marker.exists()
    assert not any((tmp_path / d).exists() and any((tmp_path / d).iterdir()) for d in "gvix")


def test_resume_refuses_a_planted_checkpoint(tmp_path):
    from badfiles import hit, wav_bytes

    from pipeline.ingest import ingest_folder
    from pipeline.train import train_model

    marker = tmp_path / "marker"
    files = _hostile_files(tmp_path, marker)
    src = tmp_path / "src"
    src.mkdir()
    for i in range(4):
        (src / f"s{i}.wav").write_bytes(wav_bytes(hit(16000, f0=200 + 50 * i, seed=i), 16000))
    ingest_folder(src, tmp_path / "bank", TINY, jobs=1)
    with pytest.raises(ModelFileError) as info:
        train_model(tmp_path / "bank", tmp_path / "model.pt", TINY, resume=True)
    _one_line(info.value, files["checkpoint"])
    assert not marker.exists()


# --- damaged and foreign files ----------------------------------------------------------------


def _save(path: Path, payload) -> Path:
    save_atomic(payload, path)
    return path


def _variants(tmp_path: Path) -> dict[str, tuple[Path, str]]:
    """name -> (file, fragment the one-line error must contain)."""
    good = write_model_file(tmp_path / "good.pt", TINY)
    data = good.read_bytes()
    v: dict[str, tuple[Path, str]] = {}

    def put(name: str, payload, why: str) -> None:
        v[name] = (_save(tmp_path / f"{name}.pt", payload), why)

    put("newer format", model_dict(TINY) | {"format": FORMAT_VERSION + 1},
        f"format {FORMAT_VERSION + 1} is newer")
    put("older format", model_dict(TINY) | {"format": 1}, "re-run 'shotsmith train'")
    put("far newer format", model_dict(TINY) | {"format": 10**6}, "is newer than this")
    put("format as text", model_dict(TINY) | {"format": "1"}, "no format version")
    put("format as bool", model_dict(TINY) | {"format": True}, "no format version")
    put("no format", {k: x for k, x in model_dict(TINY).items() if k != "format"},
        "no format version")
    put("other tool", model_dict(TINY) | {"tool": "something else"}, "not a shotsmith model")
    put("a checkpoint", model_dict(TINY) | {"kind": "checkpoint"}, "is a training checkpoint")
    put("a list", [1, 2, 3], "not a shotsmith model")
    put("plain tensor", torch.zeros(3), "not a shotsmith model")
    for key in ("mu", "state_dict", "settings", "clip_names"):
        put(f"missing {key}", {k: x for k, x in model_dict(TINY).items() if k != key},
            f"missing {key}")
    d = model_dict(TINY)
    put("mu wrong shape", d | {"mu": d["mu"][:, :3]}, "mu has shape")
    put("logvar not a tensor", d | {"logvar": [[0.0]]}, "logvar has shape")
    put("categories short", d | {"clip_categories": d["clip_categories"][:2]}, "categories for")
    sd = dict(d["state_dict"])
    first = next(iter(sd))
    put("weight wrong shape", d | {"state_dict": sd | {first: torch.zeros(3, 3)}},
        "weights do not fit")
    put("weight missing", d | {"state_dict": {k: x for k, x in sd.items() if k != first}},
        "weights do not fit")
    put("weight extra", d | {"state_dict": sd | {"extra.weight": torch.zeros(2)}},
        "weights do not fit")
    # round two (issue 13): every field's type, non-finite values, bit rot
    for key, value, why in [
        ("history", "lots", "history is not a list"),
        ("history", [{"epoch": 1, "val_loss": float("nan")}], "history[0].val_loss is nan"),
        ("history", [[1, 2]], "history[0] is list, not a mapping"),
        ("best", [1.0], "best is list, not a mapping"),
        ("best", {"epoch": 1, "val_loss": float("inf")}, "best.val_loss is inf"),
        ("bank", "nowhere", "bank is str, not a mapping"),
        ("bank", {"path": 3, "n_clips": 6, "names_sha256": ""}, "bank.path is 3"),
        ("categories", "kick", "categories is str, not a list"),
        ("categories", [3], "categories holds 3, not a name"),
        ("clip_names", [f"c{i}" for i in range(5)] + [7], "clip_names holds 7"),
        ("clip_names", ["same"] * 6, "clip_names repeats a name"),
        ("clip_categories", ["snare"] * 6, "names a category the model does not list"),
        ("logvar", d["logvar"] + 1e6, "logvar reaches 1e+06"),
        ("mu", torch.where(torch.arange(d["mu"].numel()).reshape(d["mu"].shape) == 5,
                           torch.tensor(float("nan")), d["mu"]), "mu holds non-finite"),
        ("split", {"train": torch.arange(5), "val": torch.tensor([99])}, "split.val"),
        ("split", {"train": torch.arange(5)}, "split needs train and val"),
    ]:
        put(f"{key} {why}", d | {key: value}, why)
    sd_nan = dict(d["state_dict"])
    sd_nan[first] = sd_nan[first].clone()
    sd_nan[first].view(-1)[0] = float("nan")
    put("weight nan", d | {"state_dict": sd_nan}, f"weight {first} holds NaN")
    sd_rot = dict(d["state_dict"])
    sd_rot[first] = sd_rot[first].clone()
    sd_rot[first].view(-1)[0] += 0.5  # finite bit rot: only the checksum sees it
    put("weight changed", d | {"state_dict": sd_rot}, "checksum mismatch")
    bad = dict(d["settings"])
    bad["model"] = dict(bad["model"], latent_dim=-1)
    put("bad settings", d | {"settings": bad}, "bad settings")
    put("settings not a dict", d | {"settings": "tiny"}, "bad settings")
    for frac in (0.999, 0.9, 0.5, 0.1):
        p = tmp_path / f"cut {frac}.pt"
        p.write_bytes(data[: int(len(data) * frac)])
        v[f"truncated to {frac:.1%}"] = (p, "truncated or corrupt")
    p = tmp_path / "short tail.pt"
    p.write_bytes(data[:-22])  # the zip end-of-central-directory record
    v["no end record"] = (p, "truncated or corrupt")
    (tmp_path / "empty.pt").write_bytes(b"")
    v["empty"] = (tmp_path / "empty.pt", "not a shotsmith model")
    (tmp_path / "text.pt").write_text("hello")
    v["text"] = (tmp_path / "text.pt", "not a shotsmith model")
    (tmp_path / "folder.pt").mkdir()
    v["a folder"] = (tmp_path / "folder.pt", "is a folder")
    v["missing"] = (tmp_path / "nothing here.pt", "not found")
    return v


def test_damaged_and_foreign_model_files_fail_in_one_clear_line(tmp_path):
    for name, (path, why) in _variants(tmp_path).items():
        with pytest.raises(ModelFileError) as info:
            load_model_file(path)
        msg = _one_line(info.value, path)
        assert why in msg, (name, msg)
    assert load_model_file(tmp_path / "good.pt").clip_names[0] == "kick_00"  # control


def test_damaged_model_files_through_the_cli(tmp_path):
    runner = CliRunner()
    for name, (path, why) in _variants(tmp_path).items():
        args = ["generate", str(path), "--out", str(tmp_path / "o"), "-n", "1"]
        result = runner.invoke(app, args)
        assert result.exit_code == 1, (name, result.output)
        lines = result.output.strip().splitlines()
        assert len(lines) == 1 and why in lines[0] and "Traceback" not in result.output, name
    assert not (tmp_path / "o").exists() or not list((tmp_path / "o").glob("*.wav"))


_HOSTILE_SIZE = textwrap.dedent(
    """
    import resource, sys
    resource.setrlimit(resource.RLIMIT_AS, (int(sys.argv[2]), int(sys.argv[2])))
    from pipeline.errors import ModelFileError
    from pipeline.modelfile import load_model_file
    try:
        load_model_file(sys.argv[1])
    except ModelFileError as exc:
        print("ModelFileError:", exc)
    """
)


@pytest.mark.parametrize(("audio", "model", "why"), [
    # within every setting's bounds: a network of about 3 GB (width 4096, depth 8)
    ({"sample_rate": 192000, "duration": 2.0, "n_fft": 8192, "hop_length": 4096},
     {"width": 4096, "depth": 8}, "weights do not fit"),
    # n_fft 2^20 is beyond its bound: refused with the settings, before any shape
    ({"sample_rate": 192000, "duration": 30.0, "n_fft": 2**20, "hop_length": 2**19},
     {"width": 4096}, "audio.n_fft: 1048576 must be between 64 and 65536"),
])
def test_settings_that_claim_a_huge_network_are_refused_before_allocating(tmp_path, audio,
                                                                          model, why):
    """A small file whose settings describe a network of gigabytes must fail on the settings
    or the shapes, not by trying to allocate it (run under a 3 GB address limit)."""
    d = model_dict(TINY)
    d["settings"]["audio"].update(audio)
    d["settings"]["model"].update(model)
    path = _save(tmp_path / "huge.pt", d)
    assert path.stat().st_size < 50 * 2**20
    limit = 3 * 2**30
    if resource.getrlimit(resource.RLIMIT_AS)[0] not in (resource.RLIM_INFINITY,):
        limit = min(limit, resource.getrlimit(resource.RLIMIT_AS)[0])
    run = subprocess.run([sys.executable, "-c", _HOSTILE_SIZE, str(path), str(limit)],
                         capture_output=True, text=True, timeout=120)
    assert run.returncode == 0, run.stderr[-1500:]
    assert run.stdout.startswith(f"ModelFileError: {path}: ")
    assert why in run.stdout and len(run.stdout.strip().splitlines()) == 1


def test_model_file_json_fields_are_plain_data(tmp_path):
    """What load returns holds only plain data: the manifest can always be written."""
    mf = load_model_file(write_model_file(tmp_path / "m.pt", TINY))
    json.dumps({"history": mf.history, "best": mf.best, "categories": mf.categories,
                "names": mf.clip_names, "bank": mf.bank, "settings": mf.settings.to_dict()})


def test_a_damaged_training_checkpoint_is_refused_in_one_line(tmp_path):
    """Found beyond issue 13 (its model-file item's sibling): fields of the wrong type in
    MODEL.ckpt raised TypeError or ValueError on --resume."""
    import threading

    from badfiles import hit, wav_bytes
    from modelfiles import small_preset

    from pipeline.config import load_settings
    from pipeline.ingest import ingest_folder
    from pipeline.train import train_model

    src = tmp_path / "src"
    src.mkdir()
    for i in range(4):
        (src / f"s{i}.wav").write_bytes(wav_bytes(hit(16000, f0=200 + 50 * i, seed=i), 16000))
    settings = load_settings(small_preset(tmp_path, epochs=2))
    ingest_folder(src, tmp_path / "bank", settings, jobs=1)
    stop = threading.Event()
    stop.set()  # stop after the first batch: the checkpoint is written, the model is not
    s = train_model(tmp_path / "bank", tmp_path / "m.pt", settings, interrupt=stop)
    ckpt = Path(s.checkpoint)
    good = ckpt.read_bytes()
    for name, damage in {
        "state not a mapping": lambda d: d.update(state=3),
        "history of text": lambda d: d["state"].update(history="x"),
        "sums of text": lambda d: d["state"].update(sums="ab"),
        "rng a list": lambda d: d.update(rng=[1]),
        "weights a list": lambda d: d.update(model_state=[1]),
    }.items():
        d = torch.load(io.BytesIO(good), weights_only=True)
        damage(d)
        save_atomic(d, ckpt)
        with pytest.raises(ModelFileError) as info:
            train_model(tmp_path / "bank", tmp_path / "m.pt", settings, resume=True)
        assert "damaged training checkpoint" in _one_line(info.value, ckpt), name
    ckpt.write_bytes(good)  # control: the undamaged checkpoint resumes
    assert train_model(tmp_path / "bank", tmp_path / "m.pt", settings, resume=True).epochs == 2
