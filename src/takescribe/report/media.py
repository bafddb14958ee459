"""The take, compressed for embedding in the page: Ogg Opus through soundfile (libsndfile).

The report never reads the take: it receives the samples the pipeline analysed (mono, at
the analysis rate, possibly a read-only array mapped onto a temporary file for long takes)
and encodes them block by block, so memory stays flat however long the take is.

Conventions
-----------
- Opus in Ogg, mono, at :attr:`EmbedSettings.rate` Hz (Opus codes 8, 12, 16, 24 or 48 kHz);
  libsndfile's default Opus bit rate gives about 0.26 MB a minute, well under the 2 MB a
  minute the page may take. Both Chromium and Firefox play it from a ``data:`` URI.
- Where libsndfile has no Opus encoder, Ogg Vorbis at 16 kHz is used instead; where it has
  neither, 8 kHz 16-bit WAV, with a warning (about 1 MB a minute).
"""

from __future__ import annotations

import io
import warnings
from dataclasses import dataclass

import numpy as np

__all__ = ["EmbedSettings", "EmbeddedAudio", "encode_take"]


@dataclass(frozen=True)
class EmbedSettings:
    """How the take is compressed for the page.

    Attributes
    ----------
    rate : int
        Opus sample rate in Hz; 24 kHz keeps everything up to 12 kHz, enough to hear
        pitch, attack and tone of any instrument in a practice take.
    block_seconds : float
        Seconds resampled and encoded at a time (memory bound for long takes).
    """

    rate: int = 24000
    block_seconds: float = 60.0


@dataclass(frozen=True)
class EmbeddedAudio:
    """Encoded take: MIME type, bytes and length in seconds."""

    mime: str
    data: bytes
    duration: float


def encode_take(y: np.ndarray, sr: int, *, settings: EmbedSettings | None = None) -> EmbeddedAudio:
    """Compress the take ``y`` (mono, ``sr`` Hz) for embedding (see the module docstring)."""
    settings = settings or EmbedSettings()
    y = np.asarray(y)
    if y.ndim != 1 or len(y) == 0:
        raise ValueError(f"y must be a non-empty mono signal, got shape {y.shape}")
    duration = len(y) / float(sr)
    for rate, subtype in ((settings.rate, "OPUS"), (16000, "VORBIS")):
        try:
            return EmbeddedAudio("audio/ogg", _encode(y, sr, rate, "OGG", subtype, settings.block_seconds), duration)
        except (RuntimeError, ValueError, TypeError) as exc:  # libsndfile without this codec
            reason = exc
    warnings.warn(f"Ogg encoding unavailable ({reason}); the report embeds an 8 kHz WAV copy of the take",
                  stacklevel=2)
    return EmbeddedAudio("audio/wav", _encode(y, sr, 8000, "WAV", "PCM_16", settings.block_seconds), duration)


def _encode(y: np.ndarray, sr: int, rate: int, container: str, subtype: str, block_seconds: float) -> bytes:
    import soundfile as sf
    import soxr

    buffer = io.BytesIO()
    step = max(1, int(block_seconds * sr))
    stream = soxr.ResampleStream(sr, rate, 1, dtype="float32", quality="HQ") if rate != sr else None
    with sf.SoundFile(buffer, "w", samplerate=rate, channels=1, format=container, subtype=subtype) as out:
        for first in range(0, len(y), step):
            block = np.asarray(y[first:first + step], dtype=np.float32)
            last = first + step >= len(y)
            if stream is not None:
                block = stream.resample_chunk(block, last=last)
            if len(block):
                out.write(np.clip(block, -1.0, 1.0))
    return buffer.getvalue()
