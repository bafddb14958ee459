"""Opening a take: path and format checks, the header (:class:`AudioInfo`), complete WAV and OGG files.

Conventions and bad input: see :mod:`takescribe.audio.load`.
"""

from __future__ import annotations

import contextlib
import math
import os
import struct
import sys
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import soundfile as sf

from ..errors import AudioError, InputError
from ..pitch import PIANO_HIGHEST, midi_to_hz
from .decode import SUPPORTED_FORMATS, decoded_format, open_decoded, refused_format

#: Shortest take, in seconds, that takescribe analyses.
MIN_DURATION = 0.5
# Highest piano key, C8: 440 * 2**(39/12) Hz (ISO 16 tuning).
_TOP_PIANO_HZ = float(midi_to_hz(PIANO_HIGHEST))
# Header sample rates outside this range are treated as a damaged header.
_MIN_NATIVE_SR = 1000
_MAX_NATIVE_SR = 768_000
# First bytes of formats that libsndfile reads; used to name the format of a file
# it refuses ("a damaged WAV file" rather than "not audio").
_AUDIO_MAGIC = (
    (b"RIFF", "WAV"),
    (b"RIFX", "WAV"),
    (b"RF64", "RF64"),
    (b"riff", "W64"),
    (b"fLaC", "FLAC"),
    (b"OggS", "OGG"),
    (b"FORM", "AIFF"),
    (b"caff", "CAF"),
    (b".snd", "AU"),
    (b"ID3", "MP3"),
    (b"NIST_1A", "NIST"),
)


@dataclass(frozen=True, slots=True)
class AudioInfo:
    """What the header of an audio file says.

    Parameters
    ----------
    path : str
        The file, as given.
    sr : int
        Native sample rate in Hz.
    n_channels : int
        Number of channels.
    n_frames : int
        Number of frames (samples per channel).
    duration : float
        ``n_frames / sr`` in seconds.
    format : str
        Container as soundfile names it ("WAV", "FLAC", "OGG"...).
    subtype : str
        Sample encoding as soundfile names it ("PCM_16", "FLOAT", "VORBIS"...).
    max_pitch : int
        Highest MIDI pitch whose fundamental lies below the Nyquist frequency
        (see :func:`max_resolvable_pitch`).
    """

    path: str
    sr: int
    n_channels: int
    n_frames: int
    duration: float
    format: str
    subtype: str
    max_pitch: int


def max_resolvable_pitch(sr: float) -> int:
    """Highest MIDI pitch whose fundamental is strictly below the Nyquist frequency ``sr / 2``.

    Parameters
    ----------
    sr : float
        Sample rate in Hz (> 0).

    Returns
    -------
    int
        MIDI note number, at most 127 (A4 = 69 = 440 Hz, ISO 16). Negative when
        not even MIDI 0 fits (``sr`` below about 16.4 Hz).

    Raises
    ------
    InputError
        If ``sr`` is not a positive finite number.

    Examples
    --------
    >>> max_resolvable_pitch(8000)   # telephone audio: B7 (3951 Hz) fits, C8 (4186 Hz) does not
    107
    >>> max_resolvable_pitch(44100)
    127
    """
    if isinstance(sr, bool) or not isinstance(sr, (int, float, np.integer, np.floating)):
        raise TypeError(f"sr must be a number of Hz, got {type(sr).__name__}")
    if not (math.isfinite(sr) and sr > 0):
        raise InputError(f"sr must be a positive sample rate in Hz, got {sr}")
    fractional = 69.0 + 12.0 * math.log2((sr / 2.0) / 440.0)
    # largest integer strictly below the Nyquist pitch (a tone at Nyquist is not representable)
    return min(127, math.ceil(fractional) - 1)


def audio_info(path: str | os.PathLike) -> AudioInfo:
    """Read the header of an audio file and check that it can be analysed.

    Parameters
    ----------
    path : path-like
        Any file soundfile (libsndfile) reads: WAV, FLAC, OGG/Vorbis, AIFF, MP3...

    Returns
    -------
    AudioInfo

    Raises
    ------
    AudioError
        For a missing, unreadable, empty, damaged or non-audio file, or a take
        shorter than :data:`MIN_DURATION` (see the module docstring).
    """
    path = _check_path(path)
    with _open(path) as handle:
        return _info_from(path, handle)


# ---------------------------------------------------------------------------
# checks before opening


def _check_rate_argument(sr: object) -> int:
    if isinstance(sr, bool) or not isinstance(sr, (int, np.integer)):
        raise TypeError(f"sr must be an integer number of Hz, got {sr!r}")
    if not _MIN_NATIVE_SR <= sr <= _MAX_NATIVE_SR:
        raise InputError(f"sr must be in range {_MIN_NATIVE_SR}..{_MAX_NATIVE_SR} Hz, got {sr}")
    return int(sr)


def _check_path(path: object) -> Path:
    if not isinstance(path, (str, os.PathLike)):
        raise TypeError(f"path must be a file path (str or os.PathLike), got {type(path).__name__}")
    path = Path(path)
    try:
        exists = path.exists()
    except OSError as exc:  # e.g. a name too long for the file system
        raise AudioError(f"{path}: cannot be looked up ({exc.strerror or exc}); check the path") from exc
    if not exists:
        raise AudioError(f"{path}: no such file; check the path and its spelling")
    if path.is_dir():
        raise AudioError(f"{path}: is a folder, not an audio file; give the path of the take itself")
    if not path.is_file():
        raise AudioError(f"{path}: is not a regular file (device, pipe or socket); save the take to a file first")
    return path


def _read_head(path: Path, size: int = 512) -> bytes:
    try:
        with open(path, "rb") as fh:
            return fh.read(size)
    except PermissionError as exc:
        raise AudioError(
            f"{path}: cannot be read (permission denied); make it readable (chmod u+r) or copy it somewhere readable"
        ) from exc
    except OSError as exc:
        raise AudioError(f"{path}: cannot be read ({exc.strerror or exc}); copy the file again") from exc


def _looks_like_text(head: bytes) -> bool:
    if not head or b"\x00" in head:
        return False
    try:
        text = head.decode("utf-8")
    except UnicodeDecodeError as exc:
        # a multi-byte character cut by the end of the head is still text
        if exc.start < len(head) - 3:
            return False
        text = head[: exc.start].decode("utf-8")
    printable = sum(ch.isprintable() or ch in "\t\r\n\f" for ch in text)
    return printable >= 0.95 * max(len(text), 1)


def _not_audio_problem(head: bytes) -> str | None:
    """Describe a file that is certainly not audio, from its first bytes; None if it may be audio."""
    stripped = head.lstrip(b"\xef\xbb\xbf \t\r\n")
    if head.startswith(b"MThd"):
        return "this is a MIDI file; pass it as the reference part (--score) or convert it to audio"
    if head.startswith(b"PK\x03\x04"):
        return ("this is a ZIP archive (a compressed MusicXML .mxl?), not audio; "
                "pass a score as the reference part (--score), or give a WAV/FLAC/OGG take")
    if stripped.startswith(b"<"):
        lowered = stripped[:512].lower()
        if b"score-partwise" in lowered or b"score-timewise" in lowered or b"musicxml" in lowered:
            return "this is a MusicXML score; pass it as the reference part (--score) or give a WAV/FLAC/OGG take"
        return "this is an XML/HTML document, not audio; give a WAV/FLAC/OGG take"
    return None


def _open(path: Path) -> sf.SoundFile:
    head = _read_head(path)
    if not head:
        raise AudioError(f"{path}: is empty (0 bytes); record or export the take again")
    problem = _not_audio_problem(head)
    if problem:
        raise AudioError(f"{path}: {problem}")
    # phone recordings (AAC in MP4) are decoded by PyAV; other containers are named and refused
    refused, decoded = refused_format(head), decoded_format(head)
    if refused:
        raise AudioError(f"{path}: {refused}, which takescribe does not read; convert the take to {SUPPORTED_FORMATS}")
    if decoded:
        return open_decoded(path, decoded)
    try:
        with _native_stderr_silenced(_looks_like_mpeg(head)):
            handle = sf.SoundFile(path)
    except (sf.SoundFileError, RuntimeError, ValueError, TypeError, OSError, EOFError) as exc:
        raise AudioError(f"{path}: {_describe_unopenable(head, exc)}") from exc
    return handle


def _looks_like_mpeg(head: bytes) -> bool:
    """An ID3 tag or an MPEG audio frame sync (11 set bits): libsndfile will hand it to mpg123."""
    return head.startswith(b"ID3") or (len(head) >= 2 and head[0] == 0xFF and head[1] & 0xE0 == 0xE0)


@contextlib.contextmanager
def _native_stderr_silenced(active: bool):
    """Send file descriptor 2 to the null device while libsndfile's MP3 decoder runs.

    mpg123 prints resync notes straight to the C-level stderr on damaged MP3 data;
    they would break the one-line error contract of the command line. Only used
    around MP3 decoding, whose own errors still reach us as exceptions.
    """
    if not active:
        yield
        return
    try:
        sys.stderr.flush()
        saved = os.dup(2)
        null = os.open(os.devnull, os.O_WRONLY)
    except (OSError, ValueError, AttributeError):
        yield
        return
    try:
        os.dup2(null, 2)
        yield
    finally:
        os.dup2(saved, 2)
        os.close(saved)
        os.close(null)


def _known_audio_format(head: bytes) -> str | None:
    for magic, name in _AUDIO_MAGIC:
        if head.startswith(magic):
            return name
    return None


def _describe_unopenable(head: bytes, exc: BaseException) -> str:
    detail = str(exc).split(":")[-1].strip().rstrip(".") or type(exc).__name__
    known = _known_audio_format(head)
    if known:
        return f"damaged or truncated {known} file ({detail}); copy or export the take again"
    if _looks_like_text(head):
        return "this is a text file, not audio; give a WAV/FLAC/OGG recording of the take"
    # libsndfile's own wording here is misleading ("File does not exist or is not a regular file")
    return "not a recognised audio format; convert the take to WAV or FLAC"


# ---------------------------------------------------------------------------
# header checks


def _info_from(path: Path, handle: sf.SoundFile) -> AudioInfo:
    native_sr = int(handle.samplerate)
    n_channels = int(handle.channels)
    n_frames = int(handle.frames)
    fmt = str(handle.format)
    if not _MIN_NATIVE_SR <= native_sr <= _MAX_NATIVE_SR:
        raise AudioError(
            f"{path}: header gives a sample rate of {native_sr} Hz, outside "
            f"{_MIN_NATIVE_SR}..{_MAX_NATIVE_SR} Hz; the file is probably damaged, export the take again"
        )
    if n_channels < 1:
        raise AudioError(f"{path}: header gives {n_channels} channels; the file is damaged, export the take again")
    if fmt in ("WAV", "WAVEX"):
        _check_riff_complete(path)
    elif fmt == "OGG":
        _check_ogg_complete(path)
    if n_frames <= 0:
        raise AudioError(f"{path}: holds no audio frames; record or export the take again")
    duration = n_frames / native_sr
    if duration < MIN_DURATION:
        raise AudioError(
            f"{path}: the take lasts {duration:.3f} s; takescribe needs at least {MIN_DURATION} s, record a longer take"
        )
    return AudioInfo(
        path=str(path),
        sr=native_sr,
        n_channels=n_channels,
        n_frames=n_frames,
        duration=duration,
        format=fmt,
        subtype=str(handle.subtype),
        max_pitch=max_resolvable_pitch(native_sr),
    )


def _check_riff_complete(path: Path) -> None:
    """Refuse a WAV file whose ``data`` chunk is shorter than its header announces.

    libsndfile reads such a file without complaint (it trims the frame count), which
    would hide a copy that stopped half-way.
    """
    size = path.stat().st_size
    with open(path, "rb") as fh:
        riff = fh.read(12)
        if riff[:4] != b"RIFF" or riff[8:12] != b"WAVE":
            return  # big-endian RIFX or something libsndfile knows better; nothing we check
        position = 12
        for _ in range(10_000):  # a bound on chunks, against damaged sizes that loop
            header = fh.read(8)
            if len(header) < 8:
                return
            chunk_id, chunk_size = header[:4], struct.unpack("<I", header[4:])[0]
            if chunk_id == b"data":
                available = size - position - 8
                # 0 and 0xFFFFFFFF are placeholders left by writers that stream
                if chunk_size not in (0, 0xFFFFFFFF) and chunk_size > available:
                    raise AudioError(
                        f"{path}: truncated WAV file: the header announces {chunk_size} bytes of samples "
                        f"but only {max(available, 0)} are present; copy or export the take again"
                    )
                return
            position += 8 + chunk_size + (chunk_size & 1)
            fh.seek(position)


def _check_ogg_complete(path: Path) -> None:
    """Walk the Ogg pages: each must start where the previous one ended, the last must close the stream.

    libvorbis returns whatever it can decode from a cut file, so a truncated take would
    otherwise load silently shorter.
    """
    size = path.stat().st_size
    position = 0
    last_flags = 0
    with open(path, "rb") as fh:
        while position < size:
            fh.seek(position)
            header = fh.read(27)
            if len(header) < 27 or header[:4] != b"OggS":
                raise AudioError(
                    f"{path}: damaged or truncated OGG file (page at byte {position} is broken); "
                    "copy or export the take again"
                )
            last_flags = header[5]
            n_segments = header[26]
            lacing = fh.read(n_segments)
            body = sum(lacing)
            position += 27 + n_segments + body
            if len(lacing) < n_segments or position > size:
                raise AudioError(
                    f"{path}: truncated OGG file (the last page is cut at byte {size}); copy or export the take again"
                )
    if not last_flags & 0x04:  # end-of-stream flag of the Ogg page header (RFC 3533, section 6)
        raise AudioError(
            f"{path}: truncated OGG file (the stream ends without its end-of-stream page); "
            "copy or export the take again"
        )


