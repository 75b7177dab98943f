"""The decode path shared by ingest and resynth: the plan, the naming rule, ordered results."""

from __future__ import annotations

import numpy as np
import pytest
import soundfile as sf

from pipeline.config import load_settings
from pipeline.decode import category_of, clip_names, decode_files, plan_decode
from pipeline.errors import ParameterError
from pipeline.scan import FoundFile, scan_folder

SPEC = load_settings("tiny").audio


def found(rel: str, size: int = 100, mtime_ns: int = 1) -> FoundFile:
    return FoundFile(f"/lib/{rel}", rel, size, mtime_ns)


def test_the_plan_reuses_unchanged_clips_and_rejects_and_decodes_the_rest():
    files = [found("a.wav"), found("b.wav", size=200), found("c.wav"), found("d.wav"),
             found("e.wav", mtime_ns=9)]
    clips = {"a.wav": (0, {"size": 100, "mtime_ns": 1}), "b.wav": (1, {"size": 100, "mtime_ns": 1})}
    skips = {"c.wav": {"path": "c.wav", "reason": "silent", "size": 100, "mtime_ns": 1},
             "e.wav": {"path": "e.wav", "reason": "silent", "size": 100, "mtime_ns": 1}}
    plan = plan_decode(files, clips, skips)
    assert [(f.rel, row) for f, row, _ in plan.reuse] == [("a.wav", 0)]
    assert plan.remembered == [skips["c.wav"]] and plan.remembered[0] is not skips["c.wav"]
    # b changed size, e changed time, d is new
    assert [f.rel for f in plan.decode] == ["b.wav", "d.wav", "e.wav"]
    assert plan_decode(files).decode == files  # no previous bank: everything


def test_one_naming_rule_stem_then_path_then_full_path():
    rels = ["a/kick.wav", "b/kick.wav", "c/kick.wav", "c/kick.flac", "snare.wav", "x/hat.aif"]
    assert clip_names(rels) == ["a/kick", "b/kick", "c/kick.wav", "c/kick.flac", "snare", "hat"]
    assert len(set(clip_names(rels))) == len(rels)
    assert [category_of(r) for r in ("snares/acoustic/x.wav", "top.wav")] == ["snares", None]


def test_decoded_in_order_whatever_the_jobs(tmp_path):
    sr = SPEC.sample_rate
    t = np.arange(sr // 4) / sr
    for i, f0 in enumerate((110.0, 220.0, 440.0, 880.0, 1760.0)):
        sf.write(tmp_path / f"{i}.wav", 0.5 * np.sin(2 * np.pi * f0 * t) * np.exp(-8 * t), sr)
    (tmp_path / "5.wav").write_bytes(b"not audio")
    paths = [f.path for f in scan_folder(tmp_path).files]
    one = list(decode_files(paths, SPEC, jobs=1, dtype="float16"))
    two = list(decode_files(paths, SPEC, jobs=2, dtype="float16", ahead=1))
    assert [u is None for u, _ in one] == [False] * 5 + [True]
    assert one[-1][1] == two[-1][1] == "not a readable audio file: format not recognised"
    for (u1, m1), (u2, m2) in zip(one[:5], two[:5]):
        assert u1.dtype == np.float16 and np.array_equal(u1, u2) and m1 == m2
    # rising pitch: the loudest bin of each clip climbs, so the order is the files' order
    peaks = [int(np.argmax(u.astype(np.float32).sum(axis=1))) for u, _ in one[:5]]
    assert peaks == sorted(peaks) and len(set(peaks)) == 5


def test_jobs_below_one_is_refused_at_once():
    with pytest.raises(ParameterError, match="jobs=0 must be at least 1"):
        decode_files([], SPEC, jobs=0)


def test_jobs_beyond_the_cap_are_refused_at_once():
    """A process per file of a 5,000-file folder would swamp the machine (issue 13's family
    of unbounded counts)."""
    with pytest.raises(ParameterError, match="jobs=100000 must be at most 256"):
        decode_files(["a.wav"] * 5000, SPEC, jobs=100_000)
