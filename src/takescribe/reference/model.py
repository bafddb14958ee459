"""The values of a reference part: :class:`ScoreNote`, :class:`Reference`, the raw parts the readers fill.

Conventions: see :mod:`takescribe.reference.part`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import ScoreError
from ..notes import Note

DEFAULT_BPM = 120.0
GRACE_QUARTERS = 0.125
MAX_XML_BYTES = 50 * 1024 * 1024
MAX_MIDI_BYTES = 20 * 1024 * 1024
# bars laid out for a file without barlines (MIDI): 100 000 bars of 4/4 at 120 bpm are 55 hours,
# far beyond any part, so more means a damaged file (and would otherwise exhaust memory)
MAX_BARS = 100_000
MUSICXML_SUFFIXES = (".musicxml", ".xml", ".mxl")
MIDI_SUFFIXES = (".mid", ".midi")

_EPS = 1e-9
_SHARP_NAMES = ("C", "C#", "D", "D#", "E", "F", "F#", "G", "G#", "A", "A#", "B")
_FLAT_NAMES = ("C", "Db", "D", "Eb", "E", "F", "Gb", "G", "Ab", "A", "Bb", "B")


@dataclass(frozen=True, slots=True)
class ScoreNote:
    """One written note of a reference part.

    Attributes
    ----------
    pitch : int
        MIDI note number.
    onset_quarters, duration_quarters : float
        Position and length in quarter notes in the expanded score.
    onset, offset : float
        Seconds at the written tempo map.
    measure : int
        1-based bar number in performance order.
    measure_label : str
        The bar number printed in the score.
    beat : float
        1-based position in beats of the time signature.
    staff : int
        Staff within the part (1 or 2 for piano).
    voice : int
        Voice number within the staff.
    spelling : str
        Written pitch name with octave, e.g. ``"F#4"``, ``"Bb3"``.
    index : int
        Position in :attr:`Reference.notes`.
    is_grace : bool
        A grace note (see the module conventions).
    """

    pitch: int
    onset_quarters: float
    duration_quarters: float
    onset: float
    offset: float
    measure: int
    measure_label: str
    beat: float
    staff: int = 1
    voice: int = 1
    spelling: str = ""
    index: int = 0
    is_grace: bool = False


@dataclass(frozen=True, slots=True)
class Reference:
    """One part of a score in performance order.

    Attributes
    ----------
    notes : tuple of ScoreNote
        Sorted by onset, then pitch; ``notes[k].index == k``.
    tempo_map : tuple of (float, float)
        ``(quarters, bpm)`` pairs (quarter notes per minute), first at 0.
    time_signatures : tuple of (float, int, int)
        ``(quarters, numerator, denominator)``, first at 0.
    measure_starts : tuple of float
        Quarter position of each bar in performance order, plus the end.
    key_fifths : int
        Key signature as fifths (-7..7), 0 when unknown.
    mode : str or None
        ``"major"``/``"minor"`` when the score says so.
    part_name, instrument_name : str
    midi_program : int or None
        General MIDI program 0..127.
    source : str
        The file the part was read from.
    measure_labels : tuple of str
        Printed bar number of each bar in performance order.
    title, composer : str
        From the MusicXML header ("" when absent).
    transposition : int
        Semitones from written to sounding pitch of a transposing part (``<transpose>``:
        -2 for a B-flat clarinet); notes, spellings and key are at sounding pitch.
    """

    notes: tuple[ScoreNote, ...]
    tempo_map: tuple[tuple[float, float], ...]
    time_signatures: tuple[tuple[float, int, int], ...]
    measure_starts: tuple[float, ...]
    key_fifths: int = 0
    mode: str | None = None
    part_name: str = ""
    instrument_name: str = ""
    midi_program: int | None = None
    source: str = ""
    measure_labels: tuple[str, ...] = ()
    title: str = ""
    composer: str = ""
    transposition: int = 0

    # --- time conversions -------------------------------------------------
    def _tempo_arrays(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        starts_q = np.array([q for q, _ in self.tempo_map], dtype=float)
        sec_per_quarter = 60.0 / np.array([b for _, b in self.tempo_map], dtype=float)
        starts_s = np.concatenate([[0.0], np.cumsum(np.diff(starts_q) * sec_per_quarter[:-1])])
        return starts_q, starts_s, sec_per_quarter

    def quarters_to_seconds(self, q):
        """Seconds at the written tempo of quarter positions ``q`` (scalar or array)."""
        starts_q, starts_s, spq = self._tempo_arrays()
        q_arr = np.asarray(q, dtype=float)
        k = np.clip(np.searchsorted(starts_q, q_arr, side="right") - 1, 0, len(starts_q) - 1)
        out = starts_s[k] + (q_arr - starts_q[k]) * spq[k]
        return float(out) if np.ndim(out) == 0 else out

    def seconds_to_quarters(self, t):
        """Quarter positions of times ``t`` seconds at the written tempo (inverse of the above)."""
        starts_q, starts_s, spq = self._tempo_arrays()
        t_arr = np.asarray(t, dtype=float)
        k = np.clip(np.searchsorted(starts_s, t_arr, side="right") - 1, 0, len(starts_s) - 1)
        out = starts_q[k] + (t_arr - starts_s[k]) / spq[k]
        return float(out) if np.ndim(out) == 0 else out

    def measure_beat(self, q) -> tuple:
        """``(measure, beat)`` of quarter positions ``q``: 1-based bar in performance order, 1-based beat."""
        q_arr = np.asarray(q, dtype=float)
        starts = np.asarray(self.measure_starts, dtype=float)
        m = np.clip(np.searchsorted(starts, q_arr + _EPS, side="right") - 1, 0, max(len(starts) - 2, 0))
        ts_q = np.array([s[0] for s in self.time_signatures], dtype=float)
        ts_num = np.array([s[1] for s in self.time_signatures], dtype=float)
        ts_den = np.array([s[2] for s in self.time_signatures], dtype=float)
        k = np.clip(np.searchsorted(ts_q, starts[m] + _EPS, side="right") - 1, 0, len(ts_q) - 1)
        beat_quarters = 4.0 / ts_den[k]
        bar_quarters = ts_num[k] * beat_quarters
        length = np.diff(starts)[m] if len(starts) > 1 else bar_quarters
        # a short first bar is a pickup: count its beats from the end of a full bar
        pickup = np.where((m == 0) & (length < bar_quarters - _EPS), bar_quarters - length, 0.0)
        beat = 1.0 + (q_arr - starts[m] + pickup) / beat_quarters
        measure = m + 1
        if np.ndim(q_arr) == 0:
            return int(measure), float(beat)
        return measure.astype(int), beat

    @property
    def duration(self) -> float:
        """Length in seconds at the written tempo (end of the last bar or note)."""
        end_q = max(self.measure_starts[-1] if self.measure_starts else 0.0,
                    max((n.onset_quarters + n.duration_quarters for n in self.notes), default=0.0))
        return float(self.quarters_to_seconds(end_q))

    def to_notes(self) -> list[Note]:
        """The part as :class:`takescribe.notes.Note` (seconds at the written tempo, velocity 80)."""
        return [Note(n.onset, n.offset, n.pitch, 80) for n in self.notes if n.offset > n.onset]


def validate_reference(reference: object, *, name: str = "reference") -> Reference:
    """Check that ``reference`` is a usable :class:`Reference`; return it."""
    if not isinstance(reference, Reference):
        raise TypeError(f"{name} must be a Reference (from load_reference), got {type(reference).__name__}")
    if len(reference.notes) == 0:
        raise ScoreError(f"{name} ({reference.source or 'no file'}) has no notes; choose a part with notes")
    return reference


# --------------------------------------------------------------------------
# shared helpers
# --------------------------------------------------------------------------
def _brief(exc: BaseException, limit: int = 200) -> str:
    """``Type: message`` of ``exc`` on one line, cut to ``limit`` characters (errors print one line)."""
    text = " ".join(str(exc).split())
    if len(text) > limit:
        text = text[: limit - 3] + "..."
    return f"{type(exc).__name__}: {text}" if text else type(exc).__name__


def _spell(midi: int, fifths: int) -> str:
    names = _FLAT_NAMES if fifths < 0 else _SHARP_NAMES
    return f"{names[midi % 12]}{midi // 12 - 1}"


@dataclass
class _RawNote:
    pitch: int
    q: float
    dur: float
    staff: int
    voice: int
    spelling: str
    is_grace: bool = False
    tie: str | None = None
    chord_with_previous: bool = False


@dataclass
class _RawPart:
    name: str
    instrument_name: str
    midi_program: int | None
    notes: list
    tempo_map: list
    time_signatures: list
    measure_starts: list
    measure_labels: list
    key_fifths: int
    mode: str | None


