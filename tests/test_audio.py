"""Tests for takescribe.audio.load: formats, resampling, blockwise reading, the bad-input contract.

Outside references used here:
- librosa.load (soxr_hq resampling, mean down-mix) for every format/rate/channel combination;
- soundfile.info (libsndfile) for header fields;
- ISO 16 (A4 = 440 Hz) and librosa.hz_to_midi for the pitch/frequency mapping;
- the Standard MIDI File header chunk ("MThd", SMF 1.0 spec) for the MIDI magic bytes.
All signals are synthetic tones of our own invention.
"""

from __future__ import annotations

import math
import os
import tracemalloc
import warnings

import librosa
import numpy as np
import pytest
import soundfile as sf

from takescribe.audio import probe
from takescribe.audio.load import (
    release_samples,
    AudioInfo,
    TakescribeWarning,
    audio_info,
    load_audio,
    max_resolvable_pitch,
    validate_audio,
)
from takescribe.errors import AudioError, InputError

TONES_HZ = (220.0, 440.0, 1000.0)  # all below 4 kHz: every rate down to 8 kHz holds them


def chord(sr: int, seconds: float = 1.0) -> np.ndarray:
    """Three sines of our own choosing, peak below 0.6 (no clipping)."""
    t = np.arange(int(round(sr * seconds))) / sr
    return sum(0.2 * np.sin(2 * np.pi * f * t + k) for k, f in enumerate(TONES_HZ))


def write(path, y, sr, *, subtype=None, fmt=None):
    sf.write(path, y, sr, subtype=subtype, format=fmt)
    return path


@pytest.fixture
def clean_wav(tmp_path):
    return write(tmp_path / "take.wav", chord(44100, 1.0), 44100, subtype="PCM_16")


# ---------------------------------------------------------------------------
# formats and resampling


FORMAT_CASES = [
    # (format, subtype, extension, loss tolerance against the ideal signal)
    ("WAV", "PCM_16", "wav", 1e-4),
    ("WAV", "PCM_24", "wav", 1e-4),
    ("WAV", "PCM_32", "wav", 1e-4),
    ("WAV", "FLOAT", "wav", 1e-4),
    ("WAV", "DOUBLE", "wav", 1e-4),
    ("FLAC", "PCM_16", "flac", 1e-4),
    ("FLAC", "PCM_24", "flac", 1e-4),
    ("OGG", "VORBIS", "ogg", None),  # lossy: compared by correlation below
    ("AIFF", "PCM_16", "aiff", 1e-4),
]
RATES = (8000, 11025, 16000, 22050, 32000, 44100, 48000, 88200, 96000, 192000)
CHANNELS = (1, 2, 6)


def check_against_references(path, native_sr, tol, *, target_sr=22050):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", TakescribeWarning)  # 8 kHz warns; tested separately
        y, sr = load_audio(path, sr=target_sr)
    assert sr == target_sr and y.dtype == np.float32 and y.ndim == 1
    # reference library: librosa.load with its default soxr_hq resampler and mean down-mix
    ref, _ = librosa.load(path, sr=target_sr, mono=True)
    assert y.shape == ref.shape
    np.testing.assert_allclose(y, ref, atol=1e-5)
    # the same content at any rate/format: the ideal signal sampled directly at target_sr,
    # away from the resampler's start/end transients (0.1 s each side)
    ideal = chord(target_sr, len(y) / target_sr)[: len(y)]
    edge = int(0.1 * target_sr)
    inner, ideal_inner = y[edge:-edge], ideal[edge:-edge]
    if tol is None:
        assert np.corrcoef(inner, ideal_inner)[0, 1] > 0.99
    else:
        # 1e-4: about 3 steps of 16-bit quantisation (2**-15 = 3e-5) and far above soxr HQ's
        # 20-bit precision (soxr documentation); far below any audible difference
        assert np.max(np.abs(inner - ideal_inner)) < tol


@pytest.mark.parametrize("fmt,subtype,ext,tol", FORMAT_CASES, ids=[f"{c[0]}-{c[1]}" for c in FORMAT_CASES])
def test_formats_load_to_the_same_signal(tmp_path, fmt, subtype, ext, tol):
    path = write(tmp_path / f"take.{ext}", chord(44100), 44100, subtype=subtype, fmt=fmt)
    check_against_references(path, 44100, tol)


@pytest.mark.parametrize("native_sr", RATES)
def test_sample_rates_load_to_the_same_signal(tmp_path, native_sr):
    path = write(tmp_path / "take.wav", chord(native_sr), native_sr, subtype="PCM_24")
    check_against_references(path, native_sr, 1e-4)


@pytest.mark.parametrize("n_channels", CHANNELS)
def test_channels_mix_to_mono_by_mean(tmp_path, n_channels):
    gains = np.array([1.5, 0.5, 1.2, 0.8, 1.0, 1.0])[:n_channels]
    gains = gains / gains.mean()  # the mean of the channels is the chord itself
    y = chord(48000)[:, None] * gains[None, :]
    path = write(tmp_path / "take.flac", y, 48000, subtype="PCM_24")
    check_against_references(path, 48000, 1e-4)


def test_resampled_a4_keeps_its_frequency(tmp_path):
    # ISO 16: A4 = 440 Hz. Load at 44.1 kHz -> 22.05 kHz and find the spectral peak.
    native_sr = 44100
    t = np.arange(2 * native_sr) / native_sr
    path = write(tmp_path / "a4.wav", 0.5 * np.sin(2 * np.pi * 440.0 * t), native_sr, subtype="PCM_16")
    y, sr = load_audio(path, sr=22050)
    n_fft = 1 << 20  # zero-padded: 0.02 Hz bins
    spectrum = np.abs(np.fft.rfft(y * np.hanning(len(y)), n=n_fft))
    peak_hz = np.argmax(spectrum) * sr / n_fft
    assert abs(peak_hz - 440.0) <= 1.0


@pytest.mark.parametrize("native_sr,target_sr", [(44100, 22050), (48000, 22050), (22050, 22050), (8000, 16000)])
def test_blockwise_reading_equals_whole_file(tmp_path, native_sr, target_sr):
    path = write(tmp_path / "take.wav", np.stack([chord(native_sr, 1.3), -chord(native_sr, 1.3)[::-1]], 1),
                 native_sr, subtype="FLOAT")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", TakescribeWarning)
        tiny, _ = load_audio(path, sr=target_sr, block_frames=7)
        whole, _ = load_audio(path, sr=target_sr, block_frames=10**7)
        ref, _ = librosa.load(path, sr=target_sr, mono=True)  # reference library
    assert tiny.shape == whole.shape == ref.shape
    np.testing.assert_allclose(tiny, whole, atol=1e-5)
    np.testing.assert_allclose(tiny, ref, atol=1e-5)


def test_max_seconds_reads_the_start_only(tmp_path):
    path = write(tmp_path / "take.wav", chord(44100, 3.0), 44100, subtype="PCM_16")
    y, sr = load_audio(path, sr=22050, max_seconds=1.25)
    # librosa.load(duration=...) is the reference for "the first N seconds"
    ref, _ = librosa.load(path, sr=22050, duration=1.25)
    assert y.shape == ref.shape == (math.ceil(1.25 * 22050),)
    np.testing.assert_allclose(y, ref, atol=1e-5)


def test_long_file_holds_one_analysis_rate_copy(tmp_path):
    # 30 s of 44.1 kHz stereo: float64 stereo would be 21 MB, the float32 22.05 kHz result 2.6 MB.
    native_sr, seconds = 44100, 30.0
    t = np.arange(int(native_sr * seconds)) / native_sr
    y_native = (0.3 * np.sin(2 * np.pi * 330.0 * t)).astype(np.float32)
    path = write(tmp_path / "long.wav", np.stack([y_native, y_native], 1), native_sr, subtype="PCM_16")
    del t, y_native
    tracemalloc.start()
    try:
        y, _ = load_audio(path, sr=22050, block_frames=65536)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    # one result + one block (65536 frames x 2 channels float32 and a few temporaries of it)
    block_bytes = 65536 * 2 * 4
    assert peak < y.nbytes + 8 * block_bytes, (peak, y.nbytes)


@pytest.mark.parametrize("offset", [0.0, 0.2])
def test_spilled_take_equals_the_in_memory_one(tmp_path, offset):
    # A take longer than spill_seconds lives in a temporary file: same samples as the in-memory
    # read (and librosa.load, the reference library), DC offset removed the same way, read-only.
    path = write(tmp_path / "take.wav", np.stack([chord(44100, 2.5) + offset] * 2, 1), 44100, subtype="FLOAT")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", TakescribeWarning)
        held, _ = load_audio(path, sr=22050)
        spilled, _ = load_audio(path, sr=22050, spill_seconds=1.0, block_frames=4096)
        short, _ = load_audio(path, sr=22050, spill_seconds=10.0)
    ref, _ = librosa.load(path, sr=22050, mono=True)  # reference library
    assert spilled.dtype == np.float32 and not spilled.flags.writeable
    assert short.flags.writeable  # shorter than spill_seconds: an ordinary array
    np.testing.assert_array_equal(spilled, held)
    np.testing.assert_allclose(spilled, ref - (np.mean(ref, dtype=np.float64) if offset else 0.0), atol=1e-5)


def test_released_samples_read_back_unchanged(tmp_path):
    path = write(tmp_path / "take.wav", chord(22050, 3.0), 22050, subtype="PCM_16")
    held, _ = load_audio(path)
    spilled, _ = load_audio(path, spill_seconds=0.5)
    for start, stop in [(0, 5000), (1234, 40000), (0, None), (60000, 10)]:
        release_samples(spilled, start, stop)
        np.testing.assert_array_equal(spilled, held)
    release_samples(spilled[100:], 0, 30000)  # a view of the mapped take
    np.testing.assert_array_equal(spilled, held)
    release_samples(held, 0, None)  # an in-memory array: nothing happens
    np.testing.assert_array_equal(held, load_audio(path)[0])


def test_spill_seconds_must_be_a_duration(clean_wav):
    with pytest.raises(InputError, match="spill_seconds"):
        load_audio(clean_wav, spill_seconds=-1)


def test_audio_info_matches_soundfile(tmp_path):
    path = write(tmp_path / "take.flac", np.stack([chord(48000)] * 2, 1), 48000, subtype="PCM_24")
    info = audio_info(path)
    reference = sf.info(str(path))  # libsndfile's own reading of the header
    assert isinstance(info, AudioInfo)
    assert (info.sr, info.n_channels, info.n_frames, info.format, info.subtype) == (
        reference.samplerate, reference.channels, reference.frames, reference.format, reference.subtype)
    assert info.duration == pytest.approx(reference.duration)
    assert info.max_pitch == 127
    with pytest.raises(Exception):
        info.sr = 1  # frozen


@pytest.mark.parametrize("sr", [8000, 11025, 16000, 22050, 44100, 1000, 8372, 8373])
def test_max_resolvable_pitch_against_librosa(sr):
    # librosa.hz_to_midi uses A4 = 440 Hz = MIDI 69 (ISO 16): the highest pitch strictly below Nyquist
    expected = min(127, math.ceil(float(librosa.hz_to_midi(sr / 2))) - 1)
    assert max_resolvable_pitch(sr) == expected
    fundamental = float(librosa.midi_to_hz(max_resolvable_pitch(sr)))
    assert fundamental < sr / 2 or max_resolvable_pitch(sr) == 127


def test_max_resolvable_pitch_telephone_and_bad_values():
    # 8 kHz telephone audio: B7 = 3951 Hz fits below 4 kHz, C8 = 4186 Hz does not (ISO 16 tuning)
    assert max_resolvable_pitch(8000) == 107
    with pytest.raises(InputError, match="positive sample rate"):
        max_resolvable_pitch(0)
    with pytest.raises(TypeError, match="number of Hz"):
        max_resolvable_pitch("44100")


# ---------------------------------------------------------------------------
# bad input: one AudioError with a one-line message naming the file


def _truncate(path, fraction):
    data = path.read_bytes()
    path.write_bytes(data[: int(len(data) * fraction)])
    return path


def _case_missing(tmp_path):
    return tmp_path / "no_such_take.wav"


def _case_folder(tmp_path):
    folder = tmp_path / "takes.wav"
    folder.mkdir()
    return folder


def _case_empty(tmp_path):
    path = tmp_path / "empty.wav"
    path.write_bytes(b"")
    return path


def _case_truncated_wav(tmp_path):
    return _truncate(write(tmp_path / "cut.wav", chord(44100), 44100, subtype="PCM_16"), 0.6)


def _case_truncated_flac(tmp_path):
    rng = np.random.default_rng(3)  # noise so that FLAC frames are not trivially small
    y = chord(44100, 2.0) * 0.5 + 0.1 * rng.standard_normal(88200)
    return _truncate(write(tmp_path / "cut.flac", y, 44100, subtype="PCM_16"), 0.6)


def _case_truncated_ogg(tmp_path):
    rng = np.random.default_rng(4)
    y = chord(44100, 3.0) * 0.5 + 0.1 * rng.standard_normal(3 * 44100)
    return _truncate(write(tmp_path / "cut.ogg", y, 44100, subtype="VORBIS"), 0.8)


def _case_corrupt_wav(tmp_path):
    path = write(tmp_path / "bad.wav", chord(44100), 44100, subtype="PCM_16")
    data = bytearray(path.read_bytes())
    data[20:36] = bytes(16)  # wipe the 'fmt ' chunk body
    path.write_bytes(bytes(data))
    return path


def _case_corrupt_flac(tmp_path):
    rng = np.random.default_rng(5)
    y = chord(22050) * 0.5 + 0.05 * rng.standard_normal(22050)
    path = write(tmp_path / "bad.flac", y, 22050, subtype="PCM_16")
    data = bytearray(path.read_bytes())
    middle = len(data) // 2
    data[middle : middle + 64] = bytes(64)
    path.write_bytes(bytes(data))
    return path


def _case_corrupt_ogg(tmp_path):
    rng = np.random.default_rng(6)
    y = chord(22050, 2.0) * 0.5 + 0.05 * rng.standard_normal(44100)
    path = write(tmp_path / "bad.ogg", y, 22050, subtype="VORBIS")
    data = bytearray(path.read_bytes())
    page = data.find(b"OggS", len(data) // 2)
    data[page : page + 4] = b"XXXX"  # break a page's capture pattern (RFC 3533)
    path.write_bytes(bytes(data))
    return path


def _case_midi(tmp_path):
    # smallest Standard MIDI File: MThd header (length 6, format 0, 1 track, 480 ticks) + empty track
    path = tmp_path / "part.mid"
    path.write_bytes(b"MThd\x00\x00\x00\x06\x00\x00\x00\x01\x01\xe0MTrk\x00\x00\x00\x04\x00\xff\x2f\x00")
    return path


def _case_midi_named_wav(tmp_path):
    path = _case_midi(tmp_path)
    return path.rename(tmp_path / "part.wav")


def _case_text(tmp_path):
    path = tmp_path / "notes.wav"
    path.write_text("onset\toffset\tpitch\n0.5\t1.0\t60\n", encoding="utf-8")
    return path


def _case_musicxml(tmp_path):
    path = tmp_path / "part.flac"
    path.write_text('<?xml version="1.0" encoding="UTF-8"?>\n<score-partwise version="4.0"></score-partwise>\n')
    return path


def _case_zip(tmp_path):
    path = tmp_path / "part.mxl"
    path.write_bytes(b"PK\x03\x04" + bytes(60))
    return path


def _case_random_bytes(tmp_path):
    path = tmp_path / "noise.bin"
    path.write_bytes(np.random.default_rng(7).integers(0, 256, 4000, dtype=np.uint8).tobytes())
    return path


def _case_nan(tmp_path):
    y = chord(22050).astype(np.float32)
    y[[10, 200, 3000]] = [np.nan, np.inf, -np.inf]
    return write(tmp_path / "nan.wav", y, 22050, subtype="FLOAT")


def _case_short(tmp_path):
    return write(tmp_path / "short.wav", chord(44100, 0.3), 44100, subtype="PCM_16")


BAD_INPUTS = {
    "missing": (_case_missing, r"no such file; check the path"),
    "folder": (_case_folder, r"is a folder, not an audio file"),
    "empty": (_case_empty, r"is empty \(0 bytes\)"),
    "truncated-wav": (_case_truncated_wav, r"truncated WAV file"),
    "truncated-flac": (_case_truncated_flac, r"damaged or truncated FLAC file"),
    "truncated-ogg": (_case_truncated_ogg, r"truncated OGG file"),
    "corrupt-wav": (_case_corrupt_wav, r"damaged or truncated WAV file"),
    "corrupt-flac": (_case_corrupt_flac, r"damaged or truncated FLAC file"),
    "corrupt-ogg": (_case_corrupt_ogg, r"damaged or truncated OGG file"),
    "midi": (_case_midi, r"this is a MIDI file; pass it as the reference part \(--score\) or convert it to audio"),
    "midi-named-wav": (_case_midi_named_wav, r"this is a MIDI file"),
    "text": (_case_text, r"this is a text file, not audio"),
    "musicxml": (_case_musicxml, r"this is a MusicXML score; pass it as the reference part"),
    "zip": (_case_zip, r"ZIP archive"),
    "random-bytes": (_case_random_bytes, r"not a recognised audio format"),
    "nan-inf": (_case_nan, r"3 samples are NaN or infinite"),
    "short": (_case_short, r"lasts 0\.300 s; takescribe needs at least 0\.5 s"),
}


@pytest.mark.parametrize("case", list(BAD_INPUTS), ids=list(BAD_INPUTS))
def test_bad_input_raises_one_line_audio_error(tmp_path, case):
    build, pattern = BAD_INPUTS[case]
    path = build(tmp_path)
    with pytest.raises(AudioError, match=pattern) as excinfo:
        load_audio(path)
    message = str(excinfo.value)
    assert message.startswith(str(path) + ": ")  # names the file
    assert "\n" not in message  # one line
    assert isinstance(excinfo.value, ValueError)  # AudioError is an InputError (ValueError)


# NaN samples and damage inside a FLAC stream are only found by decoding (load_audio);
# everything else is refused from the header and the file structure
FOUND_BY_DECODING = ("nan-inf", "truncated-flac", "corrupt-flac")


@pytest.mark.parametrize("case", [c for c in BAD_INPUTS if c not in FOUND_BY_DECODING])
def test_audio_info_refuses_the_same_files(tmp_path, case):
    build, pattern = BAD_INPUTS[case]
    with pytest.raises(AudioError, match=pattern):
        audio_info(build(tmp_path))


def test_unreadable_file_permission_denied(tmp_path, monkeypatch, clean_wav):
    def refuse(*args, **kwargs):
        raise PermissionError(13, "Permission denied", str(clean_wav))

    # root reads any file whatever its mode, so simulate the refusal at the open call
    # (of takescribe.audio.probe, which opens the take since the split of load.py)
    monkeypatch.setattr(probe, "open", refuse, raising=False)
    with pytest.raises(AudioError, match=r"cannot be read \(permission denied\); make it readable") as excinfo:
        load_audio(clean_wav)
    assert str(excinfo.value).startswith(str(clean_wav))


@pytest.mark.skipif(not hasattr(os, "geteuid") or os.geteuid() == 0, reason="root can read files of any mode")
def test_unreadable_file_real_mode(tmp_path, clean_wav):
    clean_wav.chmod(0)
    try:
        with pytest.raises(AudioError, match="permission denied"):
            load_audio(clean_wav)
    finally:
        clean_wav.chmod(0o644)


def test_wrong_argument_types_and_values(clean_wav):
    with pytest.raises(TypeError, match="path must be a file path"):
        load_audio(42)
    with pytest.raises(TypeError, match="sr must be an integer"):
        load_audio(clean_wav, sr=22050.5)
    with pytest.raises(InputError, match=r"sr must be in range"):
        load_audio(clean_wav, sr=10)
    with pytest.raises(InputError, match="max_seconds must be at least 0.5"):
        load_audio(clean_wav, max_seconds=0.1)
    with pytest.raises(InputError, match="block_frames must be a positive integer"):
        load_audio(clean_wav, block_frames=0)


def test_stream_placeholder_data_size_is_accepted(tmp_path):
    # writers that stream (and crash before closing) leave 0 or 0xFFFFFFFF as the data size;
    # libsndfile reads the samples present, and so must we (common practice, no source)
    path = write(tmp_path / "stream.wav", chord(22050), 22050, subtype="PCM_16")
    data = bytearray(path.read_bytes())
    at = data.find(b"data")
    data[at + 4 : at + 8] = b"\xff\xff\xff\xff"
    path.write_bytes(bytes(data))
    y, _ = load_audio(path)
    ref, _ = librosa.load(path, sr=22050)  # reference library
    np.testing.assert_allclose(y, ref, atol=1e-5)


def test_damaged_mp3_is_refused_without_decoder_chatter(tmp_path, capfd):
    # libsndfile hands MPEG data to mpg123, which prints resync notes on the C-level stderr;
    # the command line promises a single line there, so they must not leak
    rng = np.random.default_rng(8)
    garbage = tmp_path / "garbage.wav"
    garbage.write_bytes(b"\xff\xfb\x90\x00" + rng.integers(0, 256, 2000, dtype=np.uint8).tobytes())
    with pytest.raises(AudioError, match="not a recognised audio format"):
        load_audio(garbage)
    mp3 = write(tmp_path / "take.mp3", chord(44100, 2.0), 44100, fmt="MP3")
    data = bytearray(mp3.read_bytes())
    data[len(data) // 2 : len(data) // 2 + 400] = bytes(400)
    mp3.write_bytes(bytes(data))
    with pytest.raises(AudioError, match=r"damaged or truncated MP3 file"):
        load_audio(mp3)
    assert capfd.readouterr().err == ""


# ---------------------------------------------------------------------------
# warnings: the signal is still returned


def test_clean_take_gives_no_warning(clean_wav):
    with warnings.catch_warnings():
        warnings.simplefilter("error", TakescribeWarning)
        load_audio(clean_wav)


def test_silence_warns_and_returns_zeros(tmp_path):
    path = write(tmp_path / "silent.wav", np.zeros(22050), 22050, subtype="PCM_16")
    with pytest.warns(TakescribeWarning, match=r"silent\.wav: the take is silent .*the draft will be empty"):
        y, _ = load_audio(path)
    assert y.shape == (22050,) and not np.any(y)


def test_heavy_clipping_warns(tmp_path):
    # a sine driven to twice full scale and clipped: about two thirds of its samples sit at +-1
    y = np.clip(2.0 * chord(44100), -1.0, 1.0)
    path = write(tmp_path / "hot.wav", y, 44100, subtype="PCM_16")
    with pytest.warns(TakescribeWarning, match=r"hot\.wav: heavy clipping: [0-9.]+ % of samples"):
        load_audio(path)


def test_light_clipping_does_not_warn(tmp_path):
    y = chord(44100)
    y[:100] = 1.0  # 100 of 44100 samples: 0.2 %, under the 1 % limit
    path = write(tmp_path / "warm.wav", y, 44100, subtype="PCM_16")
    with warnings.catch_warnings():
        warnings.simplefilter("error", TakescribeWarning)
        load_audio(path)


def test_clipping_in_8bit_files_is_found(tmp_path):
    # 8-bit PCM tops out at 127/128 (libsndfile), below 0.999: clipping is judged against that
    y = np.clip(2.0 * chord(22050), -1.0, 1.0)
    path = write(tmp_path / "hot8.wav", y, 22050, subtype="PCM_U8")
    with pytest.warns(TakescribeWarning, match="heavy clipping"):
        load_audio(path)


def test_dc_offset_is_removed_with_a_warning(tmp_path):
    path = write(tmp_path / "dc.wav", chord(22050) + 0.2, 22050, subtype="PCM_16")
    with pytest.warns(TakescribeWarning, match=r"dc\.wav: DC offset of \+0\.20\d \(mean of the signal\) removed"):
        y, _ = load_audio(path)
    assert abs(float(np.mean(y))) < 1e-4
    ref, _ = librosa.load(path, sr=22050)  # reference library, offset left in
    np.testing.assert_allclose(y, ref - np.mean(ref, dtype=np.float64), atol=1e-5)


def test_telephone_rate_warns_with_highest_pitch(tmp_path):
    path = write(tmp_path / "phone.wav", chord(8000), 8000, subtype="PCM_16")
    with pytest.warns(TakescribeWarning, match=r"phone\.wav: the file's sample rate 8000 Hz .* above MIDI 107 cannot"):
        load_audio(path)
    assert audio_info(path).max_pitch == 107


# ---------------------------------------------------------------------------
# validate_audio


def test_validate_audio():
    validate_audio(np.zeros(22050, dtype=np.float32), 22050)
    with pytest.raises(TypeError, match="floating-point numpy array"):
        validate_audio(np.zeros(22050, dtype=np.int16), 22050)
    with pytest.raises(AudioError, match=r"mono with shape \(n_samples,\)"):
        validate_audio(np.zeros((2, 22050)), 22050)
    with pytest.raises(AudioError, match="needs at least 0.5 s"):
        validate_audio(np.zeros(100), 22050)
    y = np.zeros(22050)
    y[5] = np.nan
    with pytest.raises(AudioError, match="1 NaN or infinite"):
        validate_audio(y, 22050)
