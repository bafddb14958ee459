"""Note lists in and out: MAPS-style text, and one reader for every format.

Conventions
-----------
- **MAPS text** (the note-list layout of the MAPS piano dataset, Emiya et al.
  2010): a header line ``OnsetTime OffsetTime MidiPitch`` (tab-separated),
  then one note per line, onset and offset in seconds and the pitch as a
  MIDI number.
- Reading is tolerant: columns may be separated by tabs, spaces or commas
  (so ``.csv`` works), columns after the third are ignored, blank lines
  (also lines of separators only) and lines starting with ``#`` are skipped,
  CRLF/CR line ends and a UTF-8 byte order mark are accepted, and the header
  may be missing (the first line is a header when its first column is not a
  number). Pitches must be whole MIDI
  numbers 0..127 (``60`` or ``60.0``); onsets >= 0; offsets after onsets.
  MAPS has no velocity, so notes read get velocity 80 (the :class:`Note`
  default). Every error names the file and the line.
- Limits: more than :attr:`takescribe.limits.SizeLimits.max_notes` notes, or a span
  over ``max_span_seconds``, is refused with the limit named (every format).
- Writing: the header, then one note per line in :func:`sort_notes` order,
  tab-separated, times with 6 decimals (1 µs), pitch as an integer, ``\\n``
  line ends, UTF-8; always through :mod:`takescribe.safeio`.

References
----------
.. [1] V. Emiya, R. Badeau, B. David, "Multipitch estimation of piano sounds
   using a new probabilistic spectral smoothness principle", IEEE TASLP 18(6), 2010.
"""

from __future__ import annotations

import math
import os
import re
from pathlib import Path
from typing import Sequence

from .. import safeio
from ..errors import InputError, NoteListError
from ..midifile import read_midi_notes
from ..limits import check_note_count, check_span
from ..notes import Note, sort_notes, validate_notes

__all__ = [
    "MAPS_HEADER",
    "MAPS_SUFFIXES",
    "MIDI_SUFFIXES",
    "SCORE_SUFFIXES",
    "parse_maps",
    "format_maps",
    "read_maps",
    "write_maps",
    "read_notes",
    "check_note_list",
]

#: Column names of the MAPS header line.
MAPS_HEADER = ("OnsetTime", "OffsetTime", "MidiPitch")
MAPS_SUFFIXES = (".txt", ".tsv", ".csv")
MIDI_SUFFIXES = (".mid", ".midi")
SCORE_SUFFIXES = (".musicxml", ".xml", ".mxl")

_LINE_BREAK = re.compile(r"\r\n|\r|\n")
_SEPARATOR = re.compile(r"[\s,]+")


def _number(field: str) -> float | None:
    try:
        return float(field)
    except ValueError:
        return None


def parse_maps(text: str, *, source: str = "<text>") -> list[Note]:
    """Notes from MAPS-style text (see the module Conventions).

    Parameters
    ----------
    text : str
        The file content.
    source : str
        Name used in error messages (the file path).

    Returns
    -------
    list of Note
        In file order.

    Raises
    ------
    NoteListError
        On a line that is not three numbers, a bad time or pitch; the message
        names ``source`` and the line number.

    Examples
    --------
    >>> parse_maps("OnsetTime\\tOffsetTime\\tMidiPitch\\n0.5\\t1.25\\t60\\n")
    [Note(onset=0.5, offset=1.25, pitch=60, velocity=80)]
    """
    if not isinstance(text, str):
        raise TypeError(f"text must be a str, got {type(text).__name__}")
    text = text.removeprefix("\ufeff")
    notes: list[Note] = []
    seen_content = False
    for number, line in enumerate(_LINE_BREAK.split(text), start=1):
        stripped = line.strip()
        if not stripped or stripped.startswith("#"):
            continue
        fields = [f for f in _SEPARATOR.split(stripped) if f]
        if not fields:
            continue  # only separators: as good as blank
        where = f"{source}, line {number}"
        if not seen_content:
            seen_content = True
            if _number(fields[0]) is None:
                continue  # header line
        if len(fields) < 3:
            raise NoteListError(
                f"{where}: expected 3 columns (OnsetTime OffsetTime MidiPitch), found {len(fields)}: {stripped[:60]!r}"
            )
        values = [_number(f) for f in fields[:3]]
        for name, field, value in zip(MAPS_HEADER, fields, values):
            if value is None:
                raise NoteListError(f"{where}: {name} {field[:30]!r} is not a number")
            if not math.isfinite(value):
                raise NoteListError(f"{where}: {name} must be finite, got {field[:30]!r}")
        onset, offset, pitch = values
        if onset < 0:
            raise NoteListError(f"{where}: OnsetTime {onset} is negative; times are seconds from the start")
        if not offset > onset:
            raise NoteListError(
                f"{where}: OffsetTime {offset} is not after OnsetTime {onset}; check the column order"
            )
        if not (pitch.is_integer() and 0 <= pitch <= 127):
            hint = " (this looks like Hz; MAPS lists MIDI numbers)" if pitch > 127 else ""
            raise NoteListError(f"{where}: MidiPitch must be a whole number 0..127, got {fields[2][:30]!r}{hint}")
        try:
            notes.append(Note(onset, offset, int(pitch)))
        except InputError as exc:  # e.g. an offset equal to the onset after float conversion
            raise NoteListError(f"{where}: {exc}") from exc
    return notes


def read_maps(path: str | os.PathLike) -> list[Note]:
    """Read a MAPS-style note list (``OnsetTime OffsetTime MidiPitch``).

    Parameters
    ----------
    path : path-like
        A text file (UTF-8).

    Returns
    -------
    list of Note
        In file order; empty for a file with only a header.

    Raises
    ------
    NoteListError
        If the file is missing, not UTF-8 text, or has a bad line (the
        message names the file and line).
    """
    path = Path(path)
    if not path.is_file():
        raise NoteListError(f"{path}: no such note list; check the path")
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise NoteListError(f"{path}: cannot read ({exc.strerror})") from exc
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise NoteListError(
            f"{path}: not UTF-8 text (byte {exc.start}); a MAPS note list is plain text: "
            "'OnsetTime OffsetTime MidiPitch' per line"
        ) from exc
    if "\x00" in text:
        raise NoteListError(f"{path}: contains NUL bytes; this is a binary file, not a MAPS note list")
    notes = parse_maps(text, source=str(path))
    check_note_list(notes, path)
    return notes


def check_note_list(notes: Sequence[Note], source) -> None:
    """Refuse a note list over the limits of :mod:`takescribe.limits` (notes, span in seconds)."""
    check_note_count(len(notes), source, error=NoteListError)
    check_span(max((n.offset for n in notes), default=0.0), source, error=NoteListError)


def format_maps(notes: Sequence[Note]) -> str:
    """MAPS text for ``notes``: header, then tab-separated rows with 6 decimals.

    Raises
    ------
    NoteListError
        If a note is shorter than the 1 µs the text keeps.

    Examples
    --------
    >>> format_maps([Note(0.5, 1.25, 60)]).splitlines()
    ['OnsetTime\\tOffsetTime\\tMidiPitch', '0.500000\\t1.250000\\t60']
    """
    notes = sort_notes(validate_notes(notes))
    lines = ["\t".join(MAPS_HEADER)]
    for note in notes:
        onset, offset = f"{note.onset:.6f}", f"{note.offset:.6f}"
        if float(offset) <= float(onset):
            raise NoteListError(
                f"note at {note.onset} s (pitch {note.pitch}) is shorter than 1 µs, which MAPS text cannot keep"
            )
        lines.append(f"{onset}\t{offset}\t{note.pitch}")
    return "\n".join(lines) + "\n"


def write_maps(notes: Sequence[Note], path: str | os.PathLike, *, force: bool = False) -> Path:
    """Write notes as a MAPS-style text file (see :func:`format_maps`).

    Parameters
    ----------
    notes : sequence of Note
    path : path-like
    force : bool
        Replace an existing file.

    Returns
    -------
    Path

    Raises
    ------
    OutputError
        If ``path`` exists and ``force`` is false, or cannot be written.
    """
    return safeio.write_text(path, format_maps(notes), force=force)


def read_notes(path: str | os.PathLike, *, sustain: bool = False, part: int | str | None = None) -> list[Note]:
    """Read a note list from any supported format, chosen by the file suffix.

    Parameters
    ----------
    path : path-like
        ``.txt``/``.tsv``/``.csv``: MAPS text (:func:`read_maps`);
        ``.mid``/``.midi``: Standard MIDI File (:func:`takescribe.midi.read_midi_notes`,
        every track), or one part of it when ``part`` is given
        (:func:`takescribe.score.load_reference`);
        ``.musicxml``/``.xml``/``.mxl``: one part of a score
        (:func:`takescribe.score.load_reference`), in seconds at the written tempo.
    sustain : bool
        MIDI without ``part``: apply the sustain pedal. Formats without pedal
        events ignore it.
    part : int, str or None
        Part name or 0-based number, for scores and MIDI; not for MAPS text.

    Returns
    -------
    list of Note

    Raises
    ------
    NoteListError
        Unknown suffix, or a MAPS/MIDI file that cannot be read.
    ScoreError
        A score (or a MIDI part) that cannot be read.
    InputError
        ``part`` given for MAPS text, or with ``sustain`` for MIDI.
    """
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix in MAPS_SUFFIXES:
        if part is not None:
            raise InputError(f"{path}: a MAPS note list has no parts; leave out part={part!r}")
        return read_maps(path)
    if suffix in MIDI_SUFFIXES:
        if part is None:
            return read_midi_notes(path, sustain=sustain)
        if sustain:
            raise InputError(
                f"{path}: sustain is applied to whole MIDI files only; leave out part={part!r} or sustain"
            )
        from ..reference.part import load_reference  # score reads MusicXML with music21: import only when needed

        return load_reference(path, part=part).to_notes()
    if suffix in SCORE_SUFFIXES:
        from ..reference.part import load_reference

        return load_reference(path, part=part).to_notes()
    raise NoteListError(
        f"{path}: unknown note-list format {suffix or '(no suffix)'}; use MAPS text "
        f"({', '.join(MAPS_SUFFIXES)}), MIDI ({', '.join(MIDI_SUFFIXES)}) or MusicXML ({', '.join(SCORE_SUFFIXES)})"
    )
