"""Bank format 3: the clip table in its own JSON Lines file, read in chunks into columns.

Issue 14, item 3: on a studio-size bank nothing loads the index whole.
"""

from __future__ import annotations

import hashlib
import json
import tracemalloc
from pathlib import Path

import numpy as np
import pytest

from pipeline import cliptable
from pipeline.bank import BANK_FILES, CLIPS_FILE, BankWriter, open_bank, read_index
from pipeline.cliptable import ClipTable, read_clip_lines
from pipeline.config import load_settings
from pipeline.errors import BankError
from pipeline.files import json_bytes

SETTINGS = load_settings("tiny")
AUDIO = SETTINGS.audio
CATS = ("kick", "snare", "hat", "tom", "clap", "perc")


def record(i: int) -> dict:
    c = CATS[i % len(CATS)]
    return {"name": f"{c}_{i:06d}", "path": f"{c}/{c}_{i:06d}.wav", "category": c,
            "sample_rate": 44100, "channels": 1 + i % 2, "duration": 0.5 + i * 1e-6,
            "peak_dbfs": -1.0 - i * 1e-6, "size": 80_000 + i,
            "mtime_ns": 1_700_000_000_123_456_789 + i}


ODD = [
    {"name": "kick", "path": "kick.wav", "category": None, "sample_rate": 48000,
     "channels": 2, "duration": 1.25, "peak_dbfs": -0.5, "size": 12, "mtime_ns": -5},
    {"name": "caf\udce9", "path": "a/caf\udce9.wav", "category": "a"},  # not UTF-8, no numbers
    {"name": "ü \u2028 x", "path": "b/ü \u2028 x.flac", "category": "b", "size": 0,
     "duration": 2},
]


def write_bank(path: Path, clips: list[dict]) -> Path:
    writer = BankWriter(path, AUDIO, len(clips))
    rng = np.random.default_rng(len(clips))
    for row in range(len(clips)):
        writer.put(row, rng.random((AUDIO.n_bins, AUDIO.n_frames), dtype=np.float32))
    writer.commit(clips, SETTINGS.to_dict(), {"accepted": len(clips), "skipped": []})
    return path


def test_the_clip_table_round_trips_through_its_file(tmp_path):
    clips = [record(i) for i in range(5000)] + ODD  # more than one block and chunk
    table = ClipTable.from_records(clips)
    assert table == clips and list(table) == clips and table[-1] == ODD[-1]
    assert table[1:3] == clips[1:3] and table.row("kick") == 5000 and table.row("x") is None
    assert table.categories[5000] is None and table.categories[0] is table.categories[6]
    assert table.numbers["mtime_ns"][3] == 1_700_000_000_123_456_792  # int64, not a float
    path = tmp_path / "clips.jsonl"
    path.write_bytes(b"".join(table.lines()))
    assert path.read_bytes().count(b"\n") == len(clips)
    back = read_clip_lines(path, len(clips))
    assert back == table and list(back) == clips
    assert type(back[0]["size"]) is int and type(back[0]["duration"]) is float
    assert "sample_rate" not in back[5001]  # a field the record lacked stays absent
    with pytest.raises(IndexError):
        table[len(clips)]


def test_a_bank_commits_its_table_under_its_digest_and_opens_it(tmp_path):
    bank = write_bank(tmp_path / "bank", [record(i) for i in range(7)] + ODD)
    index = read_index(bank)
    assert index["format"] == 3 and index["clip_count"] == 10 and "clips" not in index
    table = bank / index["clips_file"]
    assert table.name == f"clips-{hashlib.sha256(table.read_bytes()).hexdigest()[:16]}.jsonl"
    assert CLIPS_FILE in BANK_FILES
    b = open_bank(bank)
    assert len(b) == 10 and b.clips == [record(i) for i in range(7)] + ODD
    assert b.names[7:] == ["kick", "caf\udce9", "ü \u2028 x"]
    assert b.paths[0] == "kick/kick_000000.wav"
    assert b.categories_per_clip[7:] == [None, "a", "b"]
    assert b.categories == sorted({*CATS, "a", "b"})
    # a new ingest's table replaces the old one; the old file goes once the index names it
    write_bank(bank, [record(i) for i in range(3)])
    assert [p.name for p in bank.glob("clips-*")] == [read_index(bank)["clips_file"]]
    assert open_bank(bank).names == [record(i)["name"] for i in range(3)]


def damage(bank: Path, edit) -> Path:
    index = read_index(bank)
    table = bank / index["clips_file"]
    lines = table.read_bytes().split(b"\n")[:-1]
    table.write_bytes(edit(lines))
    return table


@pytest.mark.parametrize(("edit", "why"), [
    (lambda ls: b"\n".join(ls[:2] + [b'{"name": "x", "pa'] + ls[3:]) + b"\n",
     "line 3 is not a JSON record (Unterminated string starting at: column 15)"),
    (lambda ls: b"\n".join(ls[:2] + [b"[1, 2]"] + ls[3:]) + b"\n", "line 3 is not a record"),
    (lambda ls: b"\n".join(ls[:4] + [b"", *ls[5:]]) + b"\n",
     "line 5 is not a JSON record (Expecting value: column 1)"),
    (lambda ls: b"\n".join(ls[:1] + [ls[1].replace(b"snare", b"\xff")] + ls[2:]) + b"\n",
     "line 2 is not UTF-8 text"),
    (lambda ls: b"\n".join(ls[:3] + [ls[1]] + ls[4:]) + b"\n",
     "line 4 has the name 'snare_000001' twice"),
    (lambda ls: b"\n".join(ls[:3] + [ls[3].replace(b'"size":80003', b'"size":1.5')] + ls[4:])
     + b"\n", "line 4: clip tom_000003 has the size 1.5"),
    (lambda ls: b"\n".join(ls[:-1]) + b"\n", "6 clips where the index names 7: the file is cut"),
    (lambda ls: b"\n".join(ls) + b"\n" + ls[0] + b"\n", "more than the 7 clips the index"),
    (lambda ls: b"\n".join(ls)[:-9], "line 7 is not a JSON record"),  # cut inside a line
], ids=["cut record", "array", "blank", "not utf-8", "twice", "size float", "a line short",
        "a line more", "cut inside"])
def test_a_damaged_clip_table_is_one_line_naming_the_file_and_line(tmp_path, edit, why):
    bank = write_bank(tmp_path / "bank", [record(i) for i in range(7)])
    table = damage(bank, edit)
    with pytest.raises(BankError) as err:
        open_bank(bank)
    msg = str(err.value)
    assert msg.startswith(f"{table}: damaged bank index (") and msg.endswith("; re-run ingest)")
    assert why in msg and "\n" not in msg, msg


def test_a_missing_clip_table_says_re_run_ingest(tmp_path):
    bank = write_bank(tmp_path / "bank", [record(i) for i in range(3)])
    table = bank / read_index(bank)["clips_file"]
    table.unlink()
    with pytest.raises(BankError, match="clip table not found \\(re-run ingest\\)"):
        open_bank(bank)


def test_a_format_2_bank_still_opens_and_format_1_asks_for_ingest(tmp_path):
    """Format 2 held the clips in index.json (its spectra are those of format 3)."""
    bank = tmp_path / "old"
    bank.mkdir()
    clips = [record(i) for i in range(4)]
    rows = np.random.default_rng(0).random((4, AUDIO.n_bins, AUDIO.n_frames)).astype(np.float32)
    np.save(bank / "spectra.npy", rows)
    settings = SETTINGS.to_dict()
    index = {"format": 2, "tool": "shotsmith", "source": None, "audio": settings["audio"],
             "settings": settings, "shape": list(rows.shape), "clips": clips}
    (bank / "index.json").write_bytes(json_bytes(index))
    b = open_bank(bank)
    assert b.clips == clips and b.names == [c["name"] for c in clips]
    assert b.categories == sorted(CATS[:4]) and np.array_equal(b.spectra, rows)
    assert len(b.fingerprint()) == 64
    (bank / "index.json").write_bytes(json_bytes(index | {"clips": clips[:2] + [5]}))
    with pytest.raises(BankError, match=r"index.json: damaged bank index \(clip 2 is not a"):
        open_bank(bank)
    (bank / "index.json").write_bytes(json_bytes(index | {"format": 1}))
    with pytest.raises(BankError, match="bank format 1 was made by an older shotsmith .*"
                                        "re-run 'shotsmith ingest'"):
        open_bank(bank)
    (bank / "index.json").write_bytes(json_bytes(index | {"format": 4}))
    with pytest.raises(BankError, match="bank format 4 is newer"):
        open_bank(bank)


@pytest.mark.parametrize("n", [20_000, pytest.param(100_000, marks=pytest.mark.slow)])
def test_reading_the_table_takes_far_less_memory_than_the_whole_list(tmp_path, n):
    """The tracemalloc peak of reading ``n`` clips as columns against json.load of the same
    clips as one list in index.json (format 2): measured 0.30x at 100,000 clips and 0.38x
    at 20,000 (fixed costs weigh more there). A memory ratio, not a timing."""
    clips = (record(i) for i in range(n))
    table = tmp_path / "clips.jsonl"
    with open(table, "wb") as fh:
        for start in range(0, n, 5000):
            fh.write(b"".join(ClipTable.from_records(
                record(i) for i in range(start, min(n, start + 5000))).lines()))
    old = tmp_path / "index.json"
    old.write_bytes(json_bytes({"format": 2, "clips": list(clips)}))

    def peak(read) -> tuple[int, object]:
        tracemalloc.start()
        try:
            got = read()
            return tracemalloc.get_traced_memory()[1], got
        finally:
            tracemalloc.stop()

    new_peak, columns = peak(lambda: read_clip_lines(table, n))
    old_peak, whole = peak(lambda: json.loads(old.read_text("utf-8"))["clips"])
    assert len(columns) == len(whole) == n and columns[n - 1] == whole[-1]
    assert new_peak < 0.5 * old_peak, (new_peak, old_peak)
    assert new_peak < 400 * n  # bytes a clip, the columns themselves about 200


def test_a_chunk_that_fails_its_column_checks_is_looked_at_row_by_row(monkeypatch, tmp_path):
    """The first bad row of a chunk is named, whichever column check caught it."""
    monkeypatch.setattr(cliptable, "CHUNK_BYTES", 512)
    clips = [record(i) for i in range(40)]
    clips[25] = clips[25] | {"channels": True}
    clips[30] = clips[30] | {"name": clips[3]["name"]}
    with pytest.raises(BankError, match=r"clip 25: clip \w+ has the channels True"):
        ClipTable.from_records(clips)
    path = tmp_path / "c.jsonl"
    path.write_text("".join(json.dumps(c) + "\n" for c in clips[:25] + clips[26:]))
    with pytest.raises(BankError, match=r"line 30 has the name 'tom_000003' twice"):
        read_clip_lines(path, 39)
