"""Bounded resources: generation streams to disk batch by batch; ingest memory does not grow
with the number of files beyond the index (the full figures: tests/benchmarks/
bench_ingest_scale.py)."""

from __future__ import annotations

import json
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest
from modelfiles import write_model_file

from pipeline.config import load_settings


@pytest.mark.slow
def test_generate_1000_streams_batch_by_batch_in_bounded_memory(tmp_path, monkeypatch):
    from pipeline.create import generate_sounds
    from pipeline.modelfile import ModelFile

    settings = load_settings("tiny", {"render": {"iterations": 0, "batch_size": 50},
                                      "model": {"width": 32, "depth": 2}})
    model = write_model_file(tmp_path / "m.pt", settings)
    out = tmp_path / "out"
    seen: list[tuple[int, int]] = []  # (codes in this decode call, WAVs already on disk)
    real_decode = ModelFile.decode

    def decode(self, z, **kw):
        seen.append((len(z), len(list(out.glob("*.wav"))) if out.exists() else 0))
        return real_decode(self, z, **kw)

    monkeypatch.setattr(ModelFile, "decode", decode)
    s = generate_sounds(model, out, n=1000, seed=0)
    assert s["written"] == 1000 and len(list(out.glob("*.wav"))) == 1000
    # One decode per batch of 50, each after the previous batch reached the disk.
    assert [n for n, _ in seen] == [50] * 20
    assert [on_disk for _, on_disk in seen] == [50 * k for k in range(20)]
    # So at most one batch of spectra (50 x 257 x 63 float32, 3 MB) is alive at a time, where
    # all 1000 would be 65 MB and their waveforms another 32 MB.


_INGEST_PROBE = textwrap.dedent(
    """
    import json, resource, sys
    sys.path.insert(0, sys.argv[1])
    from pathlib import Path
    from bench_ingest_scale import make_library
    from pipeline.config import load_settings
    from pipeline.ingest import ingest_folder

    work, n = Path(sys.argv[2]), int(sys.argv[3])
    make_library(work / "lib", n)
    s = ingest_folder(work / "lib", work / "bank", load_settings("tiny"), jobs=1)
    print(json.dumps({"accepted": s.accepted,
                      "maxrss": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024}))
    """
)


def _ingest_peak(tmp: Path, n: int) -> dict:
    bench = Path(__file__).parent / "benchmarks"
    run = subprocess.run([sys.executable, "-c", _INGEST_PROBE, str(bench), str(tmp), str(n)],
                         capture_output=True, text=True, timeout=300)
    assert run.returncode == 0, run.stderr[-1500:]
    return json.loads(run.stdout.strip().splitlines()[-1])


@pytest.mark.slow
def test_ingest_peak_memory_does_not_grow_with_the_spectra(tmp_path):
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    one = _ingest_peak(tmp_path / "a", 1)
    many = _ingest_peak(tmp_path / "b", 1500)
    assert many["accepted"] == 1500
    spectra = 1500 * 257 * 63 * 2  # float16 rows: 49 MB, written twice (staging, bank)
    grown = many["maxrss"] - one["maxrss"]
    assert grown < spectra / 4, f"peak RSS grew by {grown / 2**20:.1f} MiB for 1500 files"
