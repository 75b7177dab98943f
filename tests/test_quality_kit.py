"""Sound quality on a small synthesized kit: the model's outputs, judged by descriptors.

Four categories of the bundled demo kit (sounds we synthesized ourselves), the tiny
preset, 60 epochs. The slow, real-library figures live in tests/benchmarks/bench_quality.py;
this is the quick check that the chain keeps working as a whole: ``--near`` outputs are
recognised as their category by a 5-nearest-neighbour classifier on the real clips'
descriptors (pipeline.quality), and reconstructions of the training clips sound far
closer to their own originals than one average sound would.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pytest

from pipeline import quality, spectra
from pipeline.config import load_settings
from pipeline.frontend import load_clip
from pipeline.phase import reconstruct

KIT = Path(__file__).resolve().parents[1] / "demo_sounds"
CATEGORIES = ("kick", "hat", "snare", "bell")
pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def trained(tmp_path_factory):
    from pipeline.ingest import ingest_folder
    from pipeline.modelfile import load_model_file
    from pipeline.train import train_model

    work = tmp_path_factory.mktemp("kit")
    src = work / "kit"
    for cat in CATEGORIES:
        (src / cat).mkdir(parents=True)
        for f in sorted((KIT / cat).glob("*.wav")):
            os.symlink(f, src / cat / f.name)
    settings = load_settings("tiny", {"train": {"epochs": 60, "decoder_variance": "calibrated"}})
    ingest_folder(src, work / "bank", settings, jobs=1)
    train_model(work / "bank", work / "m.pt", settings, device="cpu")
    mf = load_model_file(work / "m.pt")
    paths = sorted(src.rglob("*.wav"))
    clips = np.stack([load_clip(p, mf.audio) for p in paths])
    X = quality.describe_many(clips, mf.audio.sample_rate)
    scale = quality.fit_scale(X)
    return mf, clips, quality.apply_scale(X, scale), scale, [p.parent.name for p in paths]


def _heard(mf, Z: np.ndarray, scale) -> np.ndarray:
    """Descriptors of the audio decoded from codes ``Z``, as rendering hears it."""
    S = spectra.unit_to_magnitude(mf.decode(np.asarray(Z, np.float32)), mf.audio)
    y, _ = reconstruct(S, mf.audio, n_iter=32)
    return quality.apply_scale(quality.describe_many(y, mf.audio.sample_rate), scale)


@pytest.mark.parametrize("category", CATEGORIES)
def test_near_outputs_are_recognised_as_their_category(trained, category):
    from pipeline.sampler import draw_codes

    mf, _, T, scale, labels = trained
    Z = draw_codes(*mf.samplers(), 16, near=category, rng=1)
    predicted = quality.knn_classify(T, labels, _heard(mf, Z, scale), k=5)
    assert np.mean([p == category for p in predicted]) >= 0.75, predicted


def test_reconstructions_sound_like_their_own_originals(trained):
    mf, clips, T, scale, _ = trained
    mu, _ = mf.encode(spectra.clip_to_unit(clips, mf.audio))
    spacing = quality.typical_spacing(T)
    ratio = np.median(quality.paired_distance_ratio(_heard(mf, mu, scale), T, spacing))
    # one average sound for every clip: what a model that learned nothing would give
    average = np.median(quality.paired_distance_ratio(
        _heard(mf, np.repeat(mu.mean(0, keepdims=True), len(mu), 0), scale), T, spacing))
    assert ratio < 3.0 and ratio < 0.5 * average, (ratio, average)
