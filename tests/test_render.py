"""Rendering: finishing, loudness, quantisation and dither, WAV files, names, the manifest."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pyloudnorm
import pytest
import soundfile as sf

from pipeline import outputs, render, spectra
from pipeline.config import RenderSpec, load_settings
from pipeline.errors import AudioError, OutputError, ParameterError
from pipeline.manifest import load_manifest

SR = 48000
TINY = load_settings("tiny")


def _sine(f=997.0, seconds=1.0, amp=1.0, sr=SR):
    return amp * np.sin(2 * np.pi * f * np.arange(int(seconds * sr)) / sr)


def _ceiling(peak_db):
    return 10 ** (peak_db / 20)


def test_997_hz_full_scale_sine_reads_minus_3_01_lufs():
    y = _sine(seconds=10.0)
    got = render.integrated_loudness(y, SR)
    # BS.1770-4 Annex 1: a 0 dBFS 997 Hz sine reads -3.01 LKFS; pyloudnorm reads -3.05
    # (its K-filter is built from cookbook biquads; tests/references.md section 1)
    assert got == pytest.approx(-3.01, abs=0.05)
    assert got == pytest.approx(pyloudnorm.Meter(SR).integrated_loudness(y), abs=1e-9)
    assert render.integrated_loudness(0.1 * y, SR) == pytest.approx(-23.05, abs=0.01)


@pytest.mark.parametrize("target", [-23.0, -16.0, -14.0])
@pytest.mark.parametrize("bit_depth", ["24", "16"])
def test_loudness_targets_land_within_0_1_lu_under_the_ceiling(rng, target, bit_depth):
    t = np.arange(SR) / SR
    y = (0.3 * np.sin(2 * np.pi * 180 * t) + 0.05 * rng.standard_normal(SR)) * np.exp(-t)
    spec = RenderSpec(loudness=target, bit_depth=bit_depth, peak_db=-1.0)
    out, info = render.finish_audio(y, SR, spec, rng=rng)
    measured = pyloudnorm.Meter(SR).integrated_loudness(out.astype(np.float64))
    # EBU R 128 / AES TD1008 targets; the tolerance is the one tests/references.md section 2 asks
    assert measured == pytest.approx(target, abs=0.1), info
    assert np.max(np.abs(out)) <= _ceiling(-1.0)
    assert info["normalisation"] == f"loudness {target:g} LUFS"
    assert info["loudness_lufs"] == pytest.approx(measured, abs=1e-3)


def test_loudness_that_would_clip_is_lowered_to_the_ceiling(rng):
    y = np.zeros(SR)
    y[::4800] = 1.0  # sparse clicks: a huge crest factor
    out, info = render.finish_audio(y, SR, RenderSpec(loudness=-6.0, peak_db=-1.0), rng=rng)
    assert np.max(np.abs(out)) <= _ceiling(-1.0)
    assert "lowered to fit the peak ceiling" in info["normalisation"]
    assert info["loudness_lufs"] < -6.0


def test_clips_under_one_bs1770_block_fall_back_to_peak(rng):
    y = _sine(seconds=0.3, amp=0.2)
    out, info = render.finish_audio(y, SR, RenderSpec(loudness=-16.0, peak_db=-3.0), rng=rng)
    assert info["normalisation"] == "peak (shorter than a 400 ms BS.1770 block)"
    assert info["loudness_lufs"] is None
    # peak normalisation puts the true peak (BS.1770-4 Annex 2) on the ceiling
    assert info["true_peak_dbtp"] == pytest.approx(-3.0, abs=0.01)
    assert np.max(np.abs(out)) <= _ceiling(-3.0)
    with pytest.raises(ValueError, match="block size"):  # why: pyloudnorm refuses (its util.py)
        pyloudnorm.Meter(SR).integrated_loudness(y)


@pytest.mark.parametrize("bit_depth", ["16", "24", "32f"])
@pytest.mark.parametrize("peak_db", [0.0, -1.0, -6.0, -0.01])
def test_no_output_exceeds_the_ceiling(rng, bit_depth, peak_db):
    for k in range(5):
        y = rng.standard_normal(SR // 4) * rng.uniform(0.01, 30) + rng.uniform(-2, 2)
        spec = RenderSpec(bit_depth=bit_depth, peak_db=peak_db, loudness=-10.0 if k % 2 else None)
        out, info = render.finish_audio(y, SR, spec, rng=rng)
        assert np.max(np.abs(out)) <= _ceiling(peak_db), (k, info)
        assert info["peak_dbfs"] <= peak_db


def test_dc_is_removed_and_fades_reach_zero(rng):
    y = 0.3 + 0.1 * rng.standard_normal(SR)
    spec = RenderSpec(bit_depth="32f", fade_in_ms=2.0, fade_out_ms=20.0)
    out, _ = render.finish_audio(y, SR, spec)
    assert out[0] == 0.0 and out[-1] == 0.0
    middle = out[int(0.02 * SR) : -int(0.02 * SR)]
    assert abs(middle.mean()) < 0.01 * np.std(middle)
    n_out = int(0.02 * SR)
    assert np.max(np.abs(out[-n_out // 10 :])) < 0.05 * np.max(np.abs(out))


def test_16_bit_tpdf_dither_is_seeded_and_triangular():
    y = _sine(f=440.0, amp=0.25)
    spec = RenderSpec(bit_depth="16", peak_db=-12.0, fade_in_ms=0.0, fade_out_ms=0.0)
    a, _ = render.finish_audio(y, SR, spec, rng=np.random.default_rng(3))
    b, _ = render.finish_audio(y, SR, spec, rng=np.random.default_rng(3))
    c, _ = render.finish_audio(y, SR, spec, rng=np.random.default_rng(4))
    np.testing.assert_array_equal(a, b)
    assert not np.array_equal(a, c)
    codes = a * 32768.0
    np.testing.assert_array_equal(codes, np.rint(codes))  # exactly on the 16-bit grid
    x = y - y.mean()
    clean = x * (codes @ x) / (x @ x) / 32768.0  # the gain applied, by least squares
    err = codes - clean * 32768.0
    # TPDF (+-1 LSB) then rounding: total error variance 1/6 + 1/12 = 1/4 LSB^2, error within
    # 1.5 LSB, and independent of the signal (common practice: Vanderkooy & Lipshitz 1987)
    assert abs(err.var() - 0.25) < 0.02 and np.max(np.abs(err)) <= 1.5
    assert abs(np.corrcoef(err, clean)[0, 1]) < 0.02


def test_non_finite_audio_is_never_written(tmp_path):
    y = np.zeros(1000)
    y[10] = np.nan
    with pytest.raises(AudioError, match="non-finite"):
        render.finish_audio(y, SR, RenderSpec())
    with pytest.raises(AudioError, match="non-finite"):
        outputs.write_wav(tmp_path / "bad.wav", y, SR)
    assert list(tmp_path.iterdir()) == []


def _U(rng, b, audio=TINY.audio):
    t = np.arange(audio.n_samples) / audio.sample_rate
    y = np.stack([np.sin(2 * np.pi * (100 + 150 * i) * t) * np.exp(-6 * t) for i in range(b)])
    return spectra.clip_to_unit(0.9 * y, audio)


def _batches(rng, sizes, start=0):
    k = start
    for b in sizes:
        yield _U(rng, b), [{"stem": f"hit {k + i}", "kind": "test", "z": [0.5, k + i]}
                           for i in range(b)]
        k += b


def test_render_spectra_writes_named_files_and_a_manifest(tmp_path, rng):
    spec = RenderSpec(iterations=8, batch_size=3)
    extra = {"model": {"path": "m.pt", "sha256": "ab"}, "settings": TINY.to_dict()}
    items = render.render_spectra(_batches(rng, [4, 2]), tmp_path / "out", TINY.audio, spec,
                                  seed=1, manifest_extra=extra)
    files = sorted(p.name for p in (tmp_path / "out").glob("*.wav"))
    assert files == sorted(f"hit {k}.wav" for k in range(6))
    manifest = load_manifest(tmp_path / "out")
    assert manifest["tool"] == "shotsmith" and manifest["complete"] is True
    assert manifest["model"] == {"path": "m.pt", "sha256": "ab"}
    assert manifest["render"]["iterations"] == 8 and manifest["settings"]["preset"] == "tiny"
    assert [it["file"] for it in manifest["items"]] == [it["file"] for it in items]
    first = manifest["items"][0]
    assert list(first)[:8] == ["file", "run", "model", "kind", "z", "seed", "sources", "nearest"]
    assert first["model"] == {"path": "m.pt", "sha256": "ab"} and first["run"] == 1
    on_disk = json.loads((tmp_path / "out" / "manifest.json").read_text(encoding="utf-8"))
    assert on_disk["items"] == [{k: v for k, v in it.items() if k != "model"}
                                for it in manifest["items"]]
    assert first["seed"] == 1 and first["z"] == [0.5, 0]
    for it in manifest["items"]:
        assert it["sc_db"] < -10 and it["peak_dbfs"] <= -1.0 and it["normalisation"] == "peak"
        y, sr = sf.read(tmp_path / "out" / it["file"])
        assert sr == TINY.audio.sample_rate and len(y) == TINY.audio.n_samples


def test_render_spectra_is_reproducible_and_names_stay_unique(tmp_path, rng):
    U = _U(rng, 3)
    items = [{"stem": "same", "seed": 4}, {"stem": "same", "seed": 5}, {"stem": "SAME"}]
    spec = RenderSpec(iterations=4, bit_depth="16")
    for run in ("a", "b"):
        render.render_spectra([(U, [dict(i) for i in items])], tmp_path / run, TINY.audio, spec)
    names = sorted(p.name for p in (tmp_path / "a").glob("*.wav"))
    assert names == ["SAME-3.wav", "same-2.wav", "same.wav"]
    for n in names:
        assert (tmp_path / "a" / n).read_bytes() == (tmp_path / "b" / n).read_bytes()


def test_render_refuses_existing_files_and_keeps_the_manifest_true(tmp_path, rng):
    spec = RenderSpec(iterations=2)
    render.render_spectra(_batches(rng, [2]), tmp_path, TINY.audio, spec)
    before = (tmp_path / "hit 0.wav").read_bytes()
    with pytest.raises(OutputError, match=r"hit 0\.wav"):
        render.render_spectra(_batches(rng, [2]), tmp_path, TINY.audio, spec)
    assert (tmp_path / "hit 0.wav").read_bytes() == before
    manifest = load_manifest(tmp_path)
    assert sorted(it["file"] for it in manifest["items"]) == ["hit 0.wav", "hit 1.wav"]
    assert len(manifest["runs"]) == 1  # the refused run wrote nothing, so left no trace
    render.render_spectra(_batches(rng, [1]), tmp_path, TINY.audio, spec, overwrite=True)
    manifest = load_manifest(tmp_path)
    by_file = {it["file"]: it["run"] for it in manifest["items"]}
    assert by_file == {"hit 0.wav": 2, "hit 1.wav": 1}  # the replaced file: the new run's


def test_interrupted_render_leaves_a_manifest_of_exactly_the_files_present(tmp_path, rng):
    def interrupted():
        yield from _batches(rng, [2, 2])
        raise KeyboardInterrupt  # Ctrl-C while the third batch is being decoded

    with pytest.raises(KeyboardInterrupt):
        render.render_spectra(interrupted(), tmp_path, TINY.audio, RenderSpec(iterations=2))
    manifest = json.loads((tmp_path / "manifest.json").read_text(encoding="utf-8"))
    present = sorted(p.name for p in tmp_path.iterdir() if p.name != "manifest.json")
    assert load_manifest(tmp_path)["items"] == [dict(it, model=None) for it in manifest["items"]]
    assert sorted(it["file"] for it in manifest["items"]) == present
    assert len(present) == 4 and manifest["complete"] is False

    calls = []

    def stop_after_one(done, total):  # interruption between batches, via the progress hook
        calls.append(done)
        raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        render.render_spectra(_batches(rng, [3, 3], start=10), tmp_path / "p", TINY.audio,
                              RenderSpec(iterations=2, batch_size=2), progress=stop_after_one)
    manifest = json.loads((tmp_path / "p" / "manifest.json").read_text(encoding="utf-8"))
    present = sorted(p.name for p in (tmp_path / "p").glob("*.wav"))
    assert sorted(it["file"] for it in manifest["items"]) == present and len(present) == 2


def test_shape_mismatch_is_a_parameter_error(tmp_path, rng):
    with pytest.raises(ParameterError, match="do not match"):
        render.render_spectra([(np.zeros((1, 10, 10)), [{}])], tmp_path, TINY.audio, RenderSpec())


def test_items_without_a_stem_get_numbered_names(tmp_path, rng):
    items = render.render_spectra([(_U(rng, 2), [{}, {}])], Path(tmp_path), TINY.audio,
                                  RenderSpec(iterations=1), seed=7)
    assert [it["file"] for it in items] == ["sound-0000.wav", "sound-0001.wav"]
    assert [it["seed"] for it in items] == [7, 8]


# --- the session rate (render.output_rate) --------------------------------------------------


def test_soxr_to_48_khz_keeps_a_1_khz_tone_within_one_bin():
    # soxr (python-soxr, "HQ") as the resampler: the spectral peak of a 1 kHz tone resampled
    # from 44.1 kHz to 48 kHz stays in the bin of 1 kHz (bin width 48000 / n)
    from pipeline.frontend import resample

    x = _sine(1000.0, seconds=0.5, amp=0.5, sr=44100)
    y = resample(x, orig_sr=44100, target_sr=48000)
    assert len(y) == 24000
    spectrum = np.abs(np.fft.rfft(y * np.hanning(len(y))))
    assert abs(np.argmax(spectrum) * 48000 / len(y) - 1000.0) <= 48000 / len(y)


def test_output_rate_writes_at_the_session_rate_and_records_both_rates(tmp_path):
    # a 1 kHz tone's spectrogram at the tiny preset's 16 kHz, rendered at 48 kHz: the WAV is
    # at 48 kHz, as long as the clip, its tone at 1 kHz within one bin, and nothing above
    # the analysis band (8 kHz) but resampling's own floor
    audio = TINY.audio
    t = np.arange(audio.n_samples) / audio.sample_rate
    U = spectra.clip_to_unit(0.5 * np.sin(2 * np.pi * 1000.0 * t), audio)[None]
    render.render_spectra([(U, [{"stem": "tone", "kind": "test"}])], tmp_path, audio,
                          RenderSpec(iterations=16, output_rate=48000))
    y, sr = sf.read(tmp_path / "tone.wav")
    assert sr == 48000 and len(y) == round(audio.duration * 48000)
    spectrum = np.abs(np.fft.rfft(y * np.hanning(len(y)))) ** 2
    f = np.fft.rfftfreq(len(y), 1 / sr)
    assert abs(f[np.argmax(spectrum)] - 1000.0) <= sr / len(y)
    assert spectrum[f > 8500].sum() < 1e-6 * spectrum.sum()
    m = load_manifest(tmp_path)
    assert m["sample_rate"] == 16000 and m["output_rate"] == 48000


def test_gate_silences_only_bins_quieter_than_the_gate():
    audio = TINY.audio  # db_floor -100, db_ceiling 0: unit 0.05 is -95 dB
    U = np.array([[[0.0, 0.02, 0.0499, 0.0501, 0.5, 1.0]]], dtype=np.float32)
    got = spectra.gate_quiet_bins(U, audio, -95.0)
    np.testing.assert_array_equal(got, np.array([[[0, 0, 0, 0.0501, 0.5, 1]]], np.float32))
    # at or below the floor the gate does nothing
    assert spectra.gate_quiet_bins(U, audio, audio.db_floor) is U


def _decaying_tone_over_a_bed(audio, bed_unit):
    """A 1 kHz tone's spectrogram that decays by 60 dB in 0.15 s and stops at 0.3 s, under
    a bed of every bin at ``bed_unit`` in every frame: what a decoder makes of silence."""
    t = np.arange(audio.n_samples) / audio.sample_rate
    y = np.sin(2 * np.pi * 1000.0 * t) * 10.0 ** (-3.0 * t / 0.15) * (t < 0.3)
    U = spectra.clip_to_unit(0.89 * y, audio)
    return np.maximum(U, bed_unit)[None]


@pytest.mark.parametrize("gate_db, silent_tail", [(-90.0, True), (-100.0, False)])
def test_decoders_faint_bed_renders_as_digital_silence_behind_the_gate(gate_db, silent_tail):
    drums = load_settings("drums")  # 1025 bins: the bed sums over all of them
    audio = drums.audio
    U = _decaying_tone_over_a_bed(audio, bed_unit=0.08)  # -92 dB in every bin
    spec = drums.render
    U = spectra.gate_quiet_bins(U, audio, gate_db)  # as sounds.decoded_batches does
    (done,) = render.finish_batches([(U, [{"stem": "x"}])], audio, spec)
    out, length = done[0].audio, done[0].meta["natural_length_s"]
    tail = out[int(0.5 * audio.sample_rate):]
    if silent_tail:
        # the tone falls 60 dB below its peak near 0.15 s (0.3 s at the latest, where it stops)
        assert length < 0.35 and not np.any(tail)
    else:
        # without the gate the bed alone stays within 60 dB of the peak to the last sample
        assert length > 0.9 and np.any(tail)
