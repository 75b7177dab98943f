"""Fast Griffin-Lim: consistency with the reference STFT, convergence, librosa, seeds, errors."""

from __future__ import annotations

import librosa
import numpy as np
import pytest

from pipeline import phase, spectra
from pipeline.errors import ParameterError

RNG_SEED = 1984  # conftest's rng fixture: the draws these tests were written with

SR, N_FFT, HOP, N = 16000, 512, 128, 8000  # the tiny preset's STFT


def _harmonic(n=N, f0=220.0, sr=SR):
    t = np.arange(n) / sr
    y = sum(np.sin(2 * np.pi * f0 * h * t) / h for h in range(1, 6)) * np.exp(-2 * t)
    return 0.5 * y / np.max(np.abs(y))


def _hits(rng, b, n=N, sr=SR):
    """Decaying noise bursts and pitched decays, like one-shots."""
    t = np.arange(n) / sr
    out = []
    for i in range(b):
        if i % 2:
            y = rng.standard_normal(n) * np.exp(-t * rng.uniform(8, 30))
        else:
            y = np.sin(2 * np.pi * rng.uniform(60, 900) * t) * np.exp(-t * rng.uniform(3, 12))
        out.append(0.9 * y / np.max(np.abs(y)))
    return np.stack(out)


def _mag(y, n_fft=N_FFT, hop=HOP):
    return spectra.magnitude(np.asarray(y, np.float64), n_fft=n_fft, hop_length=hop)


def _sc_db(S, y, n_fft=N_FFT, hop=HOP):
    return spectra.spectral_convergence_db(S, _mag(y, n_fft, hop))


@pytest.mark.parametrize(("n_fft", "hop", "n"), [(512, 128, 8000), (1024, 256, 22050),
                                                  (2048, 512, 5000)])
def test_fast_transforms_equal_spectra_stft_and_istft(rng, n_fft, hop, n):
    # the loop's frame-major STFT pair must be the spectra module's transforms, not another
    T = 1 + n // hop
    plan = phase._Plan(n_fft, hop, n, T)
    shape = (2, 1 + n_fft // 2, T)
    X = rng.standard_normal(shape) + 1j * rng.standard_normal(shape)
    X[:, 0].imag = 0
    X[:, -1].imag = 0
    S = np.abs(X).astype(np.float32)
    chunk = phase._Chunk(plan, np.ascontiguousarray(S.transpose(0, 2, 1)))
    frames = chunk.istft(np.ascontiguousarray(X.transpose(0, 2, 1)).astype(np.complex64))
    y = chunk.y[:, n_fft // 2 : n_fft // 2 + n]
    y_ref = spectra.istft(X, n_fft=n_fft, hop_length=hop, length=n)
    assert np.max(np.abs(y - y_ref)) < 1e-5 * np.max(np.abs(y_ref))
    C = chunk.stft(frames).transpose(0, 2, 1)
    X_ref = spectra.stft(y_ref, n_fft=n_fft, hop_length=hop)
    assert np.max(np.abs(C - X_ref)) < 1e-5 * np.max(np.abs(X_ref))


def test_zero_iterations_zero_phase_is_the_istft_of_the_magnitudes(rng):
    S = _mag(_hits(rng, 3)).astype(np.float32)
    y = phase.griffin_lim(S, n_fft=N_FFT, hop_length=HOP, length=N, n_iter=0, init="zeros")
    ref = spectra.istft(S.astype(np.float64), n_fft=N_FFT, hop_length=HOP, length=N)
    assert y.dtype == np.float32 and y.shape == (3, N)
    np.testing.assert_allclose(y, ref, atol=1e-6)


@pytest.mark.parametrize("momentum", [0.0, 0.5, 0.99])
def test_matches_a_direct_transcription_of_the_fast_griffin_lim_update(rng, momentum):
    # Perraudin et al. 2013 as in ltfat's gla.m (tests/references.md section 4), written out with
    # the reference transforms: c = STFT(ISTFT(c)); t_n = S e^{i angle c};
    # c = t_n + a (t_n - t_{n-1}), t_0 = c_0; output ISTFT(t_N)
    S = _mag(_hits(rng, 2))
    n_iter, seed = 6, 2
    stft = lambda y: spectra.stft(y, n_fft=N_FFT, hop_length=HOP)  # noqa: E731
    istft = lambda X: spectra.istft(X, n_fft=N_FFT, hop_length=HOP, length=N)  # noqa: E731
    c = S * np.exp(1j * phase.random_phase(S.shape[1], S.shape[2], seed=seed, count=2))
    t_prev, sc_ref = c, []
    for _ in range(n_iter):
        rebuilt = stft(istft(c))
        sc_ref.append(spectra.spectral_convergence(S, np.abs(rebuilt)))
        t = S * np.exp(1j * np.angle(rebuilt))
        c, t_prev = t + momentum * (t - t_prev), t
    y_ref = istft(t_prev)
    y, sc = phase.griffin_lim_trace(S.astype(np.float32), n_fft=N_FFT, hop_length=HOP,
                                    length=N, n_iter=n_iter, momentum=momentum, init="random",
                                    seed=seed)
    assert np.max(np.abs(y - y_ref)) < 1e-4 * np.max(np.abs(y_ref))
    np.testing.assert_allclose(sc[:, :n_iter], np.stack(sc_ref, axis=1), rtol=1e-4)
    np.testing.assert_allclose(sc[:, -1], spectra.spectral_convergence(S, _mag(y_ref)), rtol=1e-4)


def test_plain_griffin_lim_never_increases_the_spectral_distance():
    # Griffin & Lim 1984: the distance to the target magnitudes is non-increasing for
    # plain GLA (momentum 0). tests/references.md section 4 (the paper's property is [M]).
    S = _mag(_harmonic()).astype(np.float32)
    _, sc = phase.griffin_lim_trace(S, n_fft=N_FFT, hop_length=HOP, length=N, n_iter=60,
                                    momentum=0.0, seed=7)
    assert np.all(sc[1:] <= sc[:-1] * (1 + 1e-6)), np.diff(sc).max()
    assert sc[-1] < 0.5 * sc[0]  # and it does make progress


def test_trace_ends_with_the_sc_of_the_returned_signal(rng):
    S = _mag(_hits(rng, 2)).astype(np.float32)
    y, sc = phase.griffin_lim_trace(S, n_fft=N_FFT, hop_length=HOP, length=N, n_iter=5)
    assert sc.shape == (2, 6)
    np.testing.assert_allclose(20 * np.log10(sc[:, -1]), _sc_db(S, y), atol=1e-3)
    np.testing.assert_array_equal(y, phase.griffin_lim(S, n_fft=N_FFT, hop_length=HOP,
                                                       length=N, n_iter=5))


@pytest.mark.parametrize("momentum", [0.0, 0.99])
def test_reaches_librosa_griffinlim_sc_with_matched_settings(rng, momentum):
    S = _mag(_hits(rng, 4)).astype(np.float32)
    n_iter, seed = 24, 3
    y = phase.griffin_lim(S, n_fft=N_FFT, hop_length=HOP, length=N, n_iter=n_iter,
                          momentum=momentum, init="random", seed=seed)
    # librosa.griffinlim on the same (unscaled) magnitudes, the same initial phases (it
    # draws rng.random(S.shape) per call: a shared default_rng(seed) gives our batch draw)
    gen = np.random.default_rng(seed)
    S_lib = S / spectra.stft_scale(N_FFT)
    y_lib = np.stack([
        librosa.griffinlim(s, n_iter=n_iter, hop_length=HOP, win_length=N_FFT, n_fft=N_FFT,
                           window="hann", center=True, pad_mode="constant", length=N,
                           momentum=momentum, init="random", random_state=gen)
        for s in S_lib
    ])
    ours, theirs = _sc_db(S, y), _sc_db(S, y_lib)
    assert np.all(ours <= theirs + 0.01), (ours, theirs)
    # librosa's update is a reparameterisation of Perraudin et al.'s
    # (tests/references.md section 4): the iterates agree up to float32 rounding
    assert np.max(np.abs(y - y_lib)) < 1e-3 * np.max(np.abs(y_lib))


def test_momentum_beats_plain_griffin_lim_after_100_iterations():
    # Perraudin, Balazs & Sondergaard 2013: faster convergence and a smaller final error
    S = _mag(_harmonic()).astype(np.float32)
    kw = dict(n_fft=N_FFT, hop_length=HOP, length=N, n_iter=100, seed=11)
    fast = _sc_db(S, phase.griffin_lim(S, momentum=0.99, **kw))
    plain = _sc_db(S, phase.griffin_lim(S, momentum=0.0, **kw))
    assert fast < plain - 1.0, (fast, plain)


def test_momentum_warning_and_error():
    S = np.ones((257, 63), np.float32)
    kw = dict(n_fft=N_FFT, hop_length=HOP, length=N, n_iter=1)
    # librosa.griffinlim's behaviour (tests/references.md section 4): warn above 1, reject below 0
    with pytest.warns(UserWarning, match="momentum"):
        phase.griffin_lim(S, momentum=1.5, **kw)
    with pytest.raises(ParameterError, match="momentum"):
        phase.griffin_lim(S, momentum=-0.1, **kw)


def test_random_phase_is_the_documented_draw():
    a = phase.random_phase(5, 7, seed=4, start=2, count=3)
    ref = 2 * np.pi * np.random.default_rng(4).random((6, 5, 7))[2:5]
    np.testing.assert_array_equal(a, ref)
    b = phase.random_phase(5, 7, seed=[9, 4], start=1, count=1)
    np.testing.assert_array_equal(b[0], 2 * np.pi * np.random.default_rng(4).random((5, 7)))


def test_seeds_repeat_and_batches_split_freely(rng, monkeypatch):
    S = _mag(_hits(rng, 6)).astype(np.float32)
    kw = dict(n_fft=N_FFT, hop_length=HOP, length=N, n_iter=6)
    a = phase.griffin_lim(S, seed=5, **kw)
    np.testing.assert_array_equal(a, phase.griffin_lim(S, seed=5, **kw))
    assert not np.allclose(a, phase.griffin_lim(S, seed=6, **kw))
    # chunking and threads do not change the result
    np.testing.assert_array_equal(a, phase.griffin_lim(S, seed=5, jobs=1, **kw))
    monkeypatch.setattr(phase, "_CHUNK_BYTES", 1)  # one clip per chunk
    np.testing.assert_array_equal(a, phase.griffin_lim(S, seed=5, jobs=2, **kw))
    # per-clip seeds: a clip's output does not depend on its batch
    per = phase.griffin_lim(S, seed=[10, 11, 12, 13, 14, 15], **kw)
    np.testing.assert_allclose(per[3], phase.griffin_lim(S[3], seed=[13], **kw), atol=1e-7)
    zeros = phase.griffin_lim(S, init="zeros", seed=1, **kw)
    np.testing.assert_array_equal(zeros, phase.griffin_lim(S, init="zeros", seed=2, **kw))


def test_single_spectrogram_gives_one_clip(rng):
    S = _mag(_hits(rng, 1)[0]).astype(np.float32)
    y = phase.griffin_lim(S, n_fft=N_FFT, hop_length=HOP, length=N, n_iter=2)
    assert y.shape == (N,) and y.dtype == np.float32


@pytest.mark.parametrize(
    ("S", "kw", "match"),
    [
        (np.ones((256, 63)), {}, "bins"),
        (np.ones((257, 60)), {}, "frames"),
        (np.ones((2, 2, 257, 63)), {}, "shaped"),
        (np.full((257, 63), np.nan), {}, "finite"),
        (-np.ones((257, 63)), {}, "non-negative"),
        (np.ones((257, 63)), {"init": "magic"}, "init"),
        (np.ones((257, 63)), {"n_iter": -1}, "n_iter"),
        (np.ones((2, 257, 63)), {"seed": [1, 2, 3]}, "seeds"),
        (np.ones((257, 63)), {"hop_length": 100}, "divide"),
    ],
)
def test_bad_arguments_are_parameter_errors(S, kw, match):
    args = dict(n_fft=N_FFT, hop_length=HOP, length=N, n_iter=1) | kw
    with pytest.raises(ParameterError, match=match):
        phase.griffin_lim(S.astype(np.float32), **args)


def test_silent_regions_stay_finite():
    S = np.zeros((2, 257, 63), np.float32)
    S[0, 10:20, :5] = 1.0
    y = phase.griffin_lim(S, n_fft=N_FFT, hop_length=HOP, length=N, n_iter=8)
    assert np.all(np.isfinite(y)) and np.all(y[1] == 0)
