"""Onset evidence of a take: librosa's onset strength, computed in bounded memory.

The analysis stage computes it once and hands it to the stages that need it (the
notation stage tracks beats on it); no later stage reads the audio again for it.

Conventions
-----------
``envelope[j]`` is the onset strength of the frame centred on sample ``j * hop_length``
(librosa's ``center=True`` framing); ``sr`` is the take's sample rate in Hz.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import InputError

__all__ = ["OnsetStrength", "onset_strength", "onset_envelope"]


@dataclass(frozen=True, eq=False)
class OnsetStrength:
    """Onset strength of a take (see :func:`onset_strength`).

    Parameters
    ----------
    envelope : np.ndarray (n_frames,)
        Spectral flux per frame.
    sr : int
        Sample rate of the take in Hz.
    hop_length : int
        Frame hop in samples.
    """

    envelope: np.ndarray
    sr: int
    hop_length: int

    def __post_init__(self) -> None:
        if np.ndim(self.envelope) != 1:
            raise InputError(f"onset envelope must be 1-D (n_frames,), got shape {np.shape(self.envelope)}")
        if int(self.sr) <= 0 or int(self.hop_length) <= 0:
            raise InputError(f"sr and hop_length must be positive, got {self.sr} and {self.hop_length}")

    @property
    def frame_rate(self) -> float:
        """Frames per second."""
        return self.sr / self.hop_length


def onset_strength(y: np.ndarray, sr: int, *, hop_length: int = 512, n_fft: int = 2048,
                   block_frames: int = 8192) -> OnsetStrength:
    """The onset evidence of a take as a value (:func:`onset_envelope` with its framing)."""
    if sr is None or sr <= 0:
        raise InputError(f"sample rate must be a positive number of Hz, got {sr!r}")
    env = onset_envelope(y, sr, hop_length=hop_length, n_fft=n_fft, block_frames=block_frames)
    return OnsetStrength(np.asarray(env, dtype=np.float32), int(sr), int(hop_length))


def onset_envelope(y: np.ndarray, sr: int, *, hop_length: int = 512, n_fft: int = 2048,
                   block_frames: int = 8192) -> np.ndarray:
    """``librosa.onset.onset_strength`` with its defaults, computed in blocks of frames.

    Equal to the librosa call (mel power spectrogram, dB with an 80 dB floor below the
    take's loudest bin, positive flux against the previous frame, mean over mel bands),
    but memory stays bounded by one block: a two-hour take would need gigabytes for
    librosa's whole spectrogram. Takes of up to ``block_frames`` frames go straight to
    librosa; longer ones take two passes (the loudest bin, then the flux). Samples are
    released as they are used (a take spilled to a file, see :func:`takescribe.audio.release_samples`).
    """
    import librosa

    from ..audio.load import frames_segment, release_samples

    n_frames = 1 + len(y) // hop_length
    if n_frames <= block_frames:
        return librosa.onset.onset_strength(y=np.asarray(y, dtype=np.float32), sr=sr, hop_length=hop_length,
                                            n_fft=n_fft)

    def mel_power(a: int, b: int) -> np.ndarray:
        """Mel power of centred frames [a, b) (zeros beyond the take, as librosa pads)."""
        segment = frames_segment(y, a, b, hop_length=hop_length, n_fft=n_fft)
        return librosa.feature.melspectrogram(y=segment, sr=sr, n_fft=n_fft, hop_length=hop_length, center=False)

    edges = list(range(0, n_frames, block_frames)) + [n_frames]
    top = max(float(mel_power(a, b).max()) for a, b in zip(edges[:-1], edges[1:]))
    floor_db = 10.0 * np.log10(max(top, 1e-10)) - 80.0  # power_to_db(ref=1.0, amin=1e-10, top_db=80)
    flux = np.zeros(n_frames, dtype=np.float32)
    previous = None
    for a, b in zip(edges[:-1], edges[1:]):
        S = np.maximum(librosa.power_to_db(mel_power(a, b), top_db=None), np.float32(floor_db))
        first = a + 1  # flux of frame a needs frame a - 1: the previous block's last column
        if previous is not None:
            S, first = np.hstack([previous, S]), a
        flux[first:b] = np.mean(np.maximum(0.0, S[:, 1:] - S[:, :-1]), axis=0)
        previous = S[:, -1:]
    release_samples(y)
    # librosa's framing: lag 1 and half a window of zeros before the first flux value
    pad = 1 + n_fft // (2 * hop_length)
    return np.pad(flux[1:], (pad, 0))[:n_frames]

