"""Audio descriptors and set distances: how close are rendered sounds to real ones?

No pretrained audio embedding may be downloaded here, so sounds are compared in a
small space of hand-made descriptors computed from the waveforms (common practice
for audio when no learned embedding is at hand), all at :data:`DESCRIPTOR_SR`:

* MFCC 0-12, mean and standard deviation over time (timbre and its motion;
  librosa.feature.mfcc, 40 mel bands, frames of 2048 with a hop of 512),
* spectral centroid (log kHz) and flatness (log), mean and standard deviation,
  all of these over the frames within 60 dB of the loudest (librosa.feature): what
  lies below belongs to the decay descriptors. Flatness (the geometric over the
  arithmetic mean of the power spectrum) is taken with every bin floored 60 dB below
  its frame's loudest: the geometric mean follows the quietest bins, and an inaudible
  noise floor (or its absence) would otherwise decide it,
* decay: log of the time the frame RMS takes from its peak to fall for good
  below -20 dB and -40 dB re peak, and the level of the last 200 ms re peak (dB).

Sets of descriptors are compared by the Fréchet distance between Gaussians fitted
to them (the formula of Dowson & Landau 1982, used for generative models by Heusel
et al. 2017 as "FID"), after scaling every dimension by the real training set's
statistics (:func:`fit_scale`), so that no descriptor dominates by its unit.

Pure functions: arrays in, arrays or numbers out.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

DESCRIPTOR_SR = 44100
N_MFCC = 13
_N_FFT, _HOP, _N_MELS = 2048, 512, 40
_ACTIVE_DB = -60.0  # frames within this of the loudest frame count as sounding
_TAIL_S = 0.2
DESCRIPTOR_NAMES = (
    [f"mfcc{i}_mean" for i in range(N_MFCC)]
    + [f"mfcc{i}_std" for i in range(N_MFCC)]
    + ["centroid_mean", "centroid_std", "flatness_mean", "flatness_std",
       "decay20", "decay40", "tail_db"]
)


def _decay_time(env_db: np.ndarray, drop_db: float, hop_s: float) -> float:
    """Seconds from the envelope's peak to the last frame at or above ``-drop_db`` re peak."""
    peak = int(np.argmax(env_db))
    above = np.nonzero(env_db[peak:] >= env_db[peak] - drop_db)[0]
    return float(above[-1]) * hop_s


def floored_flatness(power: np.ndarray, floor_db: float = _ACTIVE_DB) -> np.ndarray:
    """Spectral flatness of each frame (column) of a power spectrogram, every bin floored
    ``-floor_db`` dB below its frame's loudest bin: ``gmean(P) / mean(P)``."""
    P = np.maximum(power, power.max(axis=0, keepdims=True) * 10.0 ** (floor_db / 10.0))
    P = np.maximum(P, 1e-30)
    return np.exp(np.mean(np.log(P), axis=0)) / np.mean(P, axis=0)


def describe(y: np.ndarray, sr: int) -> np.ndarray:
    """Descriptor vector of one clip (see the module docstring), float64 ``(D,)``.

    Parameters
    ----------
    y : np.ndarray [shape=(n,)], mono, finite
    sr : int
        Its sample rate; the clip is resampled (soxr) to :data:`DESCRIPTOR_SR` first.
    """
    import librosa

    y = np.asarray(y, dtype=np.float64).reshape(-1)
    if sr != DESCRIPTOR_SR:
        import soxr

        y = soxr.resample(y, sr, DESCRIPTOR_SR, quality="HQ")
    if len(y) < _N_FFT:
        y = np.pad(y, (0, _N_FFT - len(y)))
    S = np.abs(librosa.stft(y, n_fft=_N_FFT, hop_length=_HOP, center=True, pad_mode="constant"))
    power = S**2
    mel = librosa.feature.melspectrogram(S=power, sr=DESCRIPTOR_SR, n_mels=_N_MELS)
    # top_db relative to the clip's own peak: a clip's silence reads the same low value
    mfcc = librosa.feature.mfcc(
        S=librosa.power_to_db(mel, ref=np.max, amin=1e-10, top_db=80.0), n_mfcc=N_MFCC
    )
    frame_db = 10.0 * np.log10(np.maximum(power.mean(axis=0), 1e-20))
    env_db = frame_db - frame_db.max()
    active = env_db >= _ACTIVE_DB
    mfcc = mfcc[:, active]
    centroid = librosa.feature.spectral_centroid(S=S, sr=DESCRIPTOR_SR)[0][active]
    flatness = floored_flatness(power[:, active])
    log_centroid = np.log(np.maximum(centroid, 20.0) / 1000.0)
    log_flatness = np.log(np.maximum(flatness, 1e-10))
    hop_s = _HOP / DESCRIPTOR_SR
    tail = int(round(_TAIL_S / hop_s))
    tail_db = max(float(np.mean(env_db[-tail:])), -100.0)
    return np.concatenate([
        mfcc.mean(axis=1), mfcc.std(axis=1),
        [log_centroid.mean(), log_centroid.std(), log_flatness.mean(), log_flatness.std(),
         np.log(_decay_time(env_db, 20.0, hop_s) + 0.01),
         np.log(_decay_time(env_db, 40.0, hop_s) + 0.01), tail_db],
    ])


def describe_many(Y: Sequence[np.ndarray] | np.ndarray, sr: int) -> np.ndarray:
    """:func:`describe` of every clip, ``(N, D)``."""
    if not len(Y):
        return np.empty((0, len(DESCRIPTOR_NAMES)))
    return np.stack([describe(y, sr) for y in Y])


def fit_scale(X: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per-dimension mean and standard deviation of a reference set (std floored at 1e-6)."""
    X = np.asarray(X, dtype=np.float64)
    return X.mean(axis=0), np.maximum(X.std(axis=0), 1e-6)


def apply_scale(X: np.ndarray, scale: tuple[np.ndarray, np.ndarray]) -> np.ndarray:
    mean, std = scale
    return (np.asarray(X, dtype=np.float64) - mean) / std


def gaussian_frechet(
    m1: np.ndarray, C1: np.ndarray, m2: np.ndarray, C2: np.ndarray
) -> float:
    """Squared Fréchet distance between N(m1, C1) and N(m2, C2).

    ``||m1 - m2||^2 + Tr(C1 + C2 - 2 (C1 C2)^(1/2))`` (Dowson & Landau 1982; the "FID"
    of Heusel et al. 2017 is this value). The matrix square root is scipy's
    ``sqrtm``; its negligible imaginary part (rounding) is dropped.
    """
    import scipy.linalg

    m1, m2 = np.atleast_1d(m1).astype(np.float64), np.atleast_1d(m2).astype(np.float64)
    C1, C2 = np.atleast_2d(C1).astype(np.float64), np.atleast_2d(C2).astype(np.float64)
    covmean = scipy.linalg.sqrtm(C1 @ C2)
    if not np.all(np.isfinite(covmean)):  # singular product: regularise both a little
        eye = np.eye(len(m1)) * 1e-6
        covmean = scipy.linalg.sqrtm((C1 + eye) @ (C2 + eye))
    covmean = np.real(covmean)
    diff = m1 - m2
    value = diff @ diff + np.trace(C1) + np.trace(C2) - 2.0 * np.trace(covmean)
    return float(max(value, 0.0))


def frechet_distance(X: np.ndarray, Y: np.ndarray) -> float:
    """:func:`gaussian_frechet` between Gaussians fitted to two sets of vectors ``(n, D)``."""
    X, Y = np.asarray(X, dtype=np.float64), np.asarray(Y, dtype=np.float64)
    return gaussian_frechet(X.mean(0), np.cov(X, rowvar=False), Y.mean(0), np.cov(Y, rowvar=False))


def subsampled_frechet(
    X: np.ndarray, ref: np.ndarray, *, size: int | None = None, draws: int = 10,
    rng: np.random.Generator | int | None = 0,
) -> float:
    """Median Fréchet distance of ``size``-row subsets of ``X`` against ``ref``.

    The distance is biased by set size (smaller sets read larger), so every set is
    compared at the same size, by default ``len(ref)``; when ``X`` has no more rows
    than that, it is used whole.
    """
    rng = rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)
    size = len(ref) if size is None else size
    if len(X) <= size:
        return frechet_distance(X, ref)
    return float(np.median([
        frechet_distance(X[rng.choice(len(X), size, replace=False)], ref) for _ in range(draws)
    ]))


def nearest_distances(X: np.ndarray, ref: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """For each row of ``X``: index of and Euclidean distance to its nearest row of ``ref``."""
    from scipy.spatial import cKDTree

    dist, idx = cKDTree(np.asarray(ref, dtype=np.float64)).query(np.asarray(X, dtype=np.float64))
    return np.asarray(idx), np.asarray(dist)


def knn_classify(
    train: np.ndarray, labels: Sequence[str], X: np.ndarray, *, k: int = 5
) -> list[str]:
    """Majority label of the ``k`` nearest training rows (ties go to the nearer neighbours)."""
    from scipy.spatial import cKDTree

    labels = list(labels)
    k = min(k, len(labels))
    _, idx = cKDTree(np.asarray(train, dtype=np.float64)).query(np.asarray(X), k=k)
    idx = np.asarray(idx).reshape(len(X), k)
    out = []
    for row in idx:
        votes: dict[str, float] = {}
        for rank, j in enumerate(row):  # the rank breaks ties toward the nearer neighbours
            votes[labels[j]] = votes.get(labels[j], 0.0) + 1.0 - rank * 1e-3
        out.append(max(votes, key=votes.get))
    return out


def copy_ratio(outputs: np.ndarray, train: np.ndarray, heldout: np.ndarray) -> float:
    """Median distance of outputs to their nearest training sound, over the same for real
    held-out sounds. Near 1: as far from the training sounds as new real sounds are;
    below about 0.5: near-copies."""
    ref = float(np.median(nearest_distances(heldout, train)[1]))
    return float(np.median(nearest_distances(outputs, train)[1])) / max(ref, 1e-12)


def typical_spacing(reference: np.ndarray, others: np.ndarray | None = None) -> float:
    """Median distance from each row of ``others`` to its nearest row of ``reference`` or,
    without ``others``, from each reference row to its nearest other reference row."""
    from scipy.spatial import cKDTree

    reference = np.asarray(reference, dtype=np.float64)
    if others is not None:
        return float(np.median(nearest_distances(others, reference)[1]))
    if len(reference) < 2:
        return 1.0
    d, _ = cKDTree(reference).query(reference, k=2)
    return float(np.median(d[:, 1]))


def paired_distance_ratio(a: np.ndarray, b: np.ndarray, spacing: float) -> np.ndarray:
    """Distance of each row of ``a`` to its own row of ``b``, over ``spacing``
    (:func:`typical_spacing`).

    For reconstructions: below 1 a reconstruction is closer to its original than the
    typical distance between two real sounds.
    """
    return np.linalg.norm(np.asarray(a) - np.asarray(b), axis=1) / max(spacing, 1e-12)
