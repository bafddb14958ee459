"""Reading a take block by block: resampled, checked, long takes spilled to a temporary file.

Conventions: see :mod:`takescribe.audio.load`.
"""

from __future__ import annotations

import math
import mmap
import tempfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import soundfile as sf
import soxr

from ..errors import AudioError
from .probe import AudioInfo, _native_stderr_silenced, _read_head

# Largest output preallocated up front (samples); beyond it the array grows as read.
# np.empty pages are only committed when written, so a generous value costs nothing.
_MAX_PREALLOCATED = 2**28
# Most samples (frames * channels) read per block, whatever ``block_frames`` says.
_MAX_BLOCK_SAMPLES = 2**22
# Positive full scale of subtypes whose largest code is below 1.0 once decoded
# (values measured with libsndfile 1.2.2: 127/128, 32124/32768, 32256/32768).
_FULL_SCALE = {"PCM_S8": 127 / 128, "PCM_U8": 127 / 128, "ULAW": 32124 / 32768, "ALAW": 32256 / 32768}
_CLIP_LEVEL = 0.999

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
    except (AudioError, sf.SoundFileError, RuntimeError, ValueError, OSError, EOFError) as exc:
        if sink is not None:
            sink.file.close()
        if isinstance(exc, AudioError):
            raise
        raise _decoding_error(path, info, n_read=n_read, exc=exc) from exc

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


def _decoding_error(path: Path, info: AudioInfo, *, n_read: int, exc: BaseException) -> AudioError:
    """What to tell the user when the decoder fails part way (an empty FLAC is not a damaged one)."""
    if n_read == 0 and info.format == "FLAC" and _flac_total_samples(path) == 0:
        return AudioError(f"{path}: is empty: a valid FLAC file that holds no samples; record or export the take"
                          " again")
    detail = str(exc).split(":")[-1].strip().rstrip(".") or type(exc).__name__
    return AudioError(
        f"{path}: damaged or truncated {info.format} file (decoding failed: {detail}); "
        "copy or export the take again"
    )


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


