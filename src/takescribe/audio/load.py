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

This module holds the entry points; :mod:`.probe` opens the file and reads its header,
:mod:`.spill` reads it block by block (long takes spilled to a temporary file).
"""

from __future__ import annotations

import math
import mmap
import os
import warnings
from pathlib import Path

import numpy as np

from ..errors import AudioError, AudioWarning, InputError
from ..errors import TakescribeWarning  # noqa: F401 - re-exported: the name this module gave its warnings before the tree
from .probe import (  # noqa: F401 - the header's names stay importable from here
    MIN_DURATION, _TOP_PIANO_HZ, AudioInfo, _check_path, _check_rate_argument, _info_from, _open, audio_info,
    max_resolvable_pitch,
)
from .spill import _CLIP_LEVEL, _FULL_SCALE, _FileSink, _ReadStats, _read_resampled

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

#: A take whose peak is below this level (dBFS) is treated as silent.
SILENCE_PEAK_DBFS = -60.0
#: A take whose peak is below this level (dBFS) is very quiet: its notes sit close to the noise floor.
QUIET_PEAK_DBFS = -30.0
#: Warn about clipping when more than this fraction of samples sits at full scale.
CLIPPING_FRACTION = 0.01
#: Remove the mean of the mono signal (and warn) when its magnitude exceeds this.
DC_OFFSET_LIMIT = 0.01

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
    _check_read_arguments(max_seconds=max_seconds, block_frames=block_frames, spill_seconds=spill_seconds)
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


def _check_read_arguments(*, max_seconds, block_frames, spill_seconds) -> None:
    """The reading options of :func:`load_audio`, checked before the file is opened."""
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
