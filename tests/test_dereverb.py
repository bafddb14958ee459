"""Tests of takescribe.features.dereverb (WPE dereverberation, one channel)."""

from __future__ import annotations

import numpy as np
import pytest

from takescribe.errors import InputError
from takescribe.features.dereverb import (DEFAULT_DEREVERB, DereverbSettings, dereverberate, room_signal,
                                          validate_dereverb_settings, wants_dereverberation, wpe_single_channel)

SR = 22050


def _random_stft(rng, n_bins=6, n_frames=240):
    Y = rng.standard_normal((n_bins, n_frames)) + 1j * rng.standard_normal((n_bins, n_frames))
    Y[:, 60:80] *= 30.0  # a loud passage, so the weights vary
    return Y


@pytest.mark.parametrize("taps, delay, iterations", [(10, 3, 3), (4, 1, 2), (3, 0, 1)])
def test_equals_nara_wpe_reference(taps, delay, iterations):
    # outside reference: nara-wpe's own offline WPE (Drude et al. 2018), one channel (D = 1)
    from nara_wpe.wpe import wpe

    Y = _random_stft(np.random.default_rng(taps))
    expected = wpe(Y[:, None, :], taps=taps, delay=delay, iterations=iterations)[:, 0, :]
    ours = wpe_single_channel(Y, taps=taps, delay=delay, iterations=iterations, bins_per_chunk=4)
    np.testing.assert_allclose(ours, expected, rtol=1e-9, atol=1e-9 * np.abs(expected).max())
    assert np.abs(ours - Y).max() > 1e-3  # the filter did something


def test_silent_bins_fall_back_like_nara_wpe():
    # nara-wpe solves a singular (all-zero) bin by least squares: the bin stays zero
    from nara_wpe.wpe import wpe

    Y = _random_stft(np.random.default_rng(5))
    Y[2] = 0
    expected = wpe(Y[:, None, :], taps=3, delay=2, iterations=2)[:, 0, :]
    np.testing.assert_allclose(wpe_single_channel(Y, taps=3, delay=2, iterations=2), expected, atol=1e-9)


def _room_response(rt60):
    import pyroomacoustics as pra

    dims = [8.0, 6.0, 3.0]
    absorption, max_order = pra.inverse_sabine(rt60, dims)
    room = pra.ShoeBox(dims, fs=SR, materials=pra.Material(absorption), max_order=max_order)
    room.add_source([2.0, 3.0, 1.5])
    room.add_microphone([5.0, 3.5, 1.5])
    room.compute_rir()
    h = np.asarray(room.rir[0][0], float)
    return h[int(np.argmax(np.abs(h))):]


def _t20(decay):
    """Reverberation time from the Schroeder backward integral (energy decay curve) of a free decay,
    fitted from -5 to -25 dB and extrapolated to 60 dB (T20, ISO 3382-1)."""
    edc = np.cumsum(decay[::-1].astype(np.float64) ** 2)[::-1]
    edc_db = 10 * np.log10(edc / edc[0] + 1e-30)
    t = np.arange(len(edc_db)) / SR
    fit = (edc_db <= -5) & (edc_db >= -25)
    return -60.0 / np.polyfit(t[fit], edc_db[fit], 1)[0]


def test_decay_after_interrupted_noise_shortens():
    # ISO 3382-1's interrupted-noise method: noise bursts played in a simulated room
    # (pyroomacoustics ShoeBox, Sabine target 0.9 s); the free decay after each burst is
    # measured by Schroeder integration (T20). Measured: 1.18 s as recorded, 1.16 s
    # dereverberated (single-channel WPE shortens the tail only a little).
    from scipy.signal import fftconvolve

    h = _room_response(0.9)
    rng = np.random.default_rng(0)
    period, burst, n = int(1.5 * SR), int(0.2 * SR), 5
    x = np.zeros(period * n)
    for i in range(n):
        x[i * period: i * period + burst] = rng.standard_normal(burst)
    wet = fftconvolve(x, h)[: len(x)].astype(np.float32)
    dry = dereverberate(wet, SR)
    decays = [slice(i * period + burst, (i + 1) * period) for i in range(1, n)]
    t_wet = np.mean([_t20(wet[s]) for s in decays])
    t_dry = np.mean([_t20(dry[s]) for s in decays])
    # the room really is reverberant (pyroomacoustics' own Schroeder estimate agrees with ours)
    import pyroomacoustics as pra

    assert t_wet == pytest.approx(float(pra.experimental.measure_rt60(h, fs=SR, decay_db=20)), rel=0.15)
    assert t_dry < t_wet - 0.01


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_keeps_length_and_dtype(dtype):
    y = np.random.default_rng(1).standard_normal(SR // 2).astype(dtype)
    out = dereverberate(y, SR)
    assert out.dtype == dtype and out.shape == y.shape and np.all(np.isfinite(out))


def test_blocks_and_spill_match_in_memory_blocks():
    rng = np.random.default_rng(2)
    y = rng.standard_normal(7 * SR).astype(np.float32)
    small = DereverbSettings(block_seconds=3.0, overlap_seconds=1.0)
    in_memory = dereverberate(y, SR, settings=small)
    spilled = dereverberate(y, SR, settings=DereverbSettings(block_seconds=3.0, overlap_seconds=1.0,
                                                             spill_seconds=1.0))
    assert not spilled.flags.writeable  # mapped on a temporary file
    np.testing.assert_array_equal(spilled, in_memory)
    # blockwise output stays close to the one-block output (filters differ a little per block)
    whole = dereverberate(y, SR)
    assert np.corrcoef(whole, in_memory)[0, 1] > 0.95


def test_when_to_apply():
    threshold = DEFAULT_DEREVERB.rt60_threshold_s
    assert not wants_dereverberation("dry", 3.0)
    assert wants_dereverberation("reverberant", None)
    assert wants_dereverberation("auto", threshold) and not wants_dereverberation("auto", threshold - 0.1)
    assert not wants_dereverberation("auto", None)
    y = np.zeros(SR, np.float32)
    assert room_signal(y, SR, room="dry") is y
    with pytest.raises(InputError, match="room must be one of dry, auto, reverberant"):
        room_signal(y, SR, room="hall")


def test_bad_settings_and_input():
    with pytest.raises(InputError, match="taps must be a whole number >= 1"):
        validate_dereverb_settings(DereverbSettings(taps=0))
    with pytest.raises(InputError, match="hop_length .* must not exceed n_fft"):
        validate_dereverb_settings(DereverbSettings(n_fft=256, hop_length=512))
    with pytest.raises(InputError, match="overlap"):
        validate_dereverb_settings(DereverbSettings(block_seconds=2.0, overlap_seconds=1.0))
    with pytest.raises(TypeError, match="DereverbSettings"):
        validate_dereverb_settings({"taps": 3})
    with pytest.raises(InputError, match="mono"):
        dereverberate(np.zeros((2, 100), np.float32), SR)
    with pytest.raises(InputError, match="complex STFT"):
        wpe_single_channel(np.zeros((3, 10)))


def test_command_line_room_option():
    from takescribe.cli import build_parser, main

    args = build_parser().parse_args(["compare", "take.flac", "part.musicxml", "-o", "out", "--room", "reverberant"])
    assert args.room == "reverberant"
    assert build_parser().parse_args(["transcribe", "take.flac", "-o", "d.mid"]).room == "dry"
    assert main(["transcribe", "take.flac", "-o", "d.mid", "--room", "cathedral"]) == 2  # usage error
