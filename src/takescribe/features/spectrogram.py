"""Magnitude spectrogram of a take on a log-frequency axis.

Choice
------
A variable-Q transform (``librosa.vqt``) with **3 bins per semitone** (36 per
octave) from MIDI 21 (A0, 27.5 Hz) to MIDI 120 (C9 territory is cut at the
analysis Nyquist), on a signal resampled to **22 050 Hz** with a hop of
**256 samples (11.6 ms)**.

- *Frequency resolution*: one third of a semitone between bin centres
  everywhere, so adjacent semitones are 3 bins apart and a template lobe (one
  partial) covers about 1–2 bins in the treble. The VQT bandwidth is
  ``alpha·f + gamma`` with librosa's ERB-derived default ``gamma``: in the bass
  the filters are wider (about ±1 semitone at A0) than a strict constant-Q
  transform, which trades low-frequency resolution for time resolution (a strict
  CQT at 36 bins/octave has a 1.9 s window at A0).
- *Time resolution*: frames every 11.6 ms; the effective window is ~90 ms at
  A4 and longer in the bass, so onsets are located by the hop but smeared by
  the window; note tracking detects onsets on the rise of activations.

Equalisation
------------
The raw VQT magnitude of a sinusoid depends strongly on its frequency: its peak
value and the number of bins it covers both fall towards the treble (a unit
sinusoid at 55 Hz sums to about 18 times more over its bins than one at 3.5 kHz).
Left alone, that bias makes treble notes look quiet to the factorization. Each bin
is therefore divided by the measured column sum of a unit-amplitude sinusoid at its
centre frequency (measured once per analysis setting by transforming a few pure
tones, interpolated in log frequency), so a partial of amplitude *A* contributes
about *A* to a frame's sum wherever it lies.

Tuning
------
The take's tuning offset is estimated with ``librosa.estimate_tuning`` (in
fractions of a semitone, range ±0.5) and the bins are centred on it: bin ``b``
sits at ``midi_to_hz(21 + tuning) · 2**(b / 36)``. A take at A4 = 435 Hz
(−0.20 semitone) or 445 Hz (+0.20) therefore still lands pitch *p* on bins
``3·(p−21)``. ISO 16 (A4 = 440 Hz) is the reference pitch.
"""

from __future__ import annotations

from dataclasses import dataclass

import functools

import librosa
import numpy as np

from ..errors import InputError
from ..pitch import PIANO_LOWEST

__all__ = [
    "ANALYSIS_SR",
    "HOP_LENGTH",
    "BINS_PER_SEMITONE",
    "MIDI_LOW",
    "MIDI_HIGH",
    "Spectrogram",
    "compute_spectrogram",
    "estimate_tuning",
]

ANALYSIS_SR = 22050
HOP_LENGTH = 256
BINS_PER_SEMITONE = 3
MIDI_LOW = PIANO_LOWEST
MIDI_HIGH = 120


@dataclass(frozen=True)
class Spectrogram:
    """A magnitude spectrogram with its axes.

    Attributes
    ----------
    V : np.ndarray (n_bins, n_frames), float32
        Magnitude (not power).
    frequencies : np.ndarray (n_bins,)
        Bin centre frequencies in Hz (tuning applied).
    sr : int
        Sample rate of the analysed signal.
    hop_length : int
        Samples between frames.
    bins_per_semitone : int
    midi_low : float
        MIDI number (fractional, tuning applied) of bin 0.
    tuning : float
        Estimated tuning offset in semitones (−0.5..0.5).
    """

    V: np.ndarray
    frequencies: np.ndarray
    sr: int
    hop_length: int
    bins_per_semitone: int
    midi_low: float
    tuning: float

    @property
    def n_frames(self) -> int:
        return int(self.V.shape[1])

    @property
    def frame_times(self) -> np.ndarray:
        """Time in seconds of each frame centre."""
        return librosa.frames_to_time(np.arange(self.n_frames), sr=self.sr, hop_length=self.hop_length)

    @property
    def bin_midi(self) -> np.ndarray:
        """Fractional MIDI number of each bin centre."""
        return self.midi_low + np.arange(self.V.shape[0]) / self.bins_per_semitone


def estimate_tuning(y: np.ndarray, sr: int) -> float:
    """Tuning offset of ``y`` in semitones relative to A4 = 440 Hz (ISO 16), in [−0.5, 0.5).

    Uses ``librosa.estimate_tuning`` at a resolution of 1/100 semitone on at most
    the first 60 seconds with sound (enough for a stable estimate, bounded cost).
    """
    segment = y[: 60 * sr]
    if not np.any(segment):
        return 0.0
    tuning = float(librosa.estimate_tuning(y=segment, sr=sr, resolution=0.01, bins_per_octave=12))
    return tuning if np.isfinite(tuning) else 0.0


def _sinusoid_response(sr: int, hop_length: int, fmin: float, n_bins: int, bins_per_octave: int) -> np.ndarray:
    """Column sum of the VQT of a unit sinusoid at each bin's centre frequency (see Equalisation).

    Measured once per (sr, hop, axis length) on the untuned axis and interpolated in log
    frequency: the response is smooth in frequency, so a tuning shift of under half a
    semitone needs no new measurement.
    """
    probes, sums = _measured_response(sr, hop_length, n_bins, bins_per_octave)
    freqs = fmin * 2.0 ** (np.arange(n_bins) / bins_per_octave)
    gain = np.exp(np.interp(np.log(freqs), np.log(probes), np.log(sums)))
    return gain.astype(np.float32)


@functools.lru_cache(maxsize=8)
def _measured_response(sr: int, hop_length: int, n_bins: int, bins_per_octave: int) -> tuple[np.ndarray, np.ndarray]:
    fmin = float(librosa.midi_to_hz(MIDI_LOW))
    freqs = fmin * 2.0 ** (np.arange(n_bins) / bins_per_octave)
    probes = np.geomspace(freqs[0], freqs[-1], 12)
    n = int(0.5 * sr) // hop_length * hop_length
    t = np.arange(n) / sr
    sums = []
    for f in probes:
        C = librosa.vqt(np.sin(2 * np.pi * f * t).astype(np.float32), sr=sr, hop_length=hop_length, fmin=fmin,
                        n_bins=n_bins, bins_per_octave=bins_per_octave, dtype=np.complex64)
        sums.append(float(np.abs(C[:, C.shape[1] // 2]).sum()))
    return probes, np.asarray(sums)


def compute_spectrogram(
    y: np.ndarray,
    sr: int,
    *,
    hop_length: int = HOP_LENGTH,
    bins_per_semitone: int = BINS_PER_SEMITONE,
    midi_low: int = MIDI_LOW,
    midi_high: int = MIDI_HIGH,
    tuning: float | None = None,
    equalize: bool = True,
) -> Spectrogram:
    """Variable-Q magnitude spectrogram centred on the take's tuning.

    Parameters
    ----------
    y : np.ndarray (n_samples,)
        Mono signal.
    sr : int
        Sample rate in Hz (22 050 is the analysis rate).
    hop_length : int
        Hop in samples (must be a multiple of 2**(n_octaves-1) for librosa's
        multirate VQT; 256 works up to 9 octaves).
    bins_per_semitone : int
    midi_low, midi_high : int
        Range of bin centres in MIDI numbers (before tuning). The top is lowered
        automatically to stay below the Nyquist frequency.
    tuning : float or None
        Tuning offset in semitones; ``None`` estimates it from ``y``.
    equalize : bool
        Divide each bin by the VQT's response to a unit sinusoid (see Equalisation).

    Returns
    -------
    Spectrogram
    """
    y = np.asarray(y)
    if y.ndim != 1:
        raise InputError(f"y must be mono (1-D), got shape {y.shape}")
    if y.dtype != np.float32:
        y = y.astype(np.float32)
    if tuning is None:
        tuning = estimate_tuning(y, sr)
    # the highest bin must stay below Nyquist with room for its filter bandwidth
    nyquist_midi = float(librosa.hz_to_midi(sr / 2.0))
    top = min(midi_high, int(np.floor(nyquist_midi - 1.5 - tuning)))
    if top <= midi_low:
        raise InputError(f"sample rate {sr} Hz is too low to analyse pitches above MIDI {midi_low}")
    bins_per_octave = 12 * bins_per_semitone
    n_bins = (top - midi_low) * bins_per_semitone + 1
    fmin = float(librosa.midi_to_hz(midi_low + tuning))
    n_pad = 0
    if len(y) < hop_length * 4:
        n_pad = hop_length * 4 - len(y)
        y = np.pad(y, (0, n_pad))
    C = librosa.vqt(
        y,
        sr=sr,
        hop_length=hop_length,
        fmin=fmin,
        n_bins=n_bins,
        bins_per_octave=bins_per_octave,
        dtype=np.complex64,
    )
    V = np.abs(C).astype(np.float32, copy=False)
    if equalize:
        V /= _sinusoid_response(int(sr), int(hop_length), round(fmin, 6), int(n_bins), int(bins_per_octave))[:, None]
    frequencies = fmin * 2.0 ** (np.arange(n_bins) / bins_per_octave)
    return Spectrogram(
        V=V,
        frequencies=frequencies,
        sr=int(sr),
        hop_length=int(hop_length),
        bins_per_semitone=int(bins_per_semitone),
        midi_low=float(midi_low + tuning),
        tuning=float(tuning),
    )
