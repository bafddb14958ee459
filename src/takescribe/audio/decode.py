"""Takes as phones and messaging apps send them: AAC in MP4 (.m4a) and raw AAC, through PyAV.

libsndfile (soundfile) reads WAV, FLAC, Ogg Vorbis, Ogg Opus and MP3 itself; what it cannot
read, a phone's AAC recording, is decoded here with PyAV, whose wheel ships FFmpeg's
decoders (nothing else to install). The decoded samples go to an anonymous temporary file
(no name on disk, gone when closed) as 32-bit float Sony Wave64, which
:func:`takescribe.audio.load.load_audio` then reads like any other file, block by block and
with all its checks. Containers no decoder here is meant for (WebM/Matroska, AMR, Windows
Media, film containers) are refused with an error that names the format.

Conventions
-----------
- Channels are kept as recorded; the loader mixes them to mono.
- :func:`take_tags` reads the container's tags (artist, date) for the report's header; a
  missing date falls back to the file's modification date, marked as such.
"""

from __future__ import annotations

import datetime as _dt
import os
import tempfile
from pathlib import Path

import numpy as np

from ..errors import AudioError

__all__ = ["decoded_format", "refused_format", "open_decoded", "take_tags", "SUPPORTED_FORMATS"]

SUPPORTED_FORMATS = "WAV, FLAC, Ogg (Vorbis or Opus), MP3 or AAC (.m4a)"

#: Codecs accepted inside an MP4 container (what phones and messaging apps record).
_MP4_CODECS = ("aac", "alac", "mp3", "opus", "flac")

_REFUSED_MAGIC = (
    (b"\x1a\x45\xdf\xa3", "a WebM/Matroska file"),
    (b"#!AMR", "an AMR voice recording (.amr)"),
    (b"\x30\x26\xb2\x75\x8e\x66\xcf\x11", "a Windows Media file (.wma/.asf)"),
)


def decoded_format(head: bytes) -> str | None:
    """Name of a format decoded here (MP4/M4A or raw AAC) from the file's first bytes; None otherwise."""
    if len(head) >= 12 and head[4:8] == b"ftyp":
        return "MP4/M4A"
    if len(head) >= 2 and head[0] == 0xFF and (head[1] & 0xF6) == 0xF0:  # ADTS sync word, layer 0 (ISO 13818-7)
        return "AAC"
    return None


def refused_format(head: bytes) -> str | None:
    """Description of a container takescribe does not read (for the error message); None otherwise."""
    for magic, name in _REFUSED_MAGIC:
        if head.startswith(magic):
            return name
    return None


def open_decoded(path: Path, what: str):
    """Decode ``path`` (``what``: its format name) into an anonymous Wave64 file; a readable ``sf.SoundFile``.

    Raises
    ------
    AudioError
        When PyAV cannot open or decode the file, it holds no audio, or its codec is not one
        a phone records (e.g. AMR inside a 3GP file).
    """
    import soundfile as sf

    try:
        import av
    except ImportError as exc:  # pragma: no cover - av is a dependency
        raise AudioError(f"{path}: {what} takes need PyAV (pip install av); or convert the take to WAV or FLAC") from exc
    spool = tempfile.TemporaryFile(prefix="takescribe-decoded-")
    try:
        with av.open(str(path)) as container:
            stream = _audio_stream(container, path, what)
            channels = max(1, int(stream.codec_context.channels or 1))
            with sf.SoundFile(spool, "w", samplerate=int(stream.codec_context.sample_rate), channels=channels,
                              format="W64", subtype="FLOAT") as out:
                _decode_into(container, stream, out, channels)
    except AudioError:
        spool.close()
        raise
    except (av.error.FFmpegError, ValueError, OSError, EOFError) as exc:
        spool.close()
        raise AudioError(f"{path}: damaged or truncated {what} file ({str(exc).strip()[:120]}); "
                         "copy or export the take again") from exc
    spool.seek(0)
    return sf.SoundFile(spool)


def _audio_stream(container, path: Path, what: str):
    if not container.streams.audio:
        raise AudioError(f"{path}: this {what} file holds no audio track; give the recording of the take")
    stream = container.streams.audio[0]
    codec = stream.codec_context.name
    if codec not in _MP4_CODECS:
        raise AudioError(f"{path}: a {what} file with {codec!r} audio, which takescribe does not read; "
                         f"convert the take to {SUPPORTED_FORMATS}")
    return stream


def _decode_into(container, stream, out, channels: int) -> None:
    import av

    layout = "mono" if channels == 1 else ("stereo" if channels == 2 else None)
    resampler = av.AudioResampler(format="flt", layout=layout, rate=stream.codec_context.sample_rate)
    for frame in container.decode(stream):
        for converted in resampler.resample(frame):
            out.write(_samples(converted, channels))
    for converted in resampler.resample(None):
        out.write(_samples(converted, channels))


def _samples(frame, channels: int) -> np.ndarray:
    # packed float: one row holding the channels interleaved
    return np.asarray(frame.to_ndarray(), dtype=np.float32).reshape(-1, channels)


def take_tags(path: str | os.PathLike) -> dict:
    """``{"artist": ..., "date": ...}`` from the take's tags, as far as they are given.

    The date is the recording date tag (``date`` or ``creation_time``, first ten characters)
    or else the file's modification date followed by " (file date)". Never raises: a take
    whose tags cannot be read simply has none.
    """
    path = Path(path)
    tags: dict = {}
    try:
        import av

        with av.open(str(path)) as container:
            found = {str(k).lower(): str(v) for k, v in container.metadata.items()}
            for stream in container.streams.audio[:1]:
                found.update({str(k).lower(): str(v) for k, v in stream.metadata.items() if str(k).lower() not in found})
    except Exception:  # noqa: BLE001 - tags are optional; the loader reports unreadable takes
        found = {}
    artist = found.get("artist") or found.get("author") or ""
    if artist.strip():
        tags["artist"] = artist.strip()[:80]
    date = (found.get("date") or found.get("creation_time") or "").strip()
    if date:
        tags["date"] = date[:10]
    else:
        try:
            stamp = _dt.datetime.fromtimestamp(path.stat().st_mtime)
            tags["date"] = f"{stamp:%Y-%m-%d} (file date)"
        except OSError:
            pass
    return tags
