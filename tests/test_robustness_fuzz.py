"""Property: any mutation of a valid WAV, FLAC or AIFF file ends in a clip or a listed reason.

Hypothesis flips bits, truncates, inserts bytes and overwrites header fields with extreme
values; :func:`pipeline.frontend.decode_file` (the front end of ingest, resynth and the
file arguments of interpolate/vary) must return a finished clip or raise AudioError with a
one-line reason, never anything else. ``SHOTSMITH_FUZZ_EXAMPLES`` sets the number of cases
(150 in CI); ``SHOTSMITH_FUZZ_RANDOM=1`` draws new ones instead of the fixed sequence.
"""

from __future__ import annotations

import os
import struct

import numpy as np
import pytest
from badfiles import hit, wav_bytes
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from pipeline.config import load_settings
from pipeline.errors import AudioError
from pipeline.frontend import decode_file, load_clip

SPEC = load_settings("tiny").audio
EXAMPLES = int(os.environ.get("SHOTSMITH_FUZZ_EXAMPLES", "150"))
FUZZ = settings(
    max_examples=EXAMPLES,
    deadline=None,
    derandomize=os.environ.get("SHOTSMITH_FUZZ_RANDOM") != "1",
    database=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
)

# Small valid files: (bytes, extension, offsets of the header fields worth overwriting).
# WAV: RIFF size 4, fmt size 16, format 20, channels 22, rate 24, byte rate 28, block 32,
# bits 34, data size 40 (Microsoft RIFF/WAVE). FLAC: STREAMINFO from byte 8 (block sizes,
# frame sizes, then rate/channels/bits/total samples packed at 18..25, the FLAC format
# spec). AIFF: FORM size 4, COMM channels 20, frames 22, bits 26, rate 28 (80-bit float).
BASES = [
    (wav_bytes(hit(16000, seconds=0.1), 16000), ".wav", (4, 16, 20, 22, 24, 28, 32, 34, 40)),
    (wav_bytes(hit(22050, seconds=0.1, ch=2), 22050, subtype="FLOAT"), ".wav",
     (4, 16, 20, 22, 24, 28, 32, 34, 40)),
    (wav_bytes(hit(44100, seconds=0.05, ch=3), 44100, subtype="PCM_24"), ".wav",
     (4, 20, 22, 24, 32, 34, 40)),
    (wav_bytes(hit(16000, seconds=0.15), 16000, fmt="FLAC"), ".flac",
     (4, 8, 10, 12, 15, 18, 20, 21, 22, 26)),
    (wav_bytes(hit(48000, seconds=0.05, ch=2), 48000, subtype="PCM_24", fmt="FLAC"), ".flac",
     (8, 12, 18, 20, 22)),
    (wav_bytes(hit(16000, seconds=0.1), 16000, fmt="AIFF"), ".aiff", (4, 20, 22, 26, 28, 30)),
]
EXTREMES = [0, 1, 2, 3, 7, 8, 0x7F, 0x80, 0xFF, 0x100, 0x7FFF, 0x8000, 0xFFFF, 0x10000,
            0x7FFFFFFF, 0x80000000, 0xFFFFFFFE, 0xFFFFFFFF]


@st.composite
def mutated(draw) -> tuple[bytes, str]:
    data, ext, fields = draw(st.sampled_from(BASES))
    b = bytearray(data)
    for _ in range(draw(st.integers(1, 4))):
        if not b:
            break
        kind = draw(st.sampled_from(["flip", "truncate", "cut", "insert", "field", "splat"]))
        near_header = draw(st.booleans())
        pos = draw(st.integers(0, min(len(b), 64 if near_header else len(b)) - 1))
        if kind == "flip":
            b[pos] ^= 1 << draw(st.integers(0, 7))
        elif kind == "truncate":
            del b[pos:]
        elif kind == "cut":
            del b[pos : pos + draw(st.integers(1, 256))]
        elif kind == "insert":
            b[pos:pos] = draw(st.binary(min_size=1, max_size=64))
        elif kind == "field":
            at = draw(st.sampled_from(fields))
            value = draw(st.sampled_from(EXTREMES) | st.integers(0, 2**32 - 1))
            width = draw(st.sampled_from([2, 4]))
            order = "<" if ext == ".wav" else ">"
            packed = struct.pack(order + ("H" if width == 2 else "I"), value & (256**width - 1))
            b[at : at + width] = packed
        else:  # overwrite a run with one byte value
            n = draw(st.integers(1, 32))
            b[pos : pos + n] = bytes([draw(st.sampled_from([0x00, 0xFF, 0x7F, 0x80]))]) * n
    return bytes(b), ext


@pytest.fixture(scope="module")
def scratch(tmp_path_factory):
    return tmp_path_factory.mktemp("fuzz")


def _check(path) -> str:
    try:
        clip, meta = decode_file(path, SPEC)
    except AudioError as exc:
        reason = str(exc)
        assert reason and "\n" not in reason, repr(reason)
        return "reason"
    assert clip.shape == (SPEC.n_samples,) and clip.dtype == np.float32
    assert np.all(np.isfinite(clip))
    assert np.max(np.abs(clip)) <= 10 ** (SPEC.peak_db / 20) * (1 + 1e-5)
    assert meta["sample_rate"] > 0 and meta["channels"] >= 1 and meta["duration"] > 0
    return "clip"


@FUZZ
@given(case=mutated())
def test_mutated_files_end_in_a_clip_or_a_reason(scratch, case):
    data, ext = case
    path = scratch / f"mutant{ext}"
    path.write_bytes(data)
    outcome = _check(path)
    event(outcome)
    if outcome == "reason":  # the public wrapper adds the path and stays one line
        with pytest.raises(AudioError, match=r"^.*mutant.*: \S") as info:
            load_clip(path, SPEC)
        assert "\n" not in str(info.value)


def test_unmutated_bases_are_clips(scratch):
    """The property above is not vacuous: every base file decodes."""
    for i, (data, ext, _) in enumerate(BASES):
        path = scratch / f"base{i}{ext}"
        path.write_bytes(data)
        assert _check(path) == "clip"
