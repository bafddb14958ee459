"""What comes into the desk: recordings and parts checked by content, names guessed from file names.

Nothing here trusts a file name: the kind of a file is read from its first bytes, and a
name from the browser is only ever a label, never part of a path.
"""

from __future__ import annotations

import datetime as _dt
import re
import unicodedata
from pathlib import Path

from ..errors import AudioError, InputError, ScoreError

__all__ = ["sniff_audio", "sniff_part", "check_audio_file", "clean_label", "guess_from_name", "parse_date",
           "AUDIO_SUFFIXES"]

# suffixes of files the watched folder looks at (the content is still checked)
AUDIO_SUFFIXES = (".wav", ".wave", ".flac", ".ogg", ".oga", ".opus", ".mp3", ".m4a", ".aac", ".aif", ".aiff")


def sniff_audio(head: bytes) -> str | None:
    """The kind of a recording from its first bytes (``wav``, ``flac``, ``ogg``, ``aac``, ``mp3``, ``aiff``, ``m4a``), or None.

    Signatures from the formats' own specifications: RIFF/WAVE (Microsoft RIFF), ``fLaC``
    (FLAC format, RFC 9639), ``OggS`` (RFC 3533), ``ID3`` or an 11-bit MPEG frame sync
    (ISO/IEC 11172-3), ``FORM....AIFF`` (Apple AIFF 1.3), ``....ftyp`` with an audio brand
    (ISO/IEC 14496-12), an ADTS header (raw AAC, ISO/IEC 13818-7: the sync with layer bits 00).
    """
    if len(head) >= 12 and head[:4] == b"RIFF" and head[8:12] == b"WAVE":
        return "wav"
    if head[:4] == b"fLaC":
        return "flac"
    if head[:4] == b"OggS":
        return "ogg"
    if len(head) >= 2 and head[0] == 0xFF and head[1] & 0xF6 == 0xF0:   # ADTS: sync, layer 00 (ISO/IEC 13818-7)
        return "aac"
    if head[:3] == b"ID3" or (len(head) >= 2 and head[0] == 0xFF and head[1] & 0xE0 == 0xE0):
        return "mp3"
    if len(head) >= 12 and head[:4] == b"FORM" and head[8:12] in (b"AIFF", b"AIFC"):
        return "aiff"
    if len(head) >= 12 and head[4:8] == b"ftyp" and head[8:11] in (b"M4A", b"mp4", b"iso", b"M4B"):
        return "m4a"
    return None


def sniff_part(head: bytes) -> str | None:
    """The kind of a part from its first bytes: ``mid`` (SMF ``MThd``), ``mxl`` (ZIP) or ``musicxml``; else None."""
    if head[:4] == b"MThd":
        return "mid"
    if head[:4] == b"PK\x03\x04":
        return "mxl"
    text = head.lstrip(b"\xef\xbb\xbf \t\r\n")[:4096].lower()
    if text.startswith(b"<") and (b"score-partwise" in text or b"score-timewise" in text or b"musicxml" in text):
        return "musicxml"
    return None


def check_audio_file(path: Path, *, label: str) -> str:
    """Check that ``path`` holds a recording the analysis can read; returns its kind (the stored suffix).

    Raises
    ------
    AudioError
        Naming ``label`` (the file's name as the teacher knows it) and what is wrong.
    """
    from ..audio.load import audio_info

    with open(path, "rb") as fh:
        head = fh.read(64)
    kind = sniff_audio(head)
    if kind is None:
        raise AudioError(f"{label}: is not a recording the desk can read (its content is not WAV, FLAC, OGG/Opus,"
                         " MP3, AIFF, M4A or AAC, whatever its name says); export the take as WAV or FLAC")
    try:
        audio_info(path)
    except AudioError as exc:
        reason = str(exc).split(": ", 1)[-1]
        raise AudioError(f"{label}: cannot be read as {kind.upper()} ({reason})") from exc
    return kind


_BAD_NAME = re.compile(r"[\x00-\x1f\x7f]")


def clean_label(name: str, *, what: str = "file name", limit: int = 200) -> str:
    """A name from the browser, checked to be a plain name (never used as a path).

    Raises
    ------
    InputError
        For an empty name, control characters, a folder separator or a ``..`` part: such a
        name tries to point somewhere, and the desk refuses it rather than guess.
    """
    text = unicodedata.normalize("NFC", str(name or "")).strip()
    if not text:
        raise InputError(f"the {what} is empty; give it a name")
    if _BAD_NAME.search(text):
        raise InputError(f"the {what} {text!r} contains control characters; rename it")
    if "/" in text or "\\" in text or text in (".", "..") or text.startswith(".."):
        raise InputError(f"the {what} {text!r} points into folders (it contains '/', '\\' or '..');"
                         " the desk takes plain file names only, rename the file")
    if len(text) > limit:
        raise InputError(f"the {what} is {len(text)} characters long; keep it under {limit}")
    return text


def _words(text: str) -> list[str]:
    folded = unicodedata.normalize("NFKD", text.lower())
    folded = "".join(ch for ch in folded if not unicodedata.combining(ch))
    return [w for w in re.split(r"[^a-z0-9]+", folded) if w]


_DATE = re.compile(r"(20\d\d)[-_. ]?([01]\d)[-_. ]?([0-3]\d)")


def parse_date(text: str) -> str | None:
    """An ISO date ``YYYY-MM-DD`` found in ``text``, or None."""
    for match in _DATE.finditer(text or ""):
        try:
            return _dt.date(int(match[1]), int(match[2]), int(match[3])).isoformat()
        except ValueError:
            continue
    return None


def guess_from_name(name: str, students: list[tuple[int, str]], pieces: list[tuple[int, str]]) -> dict:
    """Whose take and which piece a file name suggests.

    A student is guessed when every word of their name appears in the file name; a piece
    when most of its title's words do (the best share, at least two thirds). Ties give no
    guess: a wrong guess filed silently would be worse than asking.

    Returns
    -------
    dict
        ``student_id``, ``piece_id`` (int or None) and ``date`` (ISO text or None).
    """
    words = set(_words(Path(name).stem))

    def best(candidates, share_needed):
        scored = []
        for ident, title in candidates:
            title_words = _words(title)
            if title_words:
                scored.append((sum(w in words for w in title_words) / len(title_words), ident))
        scored.sort(reverse=True)
        if not scored or scored[0][0] < share_needed or (len(scored) > 1 and scored[1][0] == scored[0][0]):
            return None
        return scored[0][1]

    return {"student_id": best(students, 1.0), "piece_id": best(pieces, 2 / 3), "date": parse_date(name)}


def check_part_file(path: Path, *, label: str, part_name: str | None) -> str:
    """Check that ``path`` holds a part (MusicXML, .mxl or MIDI) the analysis reads; returns its kind.

    Raises
    ------
    ScoreError
        Naming ``label`` and the problem.
    """
    from ..reference.part import load_reference

    with open(path, "rb") as fh:
        head = fh.read(4096)
    kind = sniff_part(head)
    if kind is None:
        raise ScoreError(f"{label}: is not a part the desk can read (its content is not MusicXML, compressed"
                         " MusicXML .mxl or a MIDI file, whatever its name says)")
    typed = path.with_suffix("." + kind)
    path.rename(typed)
    try:
        load_reference(typed, part=part_name or None)
    except ScoreError as exc:
        reason = str(exc).split(": ", 1)[-1]
        raise ScoreError(f"{label}: {reason}") from exc
    finally:
        typed.rename(path)
    return kind
