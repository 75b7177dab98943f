"""Property tests over the files a user writes by hand: presets and interpolation job files.

Any TOML value of any type for any preset key is either accepted, and then a 4-clip bank
(re-ingested when the value is an audio setting) trains one epoch into a model file that
loads (and renders, for a render setting), or refused in one line naming the file and the
key. Any jobs file is either read, and its jobs render or are refused in one line, or refused
in one line naming the file. Examples are derandomized (``SHOTSMITH_FUZZ_RANDOM=1`` for fresh
ones) and at most 30 each: every accepted preset trains.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import json
import math
import os
import sys
from pathlib import Path

import pytest
from badfiles import hit, tree_digest, wav_bytes
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st
from modelfiles import small_preset, write_model_file

from pipeline.config import SPEC_TYPES, load_settings
from pipeline.errors import ShotsmithError

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

PROPS = settings(
    max_examples=int(os.environ.get("SHOTSMITH_PROPERTY_EXAMPLES", "30")),
    deadline=None,
    derandomize=os.environ.get("SHOTSMITH_FUZZ_RANDOM") != "1",
    database=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture],
)


# --- TOML values of every type, written as TOML text ------------------------------------------

def toml_value(v) -> str:
    """``v`` as TOML (TOML 1.0: strings as basic strings, whose escapes JSON's are a subset
    of; nan/inf spelled as TOML spells them; inline tables and arrays)."""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        return ("nan" if math.isnan(v) else "inf" if v > 0 else "-inf") if not math.isfinite(v) \
            else repr(v)
    if isinstance(v, str):  # TOML forbids surrogate escapes and an unescaped DEL
        return json.dumps(v, ensure_ascii=False).replace("\x7f", "\\u007F")
    if isinstance(v, (dt.datetime, dt.date, dt.time)):
        return v.isoformat()
    if isinstance(v, list):
        return "[" + ", ".join(toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{" + ", ".join(f"{toml_value(k)} = {toml_value(x)}" for k, x in v.items()) + "}"
    raise TypeError(type(v))


def toml_text(tables: dict) -> str:
    out = []
    for table, keys in tables.items():
        out.append(f"[{table}]")
        out += [f"{toml_value(k)} = {toml_value(v)}" for k, v in keys.items()]
    return "\n".join(out) + "\n"


SCALARS = st.one_of(
    st.booleans(),
    st.integers(-10, 300), st.integers(min_value=-2**63, max_value=2**63 - 1),
    st.floats(allow_nan=True, allow_infinity=True), st.floats(-1e3, 1e3),
    st.text(max_size=12), st.sampled_from(["hann", "float32", "pghi", "16", "calibrated"]),
    st.datetimes(min_value=dt.datetime(1900, 1, 1)).map(lambda d: d.replace(microsecond=0)),
    st.dates(), st.times().map(lambda t: t.replace(microsecond=0)),
)
VALUES = st.one_of(SCALARS, st.lists(SCALARS, max_size=3),
                   st.dictionaries(st.text(min_size=1, max_size=4), SCALARS, max_size=2))
KEYS = [(t, f.name) for t, cls in SPEC_TYPES.items() for f in dataclasses.fields(cls)]
KEYS += [("audio", "no_such_key"), ("reverb", "size")]


@pytest.fixture(scope="module")
def four(tmp_path_factory):
    """A 4-clip library, its bank under the small preset, and that preset as a mapping."""
    from pipeline.ingest import ingest_folder

    root = tmp_path_factory.mktemp("props")
    src = root / "kit"
    src.mkdir()
    for i, name in enumerate(["kick_a", "kick_b", "hat_a", "hat_b"]):
        (src / f"{name}.wav").write_bytes(
            wav_bytes(hit(16000, f0=90 + 400 * i, seed=i, seconds=0.4), 16000))
    preset = small_preset(root, epochs=1)
    base = load_settings(preset)
    ingest_folder(src, root / "bank", base, jobs=1)
    return {"root": root, "src": src, "bank": root / "bank", "base": base,
            "tables": tomllib.loads(preset.read_text("utf-8")), "digest": tree_digest(src)}


def _one_line(exc: BaseException, *names: str) -> str:
    msg = str(exc)
    assert msg and "\n" not in msg, repr(msg)
    assert any(n in msg for n in names), (names, msg)
    return msg


def near(base):
    """Values around a key's shipped one: most of them valid, some just past a bound."""
    if isinstance(base, bool):
        return st.booleans()
    if isinstance(base, int):
        return st.one_of(st.integers(-1, 2 * abs(base) + 2),
                         st.sampled_from([base, base // 2, base * 2, base + 1]))
    if isinstance(base, float):
        return st.one_of(st.floats(-3 * abs(base) - 10, 3 * abs(base) + 10),
                         st.sampled_from([0.0, -0.0, base / 2, base * 2, -base]))
    return st.sampled_from([base, "float32", "fixed", "random", "zeros", "16", "32f", "HANN"])


@pytest.mark.slow
@PROPS
@given(data=st.data())
def test_any_value_for_any_preset_key_trains_or_is_refused_in_one_line(four, data):
    from pipeline.create import generate_sounds
    from pipeline.ingest import ingest_folder
    from pipeline.modelfile import load_model_file
    from pipeline.train import train_model

    table, name = data.draw(st.sampled_from(KEYS), label="key")
    base = four["tables"].get(table, {}).get(name)
    plausible = base is not None and data.draw(st.booleans(), label="near the shipped value")
    value = data.draw(near(base) if plausible else VALUES, label="value")
    tables = {t: dict(k) for t, k in four["tables"].items()}
    tables.setdefault(table, {})[name] = value
    work = four["root"] / f"case-{abs(hash((table, name, repr(value)))) % 10**9}"
    work.mkdir(exist_ok=True)
    path = work / "p.toml"
    path.write_text(toml_text(tables), encoding="utf-8")
    assert tomllib.loads(path.read_text("utf-8"))[table][name] == value or value != value \
        or isinstance(value, float) and math.isnan(value) or isinstance(value, (list, dict))
    try:
        s = load_settings(path)
    except ShotsmithError as exc:
        _one_line(exc, str(path))
        event("refused")
        return
    event(f"accepted ({table})")
    s = s.with_overrides({"train": {"epochs": 1}})
    bank = four["bank"]
    if s.audio != four["base"].audio:
        bank = work / "bank"
        try:
            ingest_folder(four["src"], bank, s, jobs=1)
        except ShotsmithError as exc:  # every clip refused under these settings, say
            _one_line(exc, str(four["src"]))
            return
    summary = train_model(bank, work / "m.pt", s, overwrite=True)
    assert summary.epochs == 1 and summary.model == str(work / "m.pt")
    mf = load_model_file(work / "m.pt")
    assert mf.settings.to_dict() | {"preset": None} == s.to_dict() | {"preset": None}
    if table == "render":
        render = s.render if s.render.iterations <= 64 else \
            dataclasses.replace(s.render, iterations=64)
        out = generate_sounds(mf, work / "out", n=1, seed=0, render=render, overwrite=True)
        assert out["written"] == 1
    assert tree_digest(four["src"]) == four["digest"]


# --- jobs files ----------------------------------------------------------------------------

SOUNDS = st.sampled_from(["kick_00", "hat_01", "kick_02", "hat_03", "hat", "nope", "",
                          " kick_00 "])
CELLS = st.one_of(SOUNDS, st.sampled_from(["2", "3", "2.7", "-1", "0", "100001", "slerp",
                                           "lerp", "cubic", "x|y", "kick_00|hat_01"]),
                  st.text(max_size=6))
JOB_VALUES = st.one_of(SCALARS, st.lists(st.one_of(SOUNDS, SCALARS), max_size=4),
                       st.integers(2, 6), st.lists(SOUNDS, min_size=2, max_size=3))


@st.composite
def jobs_file(draw) -> tuple[str, str]:
    if draw(st.booleans()):
        usual = st.fixed_dictionaries({  # most keys usual, some anything
            "sounds": st.lists(SOUNDS, min_size=2, max_size=3)}, optional={
            "steps": st.one_of(st.integers(2, 6), JOB_VALUES),
            "path": st.one_of(st.sampled_from(["slerp", "lerp"]), JOB_VALUES),
            "label": st.one_of(st.text(max_size=8), JOB_VALUES)})
        anything = st.dictionaries(st.sampled_from(["sounds", "steps", "path", "label"]),
                                   JOB_VALUES, max_size=4)
        jobs = draw(st.lists(usual if draw(st.integers(0, 3)) else anything, min_size=1,
                             max_size=3))
        text = "".join("[[job]]\n" + "".join(f"{k} = {toml_value(v)}\n" for k, v in j.items())
                       for j in jobs)
        if not draw(st.integers(0, 4)):
            text = draw(st.sampled_from(["job = 3\n", "[job]\nsounds = 1\n", ""])) + text
        return ".toml", text
    header = draw(st.lists(st.sampled_from(["start", "end", "via", "steps", "path", "label",
                                            "extra"]), min_size=1, max_size=6))
    if draw(st.integers(0, 3)):
        header = ["start", "end", *header]
    rows = draw(st.lists(st.lists(SOUNDS if draw(st.booleans()) else CELLS,
                                  min_size=len(header) - 1, max_size=len(header) + 1),
                         min_size=1, max_size=3))
    lines = [",".join(header)] + [",".join(c.replace(",", " ").replace("\n", " ")
                                           .replace('"', "") for c in r) for r in rows]
    return ".csv", "\n".join(lines) + "\n"


@pytest.fixture(scope="module")
def jobs_model(tmp_path_factory):
    from pipeline.config import load_settings as load

    return write_model_file(tmp_path_factory.mktemp("jobs") / "m.pt", load("tiny"))


@pytest.mark.slow
@PROPS
@given(case=jobs_file())
def test_any_jobs_file_renders_or_is_refused_in_one_line(jobs_model, tmp_path_factory, case):
    from pipeline.create import interpolate_jobs, read_jobs_file
    from pipeline.modelfile import load_model_file

    ext, text = case
    folder = tmp_path_factory.mktemp("job")
    path = folder / f"jobs{ext}"
    path.write_text(text, encoding="utf-8")
    try:
        jobs = read_jobs_file(path)
    except ShotsmithError as exc:
        _one_line(exc, str(path))
        event("refused on reading")
        return
    assert jobs and all(len(j["sounds"]) >= 2 and all(j["sounds"]) for j in jobs)
    assert all(isinstance(j.get("steps", 2), int) and not isinstance(j.get("steps", 2), bool)
               and 2 <= j.get("steps", 2) <= 100_000 for j in jobs)
    if sum(j.get("steps", 4) for j in jobs) > 24:
        return  # read and bounded; rendering thousands of sounds is not this test's business
    mf = load_model_file(jobs_model)
    render = dataclasses.replace(mf.settings.render, iterations=1)
    try:
        out = interpolate_jobs(mf, path, folder / "out", steps=4, seed=0, render=render)
    except ShotsmithError as exc:  # a sound the model does not have, a bad path ...
        _one_line(exc, str(path))
        event("refused on rendering")
        assert not list((folder / "out").glob("*.wav")) if (folder / "out").exists() else True
        return
    event("rendered")
    assert out["written"] == sum(j.get("steps", 4) for j in jobs)
    assert sorted(p.name for p in (folder / "out").glob("*.wav")) == sorted(
        Path(f).name for f in out["files"])
