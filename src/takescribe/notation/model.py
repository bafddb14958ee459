"""The values of the notation stage: a quantized note and a whole draft.

Conventions
-----------
- Score positions are quarter notes as :class:`fractions.Fraction`; pitches are MIDI
  numbers at *sounding* pitch (A4 = 69, ISO 16), also for transposing instruments: the
  written pitch is ``pitch - transposition`` and is chosen only when writing.
- Tempo maps for MIDI (:meth:`Notation.tempo_map`) count quarter notes per minute, as the
  Standard MIDI File tempo meta event does (microseconds per quarter note).
- MIDI hand-off: :meth:`Notation.midi_tracks` gives ``(name, notes, program)`` per staff,
  :meth:`Notation.tempo_map` and :meth:`Notation.time_signature_map` the type-1 conductor
  data; notes carry the quantized rhythm on that tempo map's time line.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass
from fractions import Fraction

import numpy as np

from ..errors import InputError, NotationWarning
from ..notes import Note, sort_notes
from .grid import BeatGrid

__all__ = ["NotationWarning", "QuantizedNote", "Notation", "tempo_segments", "performed_conductor"]

# a new tempo segment where the take's pace moves by more than this share (1 %: below what
# a listener notices, so the MIDI file stays short; common practice, no source)
_TEMPO_STEP = 0.01


@dataclass(frozen=True, slots=True)
class QuantizedNote:
    """A note on the score grid.

    Parameters
    ----------
    onset_quarters : Fraction
        Start in quarter notes from the start of bar 1.
    duration_quarters : Fraction
        Notated length in quarters (> 0, at least a 32nd).
    pitch : int
        MIDI note number.
    velocity : int
        MIDI velocity of the source note.
    source : Note or None
        The timed note this comes from.
    spelling : (str, int, int) or None
        ``(step letter, alter, octave)`` once spelled for the key (see :func:`spell_voice`).
    """

    onset_quarters: Fraction
    duration_quarters: Fraction
    pitch: int
    velocity: int = 80
    source: Note | None = None
    spelling: tuple | None = None

    def __post_init__(self) -> None:
        if not self.duration_quarters > 0:
            raise InputError(f"quantized duration must be > 0 quarters, got {self.duration_quarters}")
        if self.onset_quarters < 0:
            raise InputError(f"quantized onset must be >= 0 quarters, got {self.onset_quarters}")

    @property
    def offset_quarters(self) -> Fraction:
        """End in quarters."""
        return self.onset_quarters + self.duration_quarters



@dataclass(frozen=True, eq=False)
class Notation:
    """A quantized, spelled, voiced draft ready for MusicXML or MIDI export.

    Parameters
    ----------
    grid : BeatGrid
        Beats, bars, time signatures and tempo.
    key_fifths : int
        Key signature, sharps positive (-7..7).
    key_mode : str
        ``"major"`` or ``"minor"``.
    staves : tuple of tuple of tuple of QuantizedNote
        ``staves[s][v]`` is voice ``v`` of staff ``s`` (top staff first).
    clefs : tuple of str
        ``"treble"`` or ``"bass"`` per staff.
    part_name, instrument_name : str
        Names written in the score.
    midi_program : int
        General MIDI program 0..127.
    title, composer : str
        Written in the score's header (the part's, else the take's file name); "" for none.
    transposition : int
        Semitones from written to sounding pitch (-2 for a B-flat clarinet, -9 for an
        E-flat alto saxophone, 0 for concert-pitch instruments).
    min_end_quarters : Fraction
        The draft has bars at least until here (the end of the part, when one was given).
    """

    grid: BeatGrid
    key_fifths: int
    key_mode: str
    staves: tuple
    clefs: tuple
    part_name: str
    instrument_name: str
    midi_program: int
    title: str = ""
    composer: str = ""
    transposition: int = 0
    min_end_quarters: Fraction = Fraction(0)

    @property
    def grand_staff(self) -> bool:
        """True when the part has two staves (piano)."""
        return len(self.staves) == 2

    def notes(self, staff: int | None = None) -> list[QuantizedNote]:
        """All quantized notes (of one staff, or all), sorted by onset then pitch."""
        staves = self.staves if staff is None else (self.staves[staff],)
        out = [n for st in staves for voice in st for n in voice]
        return sorted(out, key=lambda n: (n.onset_quarters, n.pitch))

    def end_quarters(self) -> Fraction:
        """End of the last note in quarters (0 when empty)."""
        ends = [n.offset_quarters for n in self.notes()]
        return max(ends) if ends else Fraction(0)

    def bars_end_quarters(self) -> Fraction:
        """Where the last bar must end at least: the last note's end or the part's end."""
        return max(self.end_quarters(), Fraction(self.min_end_quarters))

    @functools.cached_property
    def _segments(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Tempo segments ``(start quarters, quarter-note bpm, start MIDI seconds)``."""
        quarters, bpm, _ = tempo_segments(self.grid)
        seconds = np.concatenate([[0.0], np.cumsum(np.diff(quarters) * 60.0 / bpm[:-1])])
        return quarters, bpm, seconds

    def _quarters_to_midi_seconds(self, quarters) -> np.ndarray | float:
        """Seconds of score positions on the MIDI time line (0 s = quarter 0), integrating
        :meth:`tempo_map` so that notes fall exactly on its ticks."""
        starts, bpm, seconds = self._segments
        q = np.maximum(np.asarray(quarters, dtype=float), 0.0)
        k = np.clip(np.searchsorted(starts, q, side="right") - 1, 0, len(starts) - 1)
        out = seconds[k] + (q - starts[k]) * 60.0 / bpm[k]
        return float(out) if np.ndim(out) == 0 else out

    def tempo_map(self) -> list[tuple[float, float]]:
        """Tempo as ``(seconds, quarter-note bpm)`` pairs following the beat grid, first at 0 s.

        A pair where the take's tempo moves by more than 1 %, so a MIDI file with this map
        and :meth:`midi_tracks` notes plays the notated rhythm at the take's pace.
        """
        _, bpm, seconds = self._segments
        return [(float(t), float(b)) for t, b in zip(seconds, bpm)]

    def time_signature_map(self) -> list[tuple[float, int, int]]:
        """Time signatures as ``(seconds, numerator, denominator)`` on the MIDI time line."""
        return [(float(self._quarters_to_midi_seconds(q)), int(n), int(d)) for q, n, d in self.grid.time_signatures]

    def midi_tracks(self) -> list[tuple[str, list[Note], int]]:
        """One ``(name, notes, program)`` per staff for a type-1 MIDI file.

        Notes carry the *quantized* rhythm in seconds on the time line of
        :meth:`tempo_map` (0 s = start of bar 1).
        """
        names = ("right hand", "left hand") if self.grand_staff else (self.part_name,)
        out = []
        for s, name in enumerate(names):
            notes = []
            staff = self.notes(s)
            ons = np.atleast_1d(self._quarters_to_midi_seconds([float(q.onset_quarters) for q in staff]))
            offs = np.atleast_1d(self._quarters_to_midi_seconds([float(q.offset_quarters) for q in staff]))
            for qn, on, off in zip(staff, ons, offs):
                on, off = float(on), float(off)
                notes.append(Note(max(on, 0.0), max(off, on + 1e-3), qn.pitch, qn.velocity))
            label = f"{self.part_name} {name}" if self.grand_staff else name
            out.append((label, sort_notes(notes), int(self.midi_program)))
        return out



def tempo_segments(grid: BeatGrid) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``(start quarters, quarter-note bpm, start take seconds)`` of the grid's tempo: a new
    segment at each beat where the pace moves by more than 1 % from the current one; the
    first segment starts at quarter 0."""
    times = np.asarray(grid.beat_times, dtype=float)
    quarters = np.array([float(q) for q in grid.beat_quarters_positions])
    bpm = 60.0 * np.diff(quarters) / np.maximum(np.diff(times), 1e-6)
    starts = [0]
    for i in range(1, len(bpm)):
        if abs(bpm[i] - bpm[starts[-1]]) > _TEMPO_STEP * bpm[starts[-1]]:
            starts.append(i)
    if not len(bpm):
        return np.zeros(1), np.array([float(grid.bpm * float(grid.beat_quarters))]), np.zeros(1)
    idx = np.array(starts)
    q0 = quarters[idx].copy()
    q0[0] = 0.0
    return q0, bpm[idx], times[idx]


def performed_conductor(grid: BeatGrid) -> tuple[list, list]:
    """Tempo map and time signatures for a MIDI file in *performed* timing (take seconds).

    The same tempo changes as the notated file (:meth:`Notation.tempo_map`), placed at the
    take's beats, so a sequencer's bar lines follow the take through each hesitation. Before
    the first beat the first tempo holds (a constant lead-in, never a drift).
    """
    quarters, bpm, seconds = tempo_segments(grid)
    tempo = [(0.0, float(bpm[0]))] + [(max(float(t), 0.0), float(b)) for t, b in zip(seconds[1:], bpm[1:])]
    ts_seconds = grid.quarters_to_seconds(np.array([float(q) for q, _, _ in grid.time_signatures]))
    signatures = [(max(float(t), 0.0) if k else 0.0, int(n), int(d))
                  for k, (t, (_, n, d)) in enumerate(zip(ts_seconds, grid.time_signatures))]
    return tempo, signatures
