"""Removing a room's late reverberation from a take before the magnitude factorization.

Method
------
Weighted prediction error (WPE) dereverberation, single channel (Nakatani et al. 2010):
in each frequency bin of a short-time Fourier transform, the late reverberation of frame
``t`` is predicted linearly from the frames ``t - delay - k`` (``k = 0 .. taps - 1``) and
subtracted; the prediction filter minimises the prediction error weighted by the inverse
power of the current estimate of the dry signal, and the two are re-estimated in turn
(``iterations`` times). The frames closer than ``delay`` are left alone, so the direct
sound and the early reflections (which belong to the note's own attack) stay. In the
notation of the nara-wpe package (Drude et al. 2018), whose ``wpe`` this reproduces for
one channel (checked in ``tests/test_dereverb.py``)::

    Y_tilde[f, k, t] = Y[f, t - delay - k]               (zero before the take)
    lambda[f, t]     = max(|X[f, t]|², 1e-10 · max |X|²)   (X = Y at the first iteration)
    R[f] = Σ_t Y_tilde[f, :, t] Y_tilde[f, :, t]ᴴ / lambda[f, t]
    P[f] = Σ_t Y_tilde[f, :, t] Y[f, t]* / lambda[f, t]
    G[f] = R[f]⁻¹ P[f];   X[f, t] = Y[f, t] - G[f]ᴴ Y_tilde[f, :, t]

Our own loop does the arithmetic (nara-wpe's batched version spends most of its time
conjugating a strided view; ours builds ``Y_tilde`` for a few dozen bins at a time in the
caller's precision, so memory stays small and the cost is a few batched products).

Long takes
----------
The signal is processed in blocks of ``block_seconds`` overlapping by ``overlap_seconds``
(each block estimates its own filters) and the blocks are cross-faded linearly over the
overlap, so memory does not grow with the take. A take longer than ``spill_seconds`` is
written to an anonymous temporary file block by block and returned as a read-only array
mapped onto it, as :func:`takescribe.audio.load.load_audio` does for long takes.

When to apply
-------------
``room="dry"`` never, ``"reverberant"`` always, ``"auto"`` when the recording check
(:func:`takescribe.audio.check.check_recording`) measures a reverberation time of at least
``DereverbSettings.rt60_threshold_s``. WPE also thins a steady tone a little (a held note
is partly predictable from its own past), so a dry take is better left alone.

Conventions
-----------
``y`` mono float at ``sr`` Hz (the analysis rate, 22 050 Hz, in the pipeline); the output
has the input's length and dtype. STFT: nara-wpe's ``stft``/``istft`` pair (Blackman
window, ``hop_length`` shift); ``delay`` and ``taps`` are counted in frames.

References
----------
T. Nakatani, T. Yoshioka, K. Kinoshita, M. Miyoshi and B.-H. Juang, "Speech
dereverberation based on variance-normalized delayed linear prediction", IEEE Trans.
Audio, Speech, and Language Processing 18(7), 2010, 1717-1731.
L. Drude, J. Heymann, C. Boeddeker and R. Haeb-Umbach, "NARA-WPE: A Python package for
weighted prediction error dereverberation in Numpy and Tensorflow for online and offline
processing", ITG Fachtagung Sprachkommunikation, 2018.
"""

from __future__ import annotations

import mmap
import tempfile
from dataclasses import dataclass

import numpy as np
from nara_wpe.utils import istft, stft
from threadpoolctl import threadpool_limits

from ..audio.check import check_recording
from ..audio.load import release_samples
from ..errors import InputError
from ..limits import LIMITS

__all__ = ["DereverbSettings", "DEFAULT_DEREVERB", "ROOM_CHOICES", "dereverberate", "wpe_single_channel",
           "validate_dereverb_settings", "wants_dereverberation", "room_signal"]

ROOM_CHOICES = ("dry", "auto", "reverberant")


@dataclass(frozen=True)
class DereverbSettings:
    """Knobs of the dereverberation (tuned on the tuning split of simulated rooms; see the bench).

    Attributes
    ----------
    n_fft : int
        STFT frame in samples (2048 at 22 050 Hz = 93 ms: resolves the partials of low notes).
    hop_length : int
        STFT shift in samples.
    taps : int
        Frames of the prediction filter.
    delay : int
        Frames kept before the prediction starts (the direct sound and early reflections).
    iterations : int
        Alternations between the filter and the dry-signal power.
    rt60_threshold_s : float
        ``room="auto"``: dereverberate when the measured RT60 is at least this (seconds).
    block_seconds, overlap_seconds : float
        Blocks processed one at a time and their cross-faded overlap (seconds).
    spill_seconds : float
        Outputs longer than this live in a temporary file (as long takes do when read).
    bins_per_chunk : int
        Frequency bins filtered together (bounds the memory of the delayed-frame stack).
    """

    n_fft: int = 2048
    hop_length: int = 512
    taps: int = 10
    delay: int = 2
    iterations: int = 3
    rt60_threshold_s: float = 0.8
    block_seconds: float = 30.0
    overlap_seconds: float = 2.0
    spill_seconds: float = LIMITS.long_take_seconds
    bins_per_chunk: int = 64


DEFAULT_DEREVERB = DereverbSettings()


def validate_dereverb_settings(settings: DereverbSettings) -> None:
    """Raise :class:`InputError` naming the first unusable field of ``settings``."""
    if not isinstance(settings, DereverbSettings):
        raise TypeError(f"settings must be a DereverbSettings, got {type(settings).__name__}")
    for name in ("n_fft", "hop_length", "taps", "iterations", "bins_per_chunk"):
        value = getattr(settings, name)
        if not isinstance(value, (int, np.integer)) or isinstance(value, bool) or value < 1:
            raise InputError(f"dereverberation {name} must be a whole number >= 1, got {value!r}")
    if not isinstance(settings.delay, (int, np.integer)) or settings.delay < 0:
        raise InputError(f"dereverberation delay must be a whole number of frames >= 0, got {settings.delay!r}")
    if settings.hop_length > settings.n_fft:
        raise InputError(f"dereverberation hop_length ({settings.hop_length}) must not exceed n_fft ({settings.n_fft})")
    if not settings.overlap_seconds >= 0 or not settings.block_seconds > 2 * settings.overlap_seconds:
        raise InputError(f"dereverberation blocks of {settings.block_seconds} s need an overlap >= 0 and below half"
                         f" a block, got {settings.overlap_seconds} s")
    if not settings.rt60_threshold_s >= 0 or not settings.spill_seconds >= 0:
        raise InputError("dereverberation rt60_threshold_s and spill_seconds must be seconds >= 0, got"
                         f" {settings.rt60_threshold_s!r} and {settings.spill_seconds!r}")


def wants_dereverberation(room: str, rt60_s: float | None, *, settings: DereverbSettings = DEFAULT_DEREVERB) -> bool:
    """Whether a take is dereverberated: ``room`` is one of :data:`ROOM_CHOICES`.

    ``rt60_s`` (seconds, the recording check's estimate, None when unknown) matters only
    for ``room="auto"``, which dereverberates at ``settings.rt60_threshold_s`` and above.
    """
    if room not in ROOM_CHOICES:
        raise InputError(f"room must be one of {', '.join(ROOM_CHOICES)}, got {room!r}")
    if room == "auto":
        return rt60_s is not None and np.isfinite(rt60_s) and rt60_s >= settings.rt60_threshold_s
    return room == "reverberant"


def wpe_single_channel(Y: np.ndarray, *, taps: int = 10, delay: int = 3, iterations: int = 3,
                       bins_per_chunk: int = 64) -> np.ndarray:
    """WPE dereverberation of one channel's STFT (see the module's Method).

    Parameters
    ----------
    Y : np.ndarray (n_bins, n_frames), complex
        Short-time Fourier transform, frames along the last axis.
    taps, delay, iterations : int
        As nara-wpe's ``wpe`` (whose defaults these are).
    bins_per_chunk : int
        Bins filtered together (memory: ``bins_per_chunk · taps · n_frames`` values).

    Returns
    -------
    np.ndarray (n_bins, n_frames)
        The dereverberated STFT, in ``Y``'s dtype.

    Examples
    --------
    >>> import numpy as np
    >>> Y = np.random.default_rng(0).standard_normal((3, 50)) + 0j
    >>> wpe_single_channel(Y, taps=2, delay=1).shape
    (3, 50)
    """
    Y = np.asarray(Y)
    if Y.ndim != 2 or not np.iscomplexobj(Y):
        raise InputError(f"Y must be a complex STFT (n_bins, n_frames), got {Y.dtype} of shape {Y.shape}")
    X = Y
    for _ in range(iterations):
        # the power floor is global, as nara-wpe's (1e-10 of the loudest bin and frame)
        power = X.real ** 2 + X.imag ** 2
        floor = 1e-10 * power.max()
        weight = 1.0 / np.maximum(power, floor) if floor > 0 else np.ones_like(power)
        X = np.empty_like(Y)
        for lo in range(0, Y.shape[0], bins_per_chunk):
            X[lo: lo + bins_per_chunk] = _wpe_chunk(Y[lo: lo + bins_per_chunk], weight[lo: lo + bins_per_chunk],
                                                    taps, delay)
    return X


def _wpe_chunk(Y: np.ndarray, weight: np.ndarray, taps: int, delay: int) -> np.ndarray:
    """One filter estimate and filtering of a few bins, given the weights 1 / lambda."""
    n_bins, n_frames = Y.shape
    stacked = np.zeros((n_bins, taps, n_frames), Y.dtype)
    for k in range(taps):
        shift = delay + k
        if shift < n_frames:
            stacked[:, k, shift:] = Y[:, : n_frames - shift]
    weighted = stacked * weight.astype(Y.real.dtype, copy=False)[:, None, :]
    R = weighted @ np.ascontiguousarray(np.conj(stacked).transpose(0, 2, 1))
    G = _solve(R, weighted @ np.conj(Y)[:, :, None])
    return Y - np.einsum("bk,bkt->bt", np.conj(G[:, :, 0]), stacked)


def _solve(R: np.ndarray, P: np.ndarray) -> np.ndarray:
    """``R⁻¹ P`` per bin; least squares where a bin's correlation matrix is singular (silence)."""
    try:
        return np.linalg.solve(R, P)
    except np.linalg.LinAlgError:
        return np.stack([np.linalg.lstsq(r, p, rcond=None)[0] for r, p in zip(R, P)])


def _dereverberate_block(y: np.ndarray, settings: DereverbSettings) -> np.ndarray:
    Y = stft(np.asarray(y, np.float64), size=settings.n_fft, shift=settings.hop_length)
    X = wpe_single_channel(Y.T.astype(np.complex64), taps=settings.taps, delay=settings.delay,
                           iterations=settings.iterations, bins_per_chunk=settings.bins_per_chunk)
    x = istft(X.T.astype(np.complex128), size=settings.n_fft, shift=settings.hop_length)
    return x[: len(y)]


class _Output:
    """The dereverberated take: in memory, or in an anonymous temporary file when long."""

    def __init__(self, n: int, dtype, spill: bool):
        self.file = tempfile.TemporaryFile(prefix="takescribe-dereverb-") if spill else None
        self.data = None if spill else np.empty(n, dtype)
        self.dtype, self.n = np.dtype(dtype), n

    def write(self, start: int, block: np.ndarray) -> None:
        block = block.astype(self.dtype, copy=False)
        if self.file is None:
            self.data[start: start + len(block)] = block
        else:
            self.file.seek(start * self.dtype.itemsize)
            self.file.write(np.ascontiguousarray(block).tobytes())

    def finish(self) -> np.ndarray:
        if self.file is None:
            return self.data
        with self.file:
            self.file.flush()
            mapped = mmap.mmap(self.file.fileno(), self.n * self.dtype.itemsize, access=mmap.ACCESS_READ)
        return np.frombuffer(mapped, dtype=self.dtype)


def dereverberate(y: np.ndarray, sr: int, *, settings: DereverbSettings = DEFAULT_DEREVERB) -> np.ndarray:
    """Remove the late reverberation of a mono take (WPE, one channel; see the module).

    Parameters
    ----------
    y : np.ndarray (n_samples,)
        Mono float signal.
    sr : int
        Sample rate in Hz.
    settings : DereverbSettings

    Returns
    -------
    np.ndarray (n_samples,)
        The dereverberated signal in ``y``'s float dtype (read-only, mapped on a temporary
        file, when longer than ``settings.spill_seconds``).

    Raises
    ------
    InputError
        ``y`` is not a 1-D float signal, or a setting is out of range.

    Examples
    --------
    >>> import numpy as np
    >>> y = np.random.default_rng(1).standard_normal(22050).astype(np.float32)
    >>> dereverberate(y, 22050).dtype
    dtype('float32')
    """
    validate_dereverb_settings(settings)
    y = np.asarray(y)
    if y.ndim != 1 or not np.issubdtype(y.dtype, np.floating):
        raise InputError(f"y must be a mono (1-D) float signal, got {y.dtype} of shape {y.shape}")
    # the products are tiny (taps x taps per bin): several BLAS threads only fight over them
    with threadpool_limits(1, user_api="blas"):
        return _blockwise(y, sr, settings)


def _blockwise(y: np.ndarray, sr: int, settings: DereverbSettings) -> np.ndarray:
    n = len(y)
    block = int(round(settings.block_seconds * sr))
    overlap = int(round(settings.overlap_seconds * sr))
    out = _Output(n, y.dtype, spill=n > settings.spill_seconds * sr)
    if n <= block:
        out.write(0, _dereverberate_block(y, settings) if n else y)
        return out.finish()
    step = block - overlap
    ramp = np.linspace(0.0, 1.0, overlap + 2)[1:-1]
    carry = np.zeros(0)
    for start in range(0, n, step):
        part = _dereverberate_block(y[start: start + block], settings)
        head = len(carry)
        part[:head] = carry * (1.0 - ramp[:head]) + part[:head] * ramp[:head]
        if start + block >= n:
            out.write(start, part)
            break
        out.write(start, part[: step])
        carry = part[step:]
        release_samples(y, 0, start + step)  # a spilled take's pages leave memory as we go
    return out.finish()


def room_signal(y: np.ndarray, sr: int, *, room: str = "dry",
                settings: DereverbSettings = DEFAULT_DEREVERB) -> np.ndarray:
    """The signal the factorization should see: ``y`` itself, or ``y`` dereverberated.

    ``room`` is one of :data:`ROOM_CHOICES` (see the module's When to apply); ``"auto"``
    asks the recording check for the reverberation time.
    """
    if room not in ROOM_CHOICES:
        raise InputError(f"room must be one of {', '.join(ROOM_CHOICES)}, got {room!r}")
    rt60_s = _measured_rt60(y, sr) if room == "auto" else None
    return dereverberate(y, sr, settings=settings) if wants_dereverberation(room, rt60_s, settings=settings) else y


def _measured_rt60(y: np.ndarray, sr: int) -> float | None:
    return check_recording(y, sr).rt60_s
