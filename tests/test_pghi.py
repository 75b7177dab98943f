"""Phase gradient heuristic integration (pipeline.pghi) against closed-form phases.

Průša, Balazs & Søndergaard 2017 (IEEE/ACM TASLP 25(5)), Sec. II: for a Gaussian
window the STFT phase gradient follows from the log-magnitude gradient. On signals
whose STFT phase is known in closed form (an impulse, a linear chirp) the
integrated phase must equal the true one up to one constant: measured as the
phase coherence ``|sum |X|^2 exp(i (phi - phi_hat))| / sum |X|^2`` (1 = exact).
"""

from __future__ import annotations

import numpy as np
import pytest

from pipeline import pghi, phase, spectra

N_FFT, HOP, N = 512, 128, 8192
LAM = pghi.HANN_LAMBDA * N_FFT**2


def _gauss_stft(y: np.ndarray) -> np.ndarray:
    """Our STFT layout (centred frames, phase from each frame's first sample) with a
    Gaussian window exp(-pi n^2 / lam), the window the paper's relations are exact for."""
    n = np.arange(N_FFT) - N_FFT // 2
    w = np.exp(-np.pi * n**2 / LAM)
    frames = spectra.frame_signal(y, n_fft=N_FFT, hop_length=HOP) * w
    return np.swapaxes(np.fft.rfft(frames, axis=-1), -1, -2)


def _coherence(X: np.ndarray, angles: np.ndarray, floor_db: float = -50.0) -> float:
    """Magnitude-weighted agreement of two phase fields up to a constant (1 = identical)."""
    A = np.abs(X)
    keep = A > A.max() * 10 ** (floor_db / 20)
    w = A[keep] ** 2
    return float(np.abs(np.sum(w * np.exp(1j * (np.angle(X[keep]) - angles[keep])))) / w.sum())


def _impulse() -> np.ndarray:
    y = np.zeros(N)
    y[N // 2 + 37] = 1.0
    return y


def _chirp() -> np.ndarray:
    t = np.arange(N)
    f0, f1 = 0.02, 0.2  # cycles per sample, rising linearly over the clip
    return np.cos(2 * np.pi * (f0 * t + 0.5 * (f1 - f0) / N * t**2))


@pytest.mark.parametrize("signal", [_impulse, _chirp])
def test_gaussian_window_phase_is_recovered_up_to_a_constant(signal):
    X = _gauss_stft(signal())
    angles = pghi.pghi_phase(np.abs(X)[None], n_fft=N_FFT, hop_length=HOP, lam=LAM)[0]
    assert _coherence(X, angles) > 0.99


def test_hann_window_phase_of_a_chirp_is_recovered_closely():
    # The Hann window is only close to a Gaussian: a looser bound, and a chirp only. An
    # impulse between frame centres is the worst case for Hann: its log-magnitude slope
    # across frames is ~20 % off the Gaussian's, so the group delay, integrated over
    # 257 bins, drifts by radians (it is a start for Griffin-Lim, not an answer:
    # test_pghi_alone_beats_a_random_start_by_a_wide_margin covers impulses).
    X = spectra.stft(_chirp(), n_fft=N_FFT, hop_length=HOP)
    angles = pghi.pghi_phase(np.abs(X)[None], n_fft=N_FFT, hop_length=HOP)[0]
    assert _coherence(X, angles) > 0.95


def _sc_db(S: np.ndarray, y: np.ndarray) -> np.ndarray:
    return spectra.spectral_convergence_db(S, spectra.magnitude(y, n_fft=N_FFT, hop_length=HOP))


def _hits(rng: np.random.Generator, n: int) -> np.ndarray:
    t = np.arange(N) / 16000
    tone = np.sin(2 * np.pi * 180 * t * (1 + 0.3 * np.exp(-t / 0.02)))
    return np.stack([(tone + 0.3 * rng.standard_normal(N)) * np.exp(-t / 0.08) for _ in range(n)])


def test_pghi_alone_beats_a_random_start_by_a_wide_margin():
    rng = np.random.default_rng(3)
    y = np.concatenate([_chirp()[None], _impulse()[None], _hits(rng, 2)])
    S = spectra.magnitude(y, n_fft=N_FFT, hop_length=HOP).astype(np.float32)
    kw = dict(n_fft=N_FFT, hop_length=HOP, length=N, n_iter=0)
    from_pghi = _sc_db(S, phase.griffin_lim(S, init="pghi", **kw))
    from_random = _sc_db(S, phase.griffin_lim(S, init="random", **kw))
    assert np.all(from_pghi < from_random - 6.0), (from_pghi, from_random)


def test_plain_griffin_lim_from_pghi_never_ends_worse_than_its_start():
    # Griffin & Lim 1984: plain GLA (momentum 0) does not increase the spectral distance
    S = spectra.magnitude(_hits(np.random.default_rng(5), 3), n_fft=N_FFT,
                          hop_length=HOP).astype(np.float32)
    _, sc = phase.griffin_lim_trace(S, n_fft=N_FFT, hop_length=HOP, length=N, n_iter=20,
                                    momentum=0.0, init="pghi")
    assert np.all(sc[:, 1:] <= sc[:, :-1] * (1 + 1e-6))
    assert np.all(sc[:, -1] <= sc[:, 0])


def test_same_seed_same_phase_and_quiet_bins_get_the_seeded_draw():
    S = spectra.magnitude(_hits(np.random.default_rng(7), 2), n_fft=N_FFT, hop_length=HOP)
    a = pghi.pghi_phase(S, n_fft=N_FFT, hop_length=HOP, seed=[4, 5])
    np.testing.assert_array_equal(a, pghi.pghi_phase(S, n_fft=N_FFT, hop_length=HOP, seed=[4, 5]))
    silent = np.zeros((1,) + S.shape[1:])
    z = pghi.pghi_phase(silent + 1e-12, n_fft=N_FFT, hop_length=HOP, seed=[9], tol_db=-1.0)
    # every coefficient ties the peak (nothing below tol) or gets default_rng(9)'s draw
    assert z.shape == silent.shape and np.all(np.isfinite(z))


def test_reconstruct_removes_the_analysis_pad_so_the_attack_starts_the_clip():
    from pipeline.config import load_settings

    audio = load_settings("tiny").audio
    y = np.zeros(audio.n_samples)
    t = np.arange(audio.n_samples - 40) / audio.sample_rate
    y[40:] = np.sin(2 * np.pi * 300 * t) * np.exp(-t / 0.05)  # onset 2.5 ms in
    S = spectra.unit_to_magnitude(spectra.clip_to_unit(y, audio), audio)[None]
    out, sc = phase.reconstruct(S, audio, n_iter=32)
    assert out.shape == (1, audio.n_samples) and sc[0] < -15
    env = np.abs(out[0])
    onset = np.argmax(env > 0.1 * env.max())
    assert abs(onset - 40) <= audio.sample_rate / 1000  # within 1 ms


def test_fast_griffin_lim_from_pghi_ends_below_its_start():
    # with momentum (Perraudin et al. 2013) the distance is not monotone, but the last
    # iterate must not be worse than the PGHI start it came from
    S = spectra.magnitude(_hits(np.random.default_rng(6), 3), n_fft=N_FFT,
                          hop_length=HOP).astype(np.float32)
    _, sc = phase.griffin_lim_trace(S, n_fft=N_FFT, hop_length=HOP, length=N, n_iter=32,
                                    momentum=0.99, init="pghi")
    assert np.all(sc[:, -1] <= sc[:, 0])


def test_every_region_starts_from_its_largest_coefficient():
    # Průša et al. 2017, Alg. 1: integration starts at the largest coefficient not yet
    # reached, which keeps its random phase. 30 islands separated by silence (more than
    # the regions found by a scan before the sorted search takes over)
    K, T = 65, 60
    S = np.zeros((1, K, T))
    rng = np.random.default_rng(11)
    tops = []
    for i in range(30):
        k, t = 3 + 6 * (i % 10), 3 + 18 * (i // 10)
        S[0, k - 2 : k + 3, t - 2 : t + 3] = rng.uniform(0.1, 0.5, (5, 5))
        S[0, k, t] = rng.uniform(0.6, 1.0)  # the island's largest
        tops.append((k, t))
    angles = pghi.pghi_phase(S, n_fft=128, hop_length=32, seed=[4])[0]
    rnd = 2 * np.pi * np.random.default_rng(4).random((K, T))
    phi = angles - np.pi * np.arange(K)[:, None]  # back to the centre-referenced phase
    for k, t in tops:
        assert phi[k, t] == pytest.approx(rnd[k, t], abs=1e-12)
    same = np.isclose(phi, rnd, rtol=0, atol=1e-9)
    assert same[S[0] > 0].sum() == 30  # only the starts; every other island coefficient integrated
    assert np.all(same[S[0] == 0])  # silence: below the tolerance, the seeded draw
