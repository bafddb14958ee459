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
- The same take gives the same bytes: libsndfile draws each Ogg stream's serial number at
  random, so every page's serial is set to :attr:`EmbedSettings.ogg_serial` and its CRC
  recomputed (page layout and CRC: RFC 3533, sections 6 and 6's "CRC_checksum" field; the
  CRC-32 of polynomial 0x04C11DB7, unreflected, initial value and final XOR 0).
"""

from __future__ import annotations

import io
import warnings
from dataclasses import dataclass

import numpy as np

from ..errors import ReportWarning

__all__ = ["EmbedSettings", "EmbeddedAudio", "encode_take", "with_ogg_serial"]


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
    ogg_serial : int
        Stream serial number written into every Ogg page (any fixed value; one stream).
    """

    rate: int = 24000
    block_seconds: float = 60.0
    ogg_serial: int = 1


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
            data = _encode(y, sr, rate, "OGG", subtype, settings.block_seconds)
            return EmbeddedAudio("audio/ogg", with_ogg_serial(data, settings.ogg_serial), duration)
        except (RuntimeError, ValueError, TypeError) as exc:  # libsndfile without this codec
            reason = exc
    warnings.warn(f"Ogg encoding unavailable ({reason}); the report embeds an 8 kHz WAV copy of the take",
                  ReportWarning, stacklevel=2)
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


def _ogg_crc_table() -> np.ndarray:
    table = np.zeros(256, dtype=np.uint32)
    for byte in range(256):
        crc = byte << 24
        for _ in range(8):
            crc = ((crc << 1) ^ 0x04C11DB7) if crc & 0x80000000 else (crc << 1)
        table[byte] = crc & 0xFFFFFFFF
    return table


_CRC_TABLE = _ogg_crc_table()


def _ogg_crc(page: bytes) -> int:
    crc = 0
    table = _CRC_TABLE
    for byte in page:
        crc = ((crc << 8) & 0xFFFFFFFF) ^ int(table[((crc >> 24) ^ byte) & 0xFF])
    return crc


def with_ogg_serial(data: bytes, serial: int) -> bytes:
    """The Ogg stream ``data`` with every page's serial number set to ``serial``.

    Each page's CRC is recomputed. Raises ``ValueError`` if ``data`` is not a sequence of
    whole Ogg pages (RFC 3533: capture pattern ``OggS``, 27-byte header, segment table).
    """
    out = bytearray(data)
    position = 0
    while position < len(out):
        if out[position:position + 4] != b"OggS" or position + 27 > len(out):
            raise ValueError(f"not an Ogg page at byte {position}")
        segments = out[position + 26]
        body = sum(out[position + 27:position + 27 + segments])
        end = position + 27 + segments + body
        if end > len(out):
            raise ValueError(f"Ogg page at byte {position} runs past the end of the stream")
        out[position + 14:position + 18] = int(serial).to_bytes(4, "little")
        out[position + 22:position + 26] = b"\0\0\0\0"
        out[position + 22:position + 26] = _ogg_crc(bytes(out[position:end])).to_bytes(4, "little")
        position = end
    return bytes(out)
