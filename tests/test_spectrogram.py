"""Spectrogram axis against ISO 16 / librosa, and tuning-centred bins."""

from __future__ import annotations

import librosa
import numpy as np
import pytest

from takescribe.errors import InputError
from takescribe.features.spectrogram import ANALYSIS_SR, compute_spectrogram


def _tone(freq, seconds=2.0, sr=ANALYSIS_SR, partials=1):
    t = np.arange(int(seconds * sr)) / sr
    return sum(np.sin(2 * np.pi * freq * n * t) / n for n in range(1, partials + 1)).astype(np.float32)


def test_bin_of_a4_is_440_hz():
    # ISO 16: A4 = 440 Hz; MIDI 69 (librosa.midi_to_hz agrees)
    spec = compute_spectrogram(_tone(440.0), ANALYSIS_SR, tuning=0.0)
    assert librosa.midi_to_hz(69) == pytest.approx(440.0)
    b = 3 * (69 - 21)
    assert spec.frequencies[b] == pytest.approx(440.0, rel=1e-9)
    assert spec.bin_midi[b] == pytest.approx(69.0)
    assert int(np.argmax(spec.V[:, 50])) == b


@pytest.mark.parametrize("midi", [33, 45, 60, 69, 81, 96])
def test_bin_frequencies_match_librosa(midi):
    # librosa.midi_to_hz is the reference for equal-tempered pitch frequencies
    spec = compute_spectrogram(_tone(float(librosa.midi_to_hz(midi))), ANALYSIS_SR, tuning=0.0)
    b = 3 * (midi - 21)
    assert spec.frequencies[b] == pytest.approx(librosa.midi_to_hz(midi), rel=1e-9)
    assert abs(int(np.argmax(spec.V[:, 40])) - b) <= 1


@pytest.mark.parametrize("a4", [435.0, 440.0, 445.0])
def test_tuning_is_estimated_and_bins_follow_it(a4):
    # a take tuned to A4 = 435..445 Hz still puts pitch p on bin 3 (p - 21)
    rng = np.random.default_rng(0)
    pitches = rng.integers(55, 80, size=6)
    y = np.concatenate([_tone(a4 * 2 ** ((p - 69) / 12), seconds=0.5, partials=4) for p in pitches])
    spec = compute_spectrogram(y, ANALYSIS_SR)
    expected = 12 * np.log2(a4 / 440.0)
    assert spec.tuning == pytest.approx(expected, abs=0.06)
    for i, p in enumerate(pitches):
        frame = int((i * 0.5 + 0.25) * ANALYSIS_SR / spec.hop_length)
        assert abs(int(np.argmax(spec.V[: 3 * (84 - 21), frame])) - 3 * (p - 21)) <= 1


def test_float32_out_and_frame_times():
    spec = compute_spectrogram(_tone(220.0, seconds=1.0), ANALYSIS_SR, tuning=0.0)
    assert spec.V.dtype == np.float32
    assert spec.frame_times[1] - spec.frame_times[0] == pytest.approx(256 / ANALYSIS_SR)


def test_low_sample_rate_caps_the_top_bin():
    y = _tone(440.0, sr=8000)
    spec = compute_spectrogram(y, 8000, tuning=0.0)
    assert spec.frequencies[-1] < 4000


def test_stereo_is_refused():
    with pytest.raises(InputError, match="mono"):
        compute_spectrogram(np.zeros((2, 1000), np.float32), ANALYSIS_SR)


@pytest.mark.parametrize("freq", [55.0, 220.0, 880.0, 3520.0])
def test_equalised_unit_sinusoid_sums_to_about_one(freq):
    # after equalisation a unit-amplitude sinusoid contributes about 1 to its frame's sum,
    # whatever its frequency (raw VQT: about 18x more at 55 Hz than at 3.5 kHz)
    t = np.arange(2 * ANALYSIS_SR) / ANALYSIS_SR
    spec = compute_spectrogram(np.sin(2 * np.pi * freq * t).astype(np.float32), ANALYSIS_SR, tuning=0.0)
    assert spec.V[:, spec.n_frames // 2].sum() == pytest.approx(1.0, abs=0.05)
