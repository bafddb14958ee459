"""Reading takes: any audio file soundfile reads, as one mono float32 signal at the analysis rate.

:func:`load_audio` is the only way audio enters takescribe. It reads the file in
blocks, mixes each block to mono, resamples it with a streaming soxr resampler and
writes it into one preallocated output array, so a long take never holds more than
one copy of the analysis-rate signal (plus one block of the original).

Long takes can be kept out of memory altogether: with ``spill_seconds``, a take
longer than that is written block by block to an anonymous temporary file and
returned as a read-only array mapped onto it. Code that walks such a take in
blocks calls :func:`release_samples` on the part it is done with, so the pages
leave the process's resident memory again (the operating system keeps them in its
file cache and reads them back if they are touched later); memory then stays flat
however long the take is. The file disappears when the array is garbage-collected.

Conventions
-----------
- ``y`` is a 1-D float32 array in the range of the file (full scale = 1.0), ``sr``
  the sample rate in Hz. Channels are mixed to mono by their mean, as
  ``librosa.to_mono`` does.
- Resampling: soxr in its "HQ" quality, streamed block by block. This is the
  resampler ``librosa.load`` uses by default (``res_type="soxr_hq"``) and the
  streamed output is identical to the one-shot call, so results match
  ``librosa.load(path, sr=sr, mono=True)``. On 60 s of audio, soxr HQ took 12 ms
  where ``scipy.signal.resample_poly`` took 34–40 ms (44.1/48 kHz → 22.05 kHz,
  2-core CPU), and the polyphase filter cannot be streamed without extra
  bookkeeping at block edges.
- The output length is ``ceil(n_frames * sr / native_sr)``, as in ``librosa.resample``.
- Pitches are MIDI numbers with A4 = 69 = 440 Hz (ISO 16).

Bad input
---------
Every file that cannot be used raises :class:`~takescribe.errors.AudioError` with a
one-line message naming the file, the problem and what to do: missing path,
folder, unreadable file, empty file, truncated or damaged WAV/FLAC/OGG, a MIDI,
MusicXML, ZIP or text file given as audio, NaN or infinite samples, a take shorter
than :data:`MIN_DURATION` seconds. Problems that still leave a usable signal are
:class:`~takescribe.errors.AudioWarning` warnings: silence, heavy clipping, DC offset (removed),
and a sample rate too low to hold the top of the piano.
"""

from __future__ import annotations

import contextlib
import math
import mmap
import os
import struct
import sys
import tempfile
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import soundfile as sf
import soxr

from ..errors import AudioError, AudioWarning, InputError
from ..errors import TakescribeWarning  # noqa: F401 - re-exported: the name this module gave its warnings before the tree
from .decode import SUPPORTED_FORMATS, decoded_format, open_decoded, refused_format

__all__ = [
    "TakescribeWarning",
    "AudioInfo",
    "audio_info",
    "load_audio",
    "release_samples",
    "frames_segment",
    "max_resolvable_pitch",
    "validate_audio",
    "MIN_DURATION",
    "SILENCE_PEAK_DBFS",
    "CLIPPING_FRACTION",
    "DC_OFFSET_LIMIT",
]

#: Shortest take, in seconds, that takescribe analyses.
MIN_DURATION = 0.5
#: A take whose peak is below this level (dBFS) is treated as silent.
SILENCE_PEAK_DBFS = -60.0
#: A take whose peak is below this level (dBFS) is very quiet: its notes sit close to the noise floor.
QUIET_PEAK_DBFS = -30.0
#: Warn about clipping when more than this fraction of samples sits at full scale.
CLIPPING_FRACTION = 0.01
#: Remove the mean of the mono signal (and warn) when its magnitude exceeds this.
DC_OFFSET_LIMIT = 0.01

# Highest piano key, C8 = MIDI 108: 440 * 2**(39/12) Hz (ISO 16 tuning).
_TOP_PIANO_HZ = 440.0 * 2.0 ** ((108 - 69) / 12)
# Header sample rates outside this range are treated as a damaged header.
_MIN_NATIVE_SR = 1000
_MAX_NATIVE_SR = 768_000
# Largest output preallocated up front (samples); beyond it the array grows as read.
# np.empty pages are only committed when written, so a generous value costs nothing.
_MAX_PREALLOCATED = 2**28
# Most samples (frames * channels) read per block, whatever ``block_frames`` says.
_MAX_BLOCK_SAMPLES = 2**22
# Positive full scale of subtypes whose largest code is below 1.0 once decoded
# (values measured with libsndfile 1.2.2: 127/128, 32124/32768, 32256/32768).
_FULL_SCALE = {"PCM_S8": 127 / 128, "PCM_U8": 127 / 128, "ULAW": 32124 / 32768, "ALAW": 32256 / 32768}
_CLIP_LEVEL = 0.999

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


def validate_audio(y: np.ndarray, sr: int, *, name: str = "y") -> None:
    """Check a signal handed to takescribe as an array (the in-memory counterpart of :func:`load_audio`).

    Parameters
    ----------
    y : np.ndarray (n_samples,)
        Mono floating-point signal.
    sr : int
        Sample rate in Hz.
    name : str
        How to call the signal in messages.

    Raises
    ------
    TypeError
        If ``y`` is not a floating-point numpy array or ``sr`` not an integer.
    AudioError
        If ``y`` is not 1-D, is shorter than :data:`MIN_DURATION`, or holds NaN/inf,
        or ``sr`` is not positive.
    """
    if not isinstance(y, np.ndarray) or not np.issubdtype(y.dtype, np.floating):
        raise TypeError(f"{name} must be a floating-point numpy array, got {type(y).__name__}"
                        + (f" of {y.dtype}" if isinstance(y, np.ndarray) else ""))
    if isinstance(sr, bool) or not isinstance(sr, (int, np.integer)):
        raise TypeError(f"sr must be an integer number of Hz, got {sr!r}")
    if sr <= 0:
        raise AudioError(f"sr must be a positive sample rate in Hz, got {sr}")
    if y.ndim != 1:
        raise AudioError(f"{name} must be mono with shape (n_samples,), got shape {y.shape}; "
                         "mix channels first (mean over the channel axis)")
    if y.size < MIN_DURATION * sr:
        raise AudioError(f"{name} lasts {y.size / sr:.3f} s; takescribe needs at least {MIN_DURATION} s of audio")
    n_bad = 0
    step = 1 << 20  # in blocks: a take spilled to a file stays out of memory (see release_samples)
    for first in range(0, y.size, step):
        n_bad += int(min(step, y.size - first) - np.count_nonzero(np.isfinite(y[first:first + step])))
        release_samples(y, first, first + step)
    if n_bad:
        raise AudioError(f"{name} holds {n_bad} NaN or infinite samples; clean or re-export the signal")


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


def load_audio(
    path: str | os.PathLike,
    *,
    sr: int = 22050,
    max_seconds: float | None = None,
    block_frames: int = 65536,
    spill_seconds: float | None = None,
) -> tuple[np.ndarray, int]:
    """Read an audio file as a mono float32 signal at sample rate ``sr``.

    Parameters
    ----------
    path : path-like
        Any file soundfile reads (WAV 8/16/24/32-bit int or float, FLAC, OGG/Vorbis, ...),
        any sample rate, any number of channels.
    sr : int
        Sample rate of the result in Hz.
    max_seconds : float or None
        Read at most this many seconds from the start of the file (None: all of it).
    block_frames : int
        Frames read per block; memory use is one block of the original plus the result.
    spill_seconds : float or None
        Takes longer than this (seconds, after ``max_seconds``) are written to an
        anonymous temporary file and returned as a read-only array mapped onto it
        (see the module docstring and :func:`release_samples`). None: always in memory.

    Returns
    -------
    y : np.ndarray (n_samples,), float32
        The mono signal; its mean is removed when it exceeds :data:`DC_OFFSET_LIMIT`.
        Read-only when spilled to a file.
    sr : int
        Sample rate of ``y`` in Hz (the ``sr`` argument).

    Raises
    ------
    AudioError
        For any file that cannot be analysed (see the module docstring).
    InputError
        For an invalid ``sr``, ``max_seconds`` or ``block_frames``.

    Warns
    -----
    AudioWarning
        Silence, heavy clipping, DC offset (removed), or a sample rate too low to
        hold every piano pitch.

    Examples
    --------
    >>> import numpy as np, soundfile as sf, tempfile, os
    >>> tmp = os.path.join(tempfile.mkdtemp(), "a4.wav")
    >>> t = np.arange(44100) / 44100
    >>> sf.write(tmp, 0.5 * np.sin(2 * np.pi * 440 * t), 44100)
    >>> y, sr = load_audio(tmp)
    >>> y.dtype, y.shape, sr
    (dtype('float32'), (22050,), 22050)
    """
    sr = _check_rate_argument(sr)
    if max_seconds is not None:
        if isinstance(max_seconds, bool) or not isinstance(max_seconds, (int, float, np.integer, np.floating)):
            raise TypeError(f"max_seconds must be a number of seconds or None, got {max_seconds!r}")
        if not (math.isfinite(max_seconds) and max_seconds >= MIN_DURATION):
            raise InputError(f"max_seconds must be at least {MIN_DURATION} s, got {max_seconds}")
    if isinstance(block_frames, bool) or not isinstance(block_frames, (int, np.integer)) or block_frames < 1:
        raise InputError(f"block_frames must be a positive integer, got {block_frames!r}")
    if spill_seconds is not None and not (isinstance(spill_seconds, (int, float, np.integer, np.floating))
                                          and not isinstance(spill_seconds, bool) and spill_seconds >= 0):
        raise InputError(f"spill_seconds must be a number of seconds >= 0 or None, got {spill_seconds!r}")

    path = _check_path(path)
    with _open(path) as handle:
        info = _info_from(path, handle)
        native_sr = info.sr
        n_wanted = info.n_frames
        if max_seconds is not None:
            n_wanted = min(n_wanted, math.ceil(max_seconds * native_sr))
        spill = spill_seconds is not None and n_wanted / native_sr > spill_seconds
        y, stats = _read_resampled(path, handle, info, n_wanted=n_wanted, sr=sr, block_frames=int(block_frames),
                                   spill=spill)
    try:
        return _checked(path, y, info, stats, n_wanted=n_wanted, sr=sr)
    finally:
        if isinstance(y, _FileSink) and not y.file.closed:
            y.file.close()


def _checked(path: Path, y, info: AudioInfo, stats, *, n_wanted: int, sr: int) -> tuple[np.ndarray, int]:
    """Refuse damaged content, warn about usable problems, remove a DC offset."""
    native_sr = info.sr
    if stats.n_read < n_wanted:
        raise AudioError(
            f"{path}: damaged or truncated {info.format} file: the header announces {n_wanted / native_sr:.2f} s "
            f"but only {stats.n_read / native_sr:.2f} s could be decoded; copy or export the take again"
        )
    if stats.n_nonfinite:
        raise AudioError(
            f"{path}: {stats.n_nonfinite} samples are NaN or infinite (damaged floating-point audio); "
            "re-export the take as 16- or 24-bit PCM WAV or FLAC"
        )
    offset = _warn_about_content(path, info, stats, sr=sr)
    if isinstance(y, _FileSink):
        return y.finish(offset), sr
    if offset:
        y -= np.float32(offset)
    return y, sr


def frames_segment(y: np.ndarray, start: int, stop: int, *, hop_length: int, n_fft: int) -> np.ndarray:
    """The samples under centred frames ``[start, stop)`` of ``y`` (frame ``j`` centred on
    sample ``j * hop_length``), zero beyond the take as librosa's ``center=True`` pads.

    Framing the result with ``center=False`` gives exactly those frames; samples before
    the segment are released (:func:`release_samples`), so walking a spilled take forward
    in segments keeps memory flat.
    """
    first = start * hop_length - n_fft // 2
    segment = np.zeros((stop - start - 1) * hop_length + n_fft, dtype=np.float32)
    lo, hi = max(first, 0), min(first + len(segment), len(y))
    if hi > lo:
        segment[lo - first: hi - first] = y[lo:hi]
    release_samples(y, 0, lo)
    return segment


def release_samples(y: np.ndarray, start: int = 0, stop: int | None = None) -> None:
    """Let samples ``[start, stop)`` of a take spilled to a file leave resident memory.

    A no-op for an ordinary in-memory array. For a take returned by
    :func:`load_audio` with ``spill_seconds``, the whole memory pages inside the
    range are dropped from the process (``madvise(MADV_DONTNEED)``); the data stay
    in the file and are read back transparently if touched again.
    """
    base = y
    while base is not None and not isinstance(base, mmap.mmap):
        base = base.obj if isinstance(base, memoryview) else getattr(base, "base", None)
    if base is None or not hasattr(mmap, "MADV_DONTNEED") or y.ndim != 1 or base.closed:
        return
    n = y.shape[0]
    stop = n if stop is None else min(stop, n)
    start = max(start, 0)
    if stop <= start:
        return
    origin = np.frombuffer(base, dtype=np.uint8, count=0).__array_interface__["data"][0]
    first = y.__array_interface__["data"][0] - origin + start * y.strides[0]
    last = first + (stop - start) * y.strides[0]
    page = mmap.PAGESIZE
    first = -(-first // page) * page  # whole pages only: neighbours may still be in use
    last = last // page * page
    if last > first:
        base.madvise(mmap.MADV_DONTNEED, first, last - first)


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


# ---------------------------------------------------------------------------
# reading


@dataclass(frozen=True, slots=True)
class _ReadStats:
    n_read: int
    n_nonfinite: int
    n_clipped: int
    n_samples: int
    peak: float
    mean: float = 0.0
    flat_tops: dict | None = None  # |value| -> samples in runs of equal values (see _count_flat_runs)


class _FileSink:
    """Output of :func:`_read_resampled` written to an anonymous temporary file."""

    def __init__(self, path: Path):
        self.path = path
        try:
            self.file = tempfile.TemporaryFile(prefix="takescribe-take-")
        except OSError as exc:
            raise AudioError(f"{path}: cannot create a temporary file for the long take ({exc.strerror or exc}); "
                             "free some space in the temporary folder (TMPDIR)") from exc
        self.size = 0

    def append(self, chunk: np.ndarray) -> None:
        try:
            self.file.write(np.ascontiguousarray(chunk, dtype=np.float32).tobytes())
        except OSError as exc:
            self.file.close()
            raise AudioError(f"{self.path}: cannot write the long take to a temporary file "
                             f"({exc.strerror or exc}); free some space in the temporary folder (TMPDIR)") from exc
        self.size += chunk.size

    def truncate(self, n: int) -> None:
        self.file.truncate(4 * n)
        self.file.seek(4 * n)
        self.size = n

    def finish(self, offset: float) -> np.ndarray:
        """Remove ``offset`` (the DC offset, 0 for none) and map the file read-only."""
        with self.file:
            self.file.flush()
            if offset:
                step = 1 << 20
                for first in range(0, self.size, step):
                    self.file.seek(4 * first)
                    block = np.fromfile(self.file, dtype=np.float32, count=min(step, self.size - first))
                    block -= np.float32(offset)
                    self.file.seek(4 * first)
                    self.file.write(block.tobytes())
                self.file.flush()
            if self.size == 0:
                return np.zeros(0, dtype=np.float32)
            mapped = mmap.mmap(self.file.fileno(), 4 * self.size, access=mmap.ACCESS_READ)
        return np.frombuffer(mapped, dtype=np.float32)


def _read_resampled(
    path: Path, handle: sf.SoundFile, info: AudioInfo, *, n_wanted: int, sr: int, block_frames: int,
    spill: bool = False,
) -> tuple["np.ndarray | _FileSink", _ReadStats]:
    native_sr = info.sr
    n_channels = info.n_channels
    frames_per_block = max(1, min(block_frames, _MAX_BLOCK_SAMPLES // n_channels))
    n_out = math.ceil(n_wanted * sr / native_sr)
    clip_level = _CLIP_LEVEL * _FULL_SCALE.get(info.subtype, 1.0)
    stream = None if native_sr == sr else soxr.ResampleStream(native_sr, sr, 1, dtype="float32", quality="HQ")

    sink = _FileSink(path) if spill else None
    try:
        y = np.empty(0 if spill else min(n_out, _MAX_PREALLOCATED), dtype=np.float32)
    except MemoryError as exc:
        raise AudioError(f"{path}: too long to hold in memory ({info.duration:.0f} s); "
                         "pass a shorter max_seconds or split the take") from exc
    filled = 0
    n_read = n_nonfinite = n_clipped = 0
    peak = 0.0
    total = 0.0
    flat_tops: dict = {}

    def append(chunk: np.ndarray) -> None:
        nonlocal y, filled, total
        total += float(np.sum(chunk, dtype=np.float64))
        if sink is not None:
            sink.append(chunk)
            filled += chunk.size
            return
        if filled + chunk.size > y.size:
            try:
                y.resize(max(filled + chunk.size, min(2 * y.size, n_out)), refcheck=False)
            except MemoryError as exc:
                raise AudioError(f"{path}: too long to hold in memory; pass a shorter max_seconds or split the take") from exc
        y[filled : filled + chunk.size] = chunk
        filled += chunk.size

    try:
        with _native_stderr_silenced(info.format == "MP3"):
            while n_read < n_wanted:
                block = handle.read(min(frames_per_block, n_wanted - n_read), dtype="float32", always_2d=True)
                if block.shape[0] == 0:
                    break
                n_read += block.shape[0]
                magnitude = np.abs(block)
                finite = np.isfinite(magnitude)
                n_bad = block.size - int(np.count_nonzero(finite))
                if n_bad:
                    n_nonfinite += n_bad
                    magnitude[~finite] = 0.0
                    block[~np.isfinite(block)] = 0.0  # keep the resampler's state finite; the file is refused anyway
                if magnitude.size:
                    peak = max(peak, float(magnitude.max()))
                n_clipped += int(np.count_nonzero(magnitude >= clip_level))
                _count_flat_runs(block, flat_tops, peak)
                mono = block[:, 0] if n_channels == 1 else block.mean(axis=1, dtype=np.float32)
                append(mono if stream is None else stream.resample_chunk(mono, last=False))
            if stream is not None:
                append(stream.resample_chunk(np.zeros(0, dtype=np.float32), last=True))
    except AudioError:
        if sink is not None:
            sink.file.close()
        raise
    except (sf.SoundFileError, RuntimeError, ValueError, OSError, EOFError) as exc:
        if sink is not None:
            sink.file.close()
        if n_read == 0 and info.format == "FLAC" and _flac_total_samples(path) == 0:
            raise AudioError(f"{path}: is empty: a valid FLAC file that holds no samples; record or export the take"
                             " again") from exc
        detail = str(exc).split(":")[-1].strip().rstrip(".") or type(exc).__name__
        raise AudioError(
            f"{path}: damaged or truncated {info.format} file (decoding failed: {detail}); "
            "copy or export the take again"
        ) from exc

    # match librosa.resample's length convention: ceil(n * sr / native_sr)
    n_final = math.ceil(n_read * sr / native_sr)
    if filled < n_final:
        append(np.zeros(n_final - filled, dtype=np.float32))
    if sink is not None:
        if sink.size != n_final:
            sink.truncate(n_final)
    elif y.size != n_final:
        y.resize(n_final, refcheck=False)
    stats = _ReadStats(n_read=n_read, n_nonfinite=n_nonfinite, n_clipped=n_clipped,
                       n_samples=n_read * n_channels, peak=peak, mean=total / max(filled, 1), flat_tops=flat_tops)
    return (y if sink is None else sink), stats


def _flac_total_samples(path: Path) -> int | None:
    """Total samples of a FLAC STREAMINFO block (0: unknown or none), None if it cannot be read.

    FLAC format: "fLaC", a 4-byte metadata block header, then STREAMINFO, whose bytes 10..17
    hold 20 bits of sample rate, 3 of channels, 5 of bits per sample and 36 of total samples.
    """
    head = _read_head(path, 26)
    if len(head) < 26 or head[:4] != b"fLaC" or head[4] & 0x7F != 0:
        return None
    return int.from_bytes(head[18:26], "big") & ((1 << 36) - 1)


def _count_flat_runs(block: np.ndarray, counts: dict, peak: float) -> None:
    """Add to ``counts`` (|value| -> samples) the runs of equal samples of ``block``, per channel.

    Candidates for flattened tops (see :func:`takescribe.audio.check.clipped_fraction`, whose
    rule this applies block by block so memory stays flat): runs far below the running peak
    (quiet passages of integer audio repeat values too) are pruned as the read goes on.
    """
    from .check import CHECK_SETTINGS

    min_run = CHECK_SETTINGS.clip_min_run
    for channel in range(block.shape[1]):
        x = block[:, channel]
        if x.size < min_run:
            continue
        edges = np.diff(np.concatenate([[0], (x[1:] == x[:-1]).astype(np.int8), [0]]))
        starts, ends = np.flatnonzero(edges == 1), np.flatnonzero(edges == -1)
        runs = ends - starts + 1
        keep = (runs >= min_run) & (np.abs(x[starts]) >= 0.5 * peak) & (x[starts] != 0)
        if not keep.any():
            continue
        values, inverse = np.unique(np.abs(x[starts[keep]]), return_inverse=True)
        for value, n in zip(values.tolist(), np.bincount(inverse, weights=runs[keep]).tolist()):
            counts[value] = counts.get(value, 0) + int(n)
    for value in [v for v in counts if v < 0.5 * peak]:
        del counts[value]


def _warn_about_level(path: Path, info: AudioInfo, stats: _ReadStats) -> None:
    """Very quiet takes, and flattened tops below full scale (clipped, then turned down)."""
    from .check import CHECK_SETTINGS

    peak_dbfs = 20.0 * math.log10(stats.peak)
    if peak_dbfs < QUIET_PEAK_DBFS:
        _warn(f"{path}: very quiet take (peak {peak_dbfs:.0f} dBFS); quiet notes may be lost in the noise;"
              " raise the input level and record again if you can", stacklevel=5)
    flat = sum(n for value, n in (stats.flat_tops or {}).items() if value >= CHECK_SETTINGS.clip_level * stats.peak)
    fraction = flat / max(stats.n_samples, 1)
    below_full_scale = stats.peak < _CLIP_LEVEL * _FULL_SCALE.get(info.subtype, 1.0)
    if below_full_scale and fraction > CHECK_SETTINGS.max_clipped_fraction:
        _warn(f"{path}: {100.0 * fraction:.1f} % of samples are flattened tops at {peak_dbfs:.0f} dBFS, below full"
              " scale: the take was clipped before it was turned down; notes may be misread (louder partials"
              " appear), record again with lower input gain", stacklevel=5)


def _warn_about_content(path: Path, info: AudioInfo, stats: _ReadStats, *, sr: int) -> float:
    """Warn about problems that leave a usable signal; return the DC offset to remove (0.0: none)."""
    effective_sr = min(info.sr, sr)
    if effective_sr < 2 * _TOP_PIANO_HZ:
        which = f"the file's sample rate {info.sr} Hz" if info.sr <= sr else f"the analysis rate sr={sr} Hz"
        _warn(
            f"{path}: {which} holds frequencies up to {effective_sr / 2:.0f} Hz; pitches above MIDI "
            f"{max_resolvable_pitch(effective_sr)} cannot be transcribed (record at 44.1 kHz if you can)"
        )
    silence_level = 10.0 ** (SILENCE_PEAK_DBFS / 20.0)
    if stats.peak < silence_level:
        _warn(
            f"{path}: the take is silent (peak below {SILENCE_PEAK_DBFS:.0f} dBFS); the draft will be empty, "
            "check the input level or the microphone"
        )
        return 0.0
    _warn_about_level(path, info, stats)
    if stats.n_samples and stats.n_clipped > CLIPPING_FRACTION * stats.n_samples:
        _warn(
            f"{path}: heavy clipping: {100.0 * stats.n_clipped / stats.n_samples:.1f} % of samples are at full "
            "scale; notes may be misread, record again with lower input gain"
        )
    offset = stats.mean
    if abs(offset) > DC_OFFSET_LIMIT:
        _warn(
            f"{path}: DC offset of {offset:+.3f} (mean of the signal) removed; "
            "check the recording chain (interface or microphone preamp) if this recurs"
        )
        return offset
    return 0.0


def _warn(message: str, *, stacklevel: int = 4) -> None:
    # stacklevel 4: _warn -> _warn_about_content -> load_audio -> caller
    warnings.warn(message, AudioWarning, stacklevel=stacklevel)
