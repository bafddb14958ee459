"""Tests of takescribe.audio.check (the recording check) against outside references.

References named beside each check: pyroomacoustics' room simulation and its
``experimental.measure_rt60`` (Schroeder backward integration, ISO 3382-1's decay-time
definition), the definition of a decay time itself (ISO 3382-1: the time for a 60 dB fall,
extrapolated from the slope), scipy's Butterworth design (cut-off at -3 dB), and the
closed form of a clipped sine's flat fraction.
"""

from __future__ import annotations

import numpy as np
import pytest

from takescribe.audio import CHECK_SETTINGS, RecordingCheck, check_recording
from takescribe.audio.check import (clipped_fraction, estimate_bandwidth, estimate_rt60,
                                    noise_and_snr, recording_limits)
from takescribe.errors import AudioError

SR = 22050


def _bursts(*, n: int = 6, on_s: float = 0.5, gap_s: float = 1.5, f0: float = 220.0, seed: int = 0) -> np.ndarray:
    """Harmonic tone bursts (8 partials) with a 5 ms release: notes with a clear, fast end."""
    rng = np.random.default_rng(seed)
    t = np.arange(int(on_s * SR)) / SR
    note = sum(np.sin(2 * np.pi * f0 * k * t + rng.uniform(0, 6.3)) / k for k in range(1, 9))
    ramp = int(0.005 * SR)
    env = np.ones_like(t)
    env[:ramp] = np.linspace(0, 1, ramp)
    env[-ramp:] = np.linspace(1, 0, ramp)
    note = note * env
    y = np.zeros(int((0.3 + n * (on_s + gap_s)) * SR))
    for i in range(n):
        a = int((0.3 + i * (on_s + gap_s)) * SR)
        y[a: a + len(note)] += note * (1.0 if i % 2 else 0.7)
    return 0.25 * y / np.abs(y).max()


@pytest.fixture(scope="module")
def room_rir():
    pra = pytest.importorskip("pyroomacoustics", reason="pyroomacoustics is not installed")
    dims = [6.0, 5.0, 3.0]
    e_abs, max_order = pra.inverse_sabine(0.7, dims)
    room = pra.ShoeBox(dims, fs=SR, materials=pra.Material(e_abs), max_order=min(3, max_order),
                       ray_tracing=True, air_absorption=True)
    room.set_ray_tracing(receiver_radius=0.5, n_rays=8000, energy_thres=1e-7)
    room.add_source([2.0, 2.0, 1.2])
    room.add_microphone([3.0, 2.5, 1.3])
    room.compute_rir()
    h = np.asarray(room.rir[0][0], dtype=float)
    return h, float(pra.experimental.measure_rt60(h, fs=SR, decay_db=30))


def test_rt60_matches_pyroomacoustics_measurement(room_rir):
    # pyroomacoustics simulates the room and measures its RT60 on the impulse response (T30,
    # Schroeder integration, ISO 3382-1); the check sees only the reverberant music
    h, rt60_ref = room_rir
    from scipy.signal import fftconvolve

    y = fftconvolve(_bursts(), h)
    est, n = estimate_rt60(y, SR)
    assert n >= CHECK_SETTINGS.min_decays
    assert est == pytest.approx(rt60_ref, rel=0.3)
    dry, _ = estimate_rt60(_bursts(), SR)
    # the same notes without the room: too fast to measure (None) or far shorter
    assert dry is None or dry < 0.3 * rt60_ref


@pytest.mark.parametrize("t60", [0.4, 1.2, 2.2])
def test_rt60_of_exponential_decays(t60):
    # ISO 3382-1 definition: the time for the level to fall 60 dB. Noise bursts followed by
    # tails whose energy falls exactly 60 dB in t60 seconds (amplitude 10 ** (-3 t / t60))
    rng = np.random.default_rng(3)
    seg = []
    for _ in range(4):
        seg.append(rng.standard_normal(int(0.4 * SR)))
        t = np.arange(int(1.5 * t60 * SR)) / SR
        seg.append(rng.standard_normal(len(t)) * 10 ** (-3 * t / t60))
        seg.append(np.zeros(int(0.2 * SR)))
    y = 0.1 * np.concatenate(seg)
    est, _ = estimate_rt60(y, SR)
    assert est == pytest.approx(t60, rel=0.15)


def test_noise_floor_and_snr():
    # dBFS of a mean square (a full-scale square wave is 0 dB, so white noise of standard
    # deviation s reads 20 log10 s); SNR as planted: music power where it sounds over noise power
    rng = np.random.default_rng(1)
    music = _bursts(gap_s=0.5)
    sigma = 0.002
    y = music + sigma * rng.standard_normal(len(music))
    active = np.abs(music) > 0.01 * np.abs(music).max()
    planted = 10 * np.log10(np.mean(music[active] ** 2) / sigma ** 2)
    floor, snr = noise_and_snr(y, SR)
    assert floor == pytest.approx(20 * np.log10(sigma), abs=1.0)
    assert snr == pytest.approx(planted, abs=2.0)


def test_clipped_fraction_of_a_clipped_sine():
    # closed form: |sin| >= 1/2 for 2/3 of each period, so clipping a sine at half its peak
    # flattens 2/3 of the samples; found below full scale too (clip, then halve the level)
    t = np.arange(SR) / SR
    sine = 0.8 * np.sin(2 * np.pi * 110 * t)
    clipped = np.clip(sine, -0.4, 0.4) * 0.5
    assert clipped_fraction(clipped) == pytest.approx(2 / 3, abs=0.01)
    assert clipped_fraction(sine) == 0.0
    assert clipped_fraction(_bursts()) == 0.0


def test_bandwidth_of_a_low_passed_recording():
    # scipy's Butterworth low-pass (cut-off at -3 dB): the check should find the band edge
    # within a third of an octave; the unfiltered bursts reach the top bands
    from scipy.signal import butter, sosfilt

    rng = np.random.default_rng(2)
    y = _bursts(f0=440.0)
    for i in range(6):  # a broadband attack (30 ms of noise) at each note's start, as a hammer or a bow gives
        a = int((0.3 + 2.0 * i) * SR)
        y[a: a + int(0.03 * SR)] += 0.05 * rng.standard_normal(int(0.03 * SR))
    hiss = 10 ** (-70 / 20) * rng.standard_normal(len(y))  # a microphone's own noise floor
    wide = estimate_bandwidth(y + hiss, SR)
    assert wide >= 9000.0
    narrow = estimate_bandwidth(sosfilt(butter(8, 4000.0, fs=SR, output="sos"), y) + hiss, SR)
    assert 4000.0 / 2 ** (1 / 3) <= narrow <= 1.001 * 4000.0 * 2 ** (1 / 3)


def test_limits_name_kinds_and_reasons():
    # common practice, no source: note lengths are not judged in a hall, soft notes not under noise
    hall = recording_limits(2.3, 60.0, 10000.0, 0.0)
    assert {"held_short", "held_long"} <= {k for lim in hall for k in lim.kinds}
    assert all(lim.reason for lim in hall)
    noisy = recording_limits(0.3, 12.0, 10000.0, 0.0)
    soft = [lim for lim in noisy if "missed" in lim.kinds]
    assert soft and soft[0].min_level_db == pytest.approx(-6.0)
    assert recording_limits(0.3, 60.0, 10000.0, 0.0) == ()
    narrow = recording_limits(0.3, 60.0, 3000.0, 0.0)
    # above the pitch whose third partial reaches 3 kHz: 1 kHz is MIDI 83.2 (A4 = 69 = 440 Hz, ISO 16)
    assert narrow[0].kinds == ("wrong_pitch",) and narrow[0].above_pitch == 83


def test_check_recording_dry_and_float32():
    y = _bursts()
    c64 = check_recording(y, SR)
    c32 = check_recording(y.astype(np.float32), SR)
    assert isinstance(c64, RecordingCheck)
    assert c64.peak_dbfs == pytest.approx(20 * np.log10(0.25), abs=0.01)
    assert c64.limits == () and c64.clipped_fraction == 0.0
    assert c32.rt60_s == pytest.approx(c64.rt60_s, rel=0.05)
    assert c32.snr_db == pytest.approx(c64.snr_db, abs=1.0)


def test_bad_input_is_refused():
    with pytest.raises(AudioError, match="mono"):
        check_recording(np.zeros((2, SR)), SR)
    with pytest.raises(TypeError, match="floating-point"):
        check_recording(np.zeros(SR, dtype=np.int16), SR)
    with pytest.raises(AudioError, match="NaN"):
        check_recording(np.full(SR, np.nan), SR)
