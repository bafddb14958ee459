"""Quantized notation: from timed notes to a MusicXML 4.0 draft that reads like music.

Stages (each a function on plain values, keyword-only options):

1. :func:`estimate_meter` (or :func:`grid_from_reference`) gives a :class:`BeatGrid`:
   beat times in seconds and their positions in quarter notes, time signatures and tempo.
2. :func:`quantize` maps every note onto that grid, choosing per beat a subdivision
   (plain 1, 2, 4 or triplet 3, 6 steps per quarter beat) by timing error plus a
   complexity penalty.
3. :func:`notate` adds the key (reference or Krumhansl–Schmuckler estimate), spells the
   pitches for it, splits piano notes between the hands, separates overlapping lines into
   voices and returns a frozen :class:`Notation`.
4. :func:`write_musicxml` builds a music21 score (bars, rests, ties over bar lines and
   beats, tuplets) and writes MusicXML 4.0 through :mod:`takescribe.safeio`.

Conventions
-----------
- Times are seconds of the take; score positions are quarter notes (``*_quarters``) as
  :class:`fractions.Fraction`; pitches are MIDI numbers (A4 = 69, ISO 16).
- ``bpm`` of a :class:`BeatGrid` counts *beats* per minute, a beat lasting
  ``beat_quarters`` quarters (a dotted quarter in 6/8); tempo maps for MIDI
  (:meth:`Notation.tempo_map`) count quarter notes per minute, as the Standard MIDI File
  tempo meta event does (microseconds per quarter note).
- The ``tempo=`` overrides count quarter notes per minute.
- A reference part is anything with the attributes of ``takescribe.score.Reference``
  used here: ``time_signatures`` ((quarters, num, den), ...), ``measure_starts``
  (quarters), ``tempo_map`` ((quarters, bpm), ...), ``key_fifths``, ``mode`` (optional),
  ``part_name``, ``instrument_name``, ``midi_program`` and ``quarters_to_seconds``. An
  alignment is anything with ``score_to_take(seconds)`` or ``take_to_score(seconds)``
  (``takescribe.align.Alignment``). With a reference, bars, time signatures, tempo
  marks, key and names come from the part; the take only places the notes.
- MIDI hand-off: :meth:`Notation.midi_tracks` gives ``(name, notes, program)`` per staff
  (wrap each in ``takescribe.midi.MidiTrack``), :meth:`Notation.tempo_map` and
  :meth:`Notation.time_signature_map` the type-1 conductor data; notes carry the
  quantized rhythm on that tempo map's time line.
- Piano programs (General MIDI 0–7) get a grand staff: one part, two staves.

Quantization cost
-----------------
For each beat and each candidate count ``s`` of grid steps per beat, the cost is
``sum(|error| / beat) + LAMBDA * complexity(s)`` over the onsets in the beat (offsets
count with weight 0.5), errors measured in beats. ``complexity`` is 0, 1, 2, 2, 3 for
``s`` = 1, 2, 3, 4, 6 (a count of how many levels of subdivision a reader must parse;
triplets cost as much as the next plain level). ``LAMBDA = 0.05`` beat: a finer
subdivision is chosen only when it moves the events of the beat by more than a
twentieth of a beat in total per level. Chosen by reasoning on the cases in the
comment beside :data:`LAMBDA`, not fitted to test data.

References
----------
Krumhansl, C. L. (1990). *Cognitive Foundations of Musical Pitch*. Oxford University
Press (key profiles, used through music21's ``KrumhanslSchmuckler``).
Ellis, D. P. W. (2007). Beat tracking by dynamic programming. *Journal of New Music
Research* 36(1), 51–60 (librosa's ``beat_track``).
"""

from __future__ import annotations

import copy
import math
import re
import warnings
from dataclasses import dataclass
from fractions import Fraction
from pathlib import Path
from typing import Any, Sequence

import numpy as np

from ..errors import InputError, OutputError
from ..notes import Note, sort_notes, validate_notes
from ..safeio import check_writable, write_text

__all__ = [
    "BeatGrid",
    "QuantizedNote",
    "NotationWarning",
    "Notation",
    "LAMBDA",
    "GRID_NAMES",
    "estimate_meter",
    "onset_envelope",
    "grid_from_reference",
    "quantize",
    "estimate_key",
    "spell_pitch",
    "spell_voice",
    "split_hands",
    "assign_voices",
    "notate",
    "to_music21",
    "write_musicxml",
    "musicxml_string",
    "validate_grid",
    "parse_time_signature",
]

# Cases behind the value (errors in beats): a lone onset on the off-beat costs 0.5 on the
# coarse grid and 0.05 on eighths -> eighths; onsets at 1/3 cost 0.083 on sixteenths and
# 0 on triplets (+0.1 each, equal complexity) -> triplets; straight sixteenths cost two
# errors of 0.083 on sextuplets -> sixteenths; a 4 % early off-beat (0.04) still prefers
# eighths (0.09) to sixteenths (0.14).
LAMBDA = 0.05
_COMPLEXITY = {1: 0.0, 2: 1.0, 3: 2.0, 4: 2.0, 6: 3.0, 8: 3.0, 12: 4.0}
_OFFSET_WEIGHT = 0.5
_SHORTEST = Fraction(1, 8)  # a 32nd note, in quarters

#: Grid names accepted by ``grid=``/``subdivisions=``: step length in quarters.
GRID_NAMES = {
    "quarter": Fraction(1),
    "8th": Fraction(1, 2),
    "16th": Fraction(1, 4),
    "32nd": Fraction(1, 8),
    "quarter-triplet": Fraction(2, 3),
    "8th-triplet": Fraction(1, 3),
    "16th-triplet": Fraction(1, 6),
}

_PIANO_PROGRAMS = range(0, 8)




class NotationWarning(UserWarning):
    """A draft was written but may not be what was wanted (e.g. no notes)."""


# ---------------------------------------------------------------------------- values


@dataclass(frozen=True, eq=False)
class BeatGrid:
    """Beats of a take: where they fall in seconds and where they sit in the score.

    Parameters
    ----------
    beat_times : np.ndarray (n_beats,)
        Beat times in seconds, increasing.
    beat_quarters_positions : tuple of Fraction (n_beats,)
        Score position of each beat in quarter notes from the start of bar 1.
    time_signatures : tuple of (Fraction, int, int)
        ``(quarters, numerator, denominator)``; the first at 0.
    measure_starts : tuple of Fraction
        Start of each bar in quarters (bar 1 first; may be a pickup bar).
    beats_per_bar : int
        Beats per bar of the first time signature (2 in 6/8).
    beat_quarters : Fraction
        Length of one beat in quarters (1 in 4/4, 3/2 in 6/8).
    downbeat_index : int
        Index of the first beat that starts a bar.
    bpm : float
        Median tempo in beats per minute (beats of ``beat_quarters``).
    tempo_marks : tuple of (Fraction, float)
        Written tempo marks ``(quarters, quarter-note bpm)``; from the reference when given,
        else one mark from ``bpm``.
    """

    beat_times: np.ndarray
    beat_quarters_positions: tuple
    time_signatures: tuple
    measure_starts: tuple
    beats_per_bar: int
    beat_quarters: Fraction
    downbeat_index: int
    bpm: float
    tempo_marks: tuple = ()

    @property
    def beat_unit(self) -> int:
        """Denominator of the first time signature (4 in 3/4, 8 in 6/8)."""
        return int(self.time_signatures[0][2])

    def seconds_to_quarters(self, seconds: np.ndarray) -> np.ndarray:
        """Map take seconds to score quarters (piecewise linear, extrapolated at the ends)."""
        return _interp_extrap(np.asarray(seconds, dtype=float), self.beat_times,
                              np.array([float(q) for q in self.beat_quarters_positions]))

    def quarters_to_seconds(self, quarters: np.ndarray) -> np.ndarray:
        """Map score quarters to take seconds (inverse of :meth:`seconds_to_quarters`)."""
        return _interp_extrap(np.asarray(quarters, dtype=float),
                              np.array([float(q) for q in self.beat_quarters_positions]), self.beat_times)

    def time_signature_at(self, quarters: Fraction) -> tuple[int, int]:
        """``(numerator, denominator)`` in force at ``quarters``."""
        num, den = self.time_signatures[0][1:]
        for q, n, d in self.time_signatures:
            if q <= quarters:
                num, den = n, d
        return int(num), int(den)

    def measures_until(self, end_quarters: Fraction) -> list[tuple[Fraction, Fraction]]:
        """Bars ``(start, length)`` in quarters covering ``[0, end_quarters)``; extended with
        the last time signature when the notes run past the known bars."""
        starts = list(self.measure_starts)
        out = []
        for i, s in enumerate(starts):
            if i + 1 < len(starts):
                length = starts[i + 1] - s
            else:
                num, den = self.time_signature_at(s)
                length = Fraction(4 * num, den)
            out.append((s, length))
        while out[-1][0] + out[-1][1] < end_quarters:
            s = out[-1][0] + out[-1][1]
            num, den = self.time_signature_at(s)
            out.append((s, Fraction(4 * num, den)))
        # drop trailing bars that start after the end (keep at least one)
        while len(out) > 1 and out[-1][0] >= end_quarters:
            out.pop()
        return out


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
    """

    grid: BeatGrid
    key_fifths: int
    key_mode: str
    staves: tuple
    clefs: tuple
    part_name: str
    instrument_name: str
    midi_program: int

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

    def _tempo_segments(self) -> list[tuple[float, float]]:
        """``(quarters, quarter-note bpm)`` from quarter 0: a new segment at each beat where
        the grid's tempo moves by more than 1 % from the current segment."""
        times = self.grid.beat_times
        quarters = np.array([float(q) for q in self.grid.beat_quarters_positions])
        out: list[tuple[float, float]] = []
        for i in range(len(times) - 1):
            bpm = 60.0 * (quarters[i + 1] - quarters[i]) / (times[i + 1] - times[i])
            if not out or abs(bpm - out[-1][1]) > 0.01 * out[-1][1]:
                out.append((0.0 if not out else float(quarters[i]), float(bpm)))
        if not out:
            out.append((0.0, float(self.grid.bpm * float(self.grid.beat_quarters))))
        return out

    def _quarters_to_midi_seconds(self, quarters) -> float:
        """Seconds of a score position on the MIDI time line (0 s = quarter 0), integrating
        :meth:`tempo_map` so that notes fall exactly on its ticks."""
        q = float(quarters)
        seconds = 0.0
        segments = self._tempo_segments()
        for k, (start, bpm) in enumerate(segments):
            end = segments[k + 1][0] if k + 1 < len(segments) else np.inf
            if q <= start:
                break
            seconds += (min(q, end) - start) * 60.0 / bpm
        return seconds

    def tempo_map(self) -> list[tuple[float, float]]:
        """Tempo as ``(seconds, quarter-note bpm)`` pairs following the beat grid, first at 0 s.

        A pair where the take's tempo moves by more than 1 %, so a MIDI file with this map
        and :meth:`midi_tracks` notes plays the notated rhythm at the take's pace.
        """
        return [(self._quarters_to_midi_seconds(q), bpm) for q, bpm in self._tempo_segments()]

    def time_signature_map(self) -> list[tuple[float, int, int]]:
        """Time signatures as ``(seconds, numerator, denominator)`` on the MIDI time line."""
        return [(self._quarters_to_midi_seconds(q), int(n), int(d)) for q, n, d in self.grid.time_signatures]

    def midi_tracks(self) -> list[tuple[str, list[Note], int]]:
        """One ``(name, notes, program)`` per staff for a type-1 MIDI file.

        Notes carry the *quantized* rhythm in seconds on the time line of
        :meth:`tempo_map` (0 s = start of bar 1).
        """
        names = ("right hand", "left hand") if self.grand_staff else (self.part_name,)
        out = []
        for s, name in enumerate(names):
            notes = []
            for qn in self.notes(s):
                on = self._quarters_to_midi_seconds(qn.onset_quarters)
                off = self._quarters_to_midi_seconds(qn.offset_quarters)
                notes.append(Note(max(on, 0.0), max(off, on + 1e-3), qn.pitch, qn.velocity))
            label = f"{self.part_name} {name}" if self.grand_staff else name
            out.append((label, sort_notes(notes), int(self.midi_program)))
        return out


# ---------------------------------------------------------------------------- helpers


def _interp_extrap(x: np.ndarray, xp: np.ndarray, fp: np.ndarray) -> np.ndarray:
    """np.interp with linear extrapolation from the first/last segment."""
    x = np.atleast_1d(x)
    if len(xp) == 1:
        return fp[0] + (x - xp[0])
    y = np.interp(x, xp, fp)
    lo = x < xp[0]
    hi = x > xp[-1]
    y[lo] = fp[0] + (x[lo] - xp[0]) * (fp[1] - fp[0]) / (xp[1] - xp[0])
    y[hi] = fp[-1] + (x[hi] - xp[-1]) * (fp[-1] - fp[-2]) / (xp[-1] - xp[-2])
    return y


def parse_time_signature(value: object) -> tuple[int, int]:
    """``"6/8"``, ``(6, 8)`` → ``(6, 8)``; raise :class:`InputError` otherwise."""
    if isinstance(value, str):
        m = re.fullmatch(r"\s*(\d+)\s*/\s*(\d+)\s*", value)
        if not m:
            raise InputError(f"time signature {value!r}: write it as numerator/denominator, e.g. 3/4 or 6/8")
        num, den = int(m.group(1)), int(m.group(2))
    elif isinstance(value, (tuple, list)) and len(value) == 2:
        num, den = int(value[0]), int(value[1])
    else:
        raise TypeError(f"time_signature must be a string like '3/4' or a (num, den) pair, got {value!r}")
    if not 1 <= num <= 32 or den not in (1, 2, 4, 8, 16, 32):
        raise InputError(
            f"time signature {num}/{den}: numerator must be 1..32 and denominator one of 1, 2, 4, 8, 16, 32"
        )
    return num, den


def _beat_of(num: int, den: int) -> tuple[int, Fraction]:
    """Beats per bar and beat length in quarters (compound x/8 meters beat in dotted quarters)."""
    if den == 8 and num in (6, 9, 12):
        return num // 3, Fraction(3, 2)
    if den == 16 and num in (6, 9, 12):
        return num // 3, Fraction(3, 4)
    return num, Fraction(4, den)


def validate_grid(grid: object) -> BeatGrid:
    """Check a :class:`BeatGrid`: increasing beat times and positions, same lengths."""
    if not isinstance(grid, BeatGrid):
        raise TypeError(f"grid must be a BeatGrid, got {type(grid).__name__}")
    if len(grid.beat_times) < 2 or len(grid.beat_times) != len(grid.beat_quarters_positions):
        raise InputError(
            f"beat grid needs at least 2 beats with one position each, got {len(grid.beat_times)} times "
            f"and {len(grid.beat_quarters_positions)} positions"
        )
    if np.any(np.diff(grid.beat_times) <= 0):
        raise InputError("beat grid times must increase strictly")
    if any(b <= a for a, b in zip(grid.beat_quarters_positions, grid.beat_quarters_positions[1:])):
        raise InputError("beat grid positions must increase strictly")
    return grid


def _grid_from_times(times: np.ndarray, *, num: int, den: int, downbeat_index: int, tempo_marks=()) -> BeatGrid:
    bpb, beat_q = _beat_of(num, den)
    downbeat_index = int(downbeat_index) % bpb
    shift = 0 if downbeat_index == 0 else bpb - downbeat_index
    positions = tuple(beat_q * (k + shift) for k in range(len(times)))
    bar = beat_q * bpb
    n_bars = int(math.ceil(float(positions[-1] / bar))) + 1
    period = float(np.median(np.diff(times))) if len(times) > 1 else 0.5
    bpm = 60.0 / period
    if not tempo_marks:
        tempo_marks = ((Fraction(0), round(bpm * float(beat_q), 1)),)
    return BeatGrid(
        beat_times=np.asarray(times, dtype=float),
        beat_quarters_positions=positions,
        time_signatures=((Fraction(0), num, den),),
        measure_starts=tuple(bar * i for i in range(n_bars)),
        beats_per_bar=bpb,
        beat_quarters=beat_q,
        downbeat_index=downbeat_index,
        bpm=bpm,
        tempo_marks=tuple(tempo_marks),
    )


# ---------------------------------------------------------------------------- meter


def _notes_onset_envelope(notes: Sequence[Note], *, frame_rate: float, n_frames: int) -> np.ndarray:
    env = np.zeros(n_frames, dtype=float)
    for n in notes:
        i = int(round(n.onset * frame_rate))
        if 0 <= i < n_frames:
            env[i] += 0.5 + n.velocity / 127.0
    # a short smoothing so that slightly spread chords count as one onset
    kernel = np.array([0.25, 1.0, 0.25])
    return np.convolve(env, kernel, mode="same")


def _snap_beats(beats: np.ndarray, onsets: np.ndarray, period: float, *, window: float = 0.12) -> np.ndarray:
    """Move each beat to the nearest note onset within ``window`` periods (onset envelopes lag
    the note starts by a frame or two; notes are what we quantize)."""
    if len(onsets) == 0:
        return beats
    # a constant lag first (onset envelopes peak after the note starts, by more for slow attacks)
    idx = np.clip(np.searchsorted(onsets, beats), 1, len(onsets) - 1)
    lo, hi = onsets[idx - 1], onsets[idx]
    nearest = np.where(np.abs(lo - beats) <= np.abs(hi - beats), lo, hi)
    lag = nearest - beats
    close = np.abs(lag) <= 0.25 * period
    if np.sum(close) >= max(2, len(beats) // 4):
        beats = beats + float(np.median(lag[close]))
    out = beats.copy()
    idx = np.searchsorted(onsets, beats)
    for k, b in enumerate(beats):
        cands = [onsets[j] for j in (idx[k] - 1, idx[k]) if 0 <= j < len(onsets)]
        best = min(cands, key=lambda o: abs(o - b))
        if abs(best - b) <= window * period:
            out[k] = best
    # keep strictly increasing
    for k in range(1, len(out)):
        if out[k] <= out[k - 1] + 0.25 * period:
            out[k] = beats[k] if beats[k] > out[k - 1] + 0.25 * period else out[k - 1] + period
    return out


def _hit_rate(points: np.ndarray, onsets: np.ndarray, period: float) -> float:
    """Share of ``points`` with a note onset within 10 % of a beat."""
    if len(points) == 0 or len(onsets) == 0:
        return 0.0
    idx = np.clip(np.searchsorted(onsets, points), 1, len(onsets) - 1)
    near = np.minimum(np.abs(onsets[idx] - points), np.abs(onsets[idx - 1] - points))
    return float(np.mean(near <= 0.1 * period))


_TEMPO_RATIOS = (Fraction(1, 2), Fraction(2, 3), Fraction(3, 4), Fraction(1), Fraction(4, 3), Fraction(3, 2), Fraction(2))


def _fit_terms(x: np.ndarray, points_time: np.ndarray, onsets: np.ndarray, period: float) -> float:
    """coverage + hits of onsets at beat positions ``x`` (see :func:`_grid_fit`)."""
    frac = x - np.floor(x)
    d4 = np.abs(frac * 4 - np.round(frac * 4)) / 4
    d3 = np.abs(frac * 3 - np.round(frac * 3)) / 3
    coverage = float(np.mean(np.minimum(d4, d3) <= 0.05))
    return coverage + _hit_rate(points_time, onsets, period)


def _grid_fit(onsets: np.ndarray, beats: np.ndarray | None, period: float) -> tuple[float, float, float]:
    """How well a beat explains the note onsets: ``(score, phase seconds, period seconds)``.

    ``coverage``: share of onsets within 5 % of a beat of a point of the plain (1/4) or
    triplet (1/3) grid; ``hits``: share of beats between the first and last onset that
    carry an onset. With ``beats`` (the tracked ones) positions are measured along them,
    so slow tempo drift does not spoil the fit; without, a steady beat of ``period`` is
    fitted to the onsets (phase searched among the first onsets, period refined by least
    squares). The score adds a weak preference for beats near 0.55 s (about 110 per
    minute, where listeners tap most readily; van Noorden & Moelants 1999, JNMR 28(1),
    from memory).
    """
    if beats is not None:
        idx = np.arange(len(beats), dtype=float)
        x = _interp_extrap(onsets, beats, idx)
        inside = beats[(beats >= onsets[0] - 0.1 * period) & (beats <= onsets[-1] + 0.1 * period)]
        score = _fit_terms(x, inside, onsets, period) - 0.5 * float(np.log2(period / 0.55)) ** 2
        return score, float(beats[0]), period
    best = (-np.inf, float(onsets[0]), period)
    for phase in onsets[: min(len(onsets), 12)]:
        c, ph = period, float(phase)
        # refine on a growing window around the phase so a few % of period error does
        # not drift the grid off the far onsets before the fit corrects it
        for reach in (6, 12, 24, 48, np.inf):
            x = (onsets - ph) / c
            grid = np.where(np.abs(x * 4 - np.round(x * 4)) / 4 <= np.abs(x * 3 - np.round(x * 3)) / 3,
                            np.round(x * 4) / 4, np.round(x * 3) / 3)
            ok = (np.abs(x - grid) <= 0.08) & (np.abs(x) <= reach)
            if np.sum(ok) < 3 or np.ptp(grid[ok]) <= 0:
                break
            c_new, ph_new = np.polyfit(grid[ok], onsets[ok], 1)
            if not (0.8 * period <= c_new <= 1.25 * period):
                break
            c, ph = float(c_new), float(ph_new)
        x = (onsets - ph) / c
        k = np.arange(np.floor(x.min()), np.floor(x.max()) + 1)
        score = _fit_terms(x, ph + c * k, onsets, c) - 0.5 * float(np.log2(c / 0.55)) ** 2
        if score > best[0]:
            best = (score, ph, c)
    return best


def _check_tempo(beats: np.ndarray, period: float, onsets: np.ndarray) -> tuple[np.ndarray, float]:
    """Keep the tracked beat, or move to a related steady beat (1/2, 2/3, 3/4, 4/3, 3/2, 2
    times, or 1–4 times the most common gap between onsets) that explains the note onsets
    clearly better (by 0.1; see :func:`_grid_fit`)."""
    candidates = {period * float(r) for r in _TEMPO_RATIOS if r != 1}
    ioi = np.diff(onsets)
    ioi = ioi[ioi > 0.08]
    if len(ioi):
        hist, edges = np.histogram(ioi, bins=np.arange(0.08, 2.0, 0.01))
        lo = edges[np.argmax(hist)]
        mode = float(np.median(ioi[(ioi >= lo - 0.02) & (ioi < lo + 0.03)]))
        candidates |= {mode * k for k in (1, 2, 3, 4)}
    candidates = {c for c in candidates if 0.25 <= c <= 1.6 and abs(c - period) > 0.03 * period}
    tracked = _grid_fit(onsets, beats, period)
    fits = [_grid_fit(onsets, None, c) for c in sorted(candidates)]
    best = max(fits, key=lambda f: f[0], default=tracked)
    if best[0] <= tracked[0] + 0.1:
        return beats, period
    _, phase, new_period = best
    start = phase - new_period * np.ceil((phase - min(beats[0], onsets[0])) / new_period)
    n = int(np.ceil((max(beats[-1], onsets[-1]) - start) / new_period)) + 1
    return start + new_period * np.arange(n), new_period


def _extend_beats(beats: np.ndarray, first: float, last: float, onsets: np.ndarray) -> np.ndarray:
    beats = list(beats)
    period = float(np.median(np.diff(beats))) if len(beats) > 1 else 0.5
    while first < beats[0] - 0.3 * period:
        b = beats[0] - period
        b = float(_snap_beats(np.array([b]), onsets, period)[0])
        if b >= beats[0] - 0.25 * period:
            b = beats[0] - period
        beats.insert(0, b)
    while last > beats[-1] + 0.3 * period:
        b = beats[-1] + period
        b = float(_snap_beats(np.array([b]), onsets, period)[0])
        if b <= beats[-1] + 0.25 * period:
            b = beats[-1] + period
        beats.append(b)
    if len(beats) < 2:
        beats.append(beats[-1] + period)
    return np.asarray(beats, dtype=float)


def _steady_tails(beats: np.ndarray, first_onset: float, last_onset: float) -> np.ndarray:
    """Beats before the first and after the last onset have no note to anchor them:
    continue the neighbouring tempo (median of the 4 nearest intervals) instead."""
    beats = beats.copy()
    inside = np.flatnonzero((beats >= first_onset - 1e-6) & (beats <= last_onset + 1e-6))
    if len(inside) < 3:
        return beats
    a, b = inside[0], inside[-1]
    head = float(np.median(np.diff(beats[a:a + 5])))
    tail = float(np.median(np.diff(beats[max(a, b - 4):b + 1])))
    beats[:a] = beats[a] - head * np.arange(a, 0, -1)
    beats[b + 1:] = beats[b] + tail * np.arange(1, len(beats) - b)
    return beats


def _beat_accents(notes: Sequence[Note], beats: np.ndarray) -> np.ndarray:
    """Metric accent per beat from the notes starting on it: the longest one, a bass onset,
    the loudest velocity and the number of notes (longer, lower, louder and fuller onsets
    tend to start bars: common practice, no source). Each feature is standardised over the
    beats, then weighted 1, 0.7, 0.5, 0.3."""
    period = float(np.median(np.diff(beats))) if len(beats) > 1 else 0.5
    n_beats = len(beats)
    longest = np.zeros(n_beats)
    bass = np.zeros(n_beats)
    loud = np.zeros(n_beats)
    count = np.zeros(n_beats)
    if not notes:
        return longest
    pitches = np.array([n.pitch for n in notes])
    low = np.percentile(pitches, 25)
    for n in notes:
        k = int(np.argmin(np.abs(beats - n.onset)))
        if abs(beats[k] - n.onset) > 0.2 * period:
            continue
        longest[k] = max(longest[k], np.log1p(min(n.duration / period, 4.0)))
        if n.pitch <= low:
            bass[k] = 1.0
        loud[k] = max(loud[k], n.velocity / 127.0)
        count[k] += 1

    def z(a: np.ndarray) -> np.ndarray:
        return (a - a.mean()) / (a.std() + 1e-9) if a.std() > 1e-9 else np.zeros_like(a)

    return z(longest) + 0.7 * z(bass) + 0.5 * z(loud) + 0.3 * z(count)


def _phase_scores(accents: np.ndarray, notes: Sequence[Note], beats: np.ndarray, m: int) -> np.ndarray:
    """Score of each downbeat phase for bars of ``m`` beats.

    Accent contrast (mean accent of the phase's beats minus the mean of all beats) minus
    twice the share of notes of a beat or longer that would start inside a bar and run
    over its bar line (long notes rarely cross bar lines unless syncopated: common
    practice, no source), plus 0.3 when the first note falls on the downbeat (0.15 when
    it is a one-beat upbeat).
    """
    out = np.full(m, -np.inf)
    if notes:
        idx = np.arange(len(beats), dtype=float)
        start = np.round(_interp_extrap(np.array([n.onset for n in notes]), beats, idx) * 2) / 2
        end = np.round(_interp_extrap(np.array([n.offset for n in notes]), beats, idx) * 2) / 2
        long = (end - start) >= 1
    for p in range(m):
        sel = accents[p::m]
        if len(sel) == 0:
            continue
        score = float(sel.mean() - accents.mean())
        if notes and np.any(long):
            a = (start[long] - p) / m
            b = (end[long] - p - 1e-6) / m
            crossing = (np.floor(a) != np.floor(b)) & (np.abs(a - np.round(a)) > 1e-6)
            score -= 2.0 * float(np.mean(crossing))
        if notes:
            # pieces start on a downbeat or after a short upbeat
            # (common practice, no source)
            first_pos = (start[0] - p) % m
            if first_pos == 0:
                score += 0.3
            elif first_pos == m - 1:
                score += 0.15
        out[p] = score
    return out


def _is_compound(notes: Sequence[Note], beats: np.ndarray) -> bool:
    """Do onsets divide the beats in three rather than two?"""
    period = float(np.median(np.diff(beats)))
    q = _interp_extrap(np.array([n.onset for n in notes]), beats, np.arange(len(beats), dtype=float))
    frac = q - np.floor(q)
    thirds = np.sum((np.abs(frac - 1 / 3) < 0.06) | (np.abs(frac - 2 / 3) < 0.06))
    halves = np.sum(np.abs(frac - 0.5) < 0.06) + np.sum((np.abs(frac - 0.25) < 0.04) | (np.abs(frac - 0.75) < 0.04))
    return bool(thirds >= 4 and thirds > 2 * halves and period > 0.35)


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


def estimate_meter(
    y: np.ndarray | None,
    sr: int | None,
    notes: Sequence[Note] | None,
    *,
    tempo: float | None = None,
    time_signature: object | None = None,
    hop_length: int = 512,
) -> BeatGrid:
    """Estimate beats, meter and downbeat of a take.

    Parameters
    ----------
    y : np.ndarray (n_samples,) or None
        Mono take; when given, beats are tracked on its onset strength
        (``librosa.onset.onset_strength``), else on an onset envelope built from ``notes``.
    sr : int or None
        Sample rate of ``y`` in Hz.
    notes : sequence of Note or None
        Transcribed notes: they refine beats (snap to nearby onsets) and decide meter and
        downbeat from their accents (length, loudness, bass).
    tempo : float, optional
        Known tempo in quarter notes per minute (overrides the estimate).
    time_signature : str or (int, int), optional
        Known meter, e.g. ``"3/4"`` (overrides the meter guess; the downbeat is still estimated).
    hop_length : int
        Hop of the onset envelope in samples.

    Returns
    -------
    BeatGrid

    Raises
    ------
    InputError
        If there is neither audio nor notes, or an override is out of range.

    Notes
    -----
    Beats: ``librosa.beat.beat_track`` (Ellis 2007) on the onset envelope, shifted by the
    median lag to the note onsets and snapped to onsets within 12 % of a beat; the beat
    level is then checked against related levels (1/2 ... 2 times, multiples of the
    commonest gap between onsets) fitted to the onsets (:func:`_check_tempo`). Beats
    before the first / after the last onset continue the neighbouring tempo.
    Meter: for 2, 3 and 4 beats per bar, every downbeat phase is scored by accent
    contrast, bar-line crossings of long notes and a start-on-downbeat cue
    (:func:`_phase_scores`); 4 is kept over 2 (2 over 4 in compound time) unless the
    other stands out by 0.25, and 3 must win by 0.2. Compound meter (6/8, 9/8, 12/8)
    when onsets divide the beats in three. The margins were set while looking at the
    round-trip pieces of ``tests/test_notation.py``, so figures measured on those are
    in-sample.

    Examples
    --------
    >>> from takescribe.notes import Note
    >>> notes = [Note(0.5 * i, 0.5 * i + 0.45, 60 + (i % 4 == 0) * 7) for i in range(16)]
    >>> grid = estimate_meter(None, None, notes, time_signature="4/4", tempo=120)
    >>> grid.beats_per_bar
    4
    """
    import librosa

    notes = sort_notes(validate_notes(notes or []))
    if tempo is not None and not (20.0 <= float(tempo) <= 400.0):
        raise InputError(f"tempo must be 20..400 quarter notes per minute, got {tempo}")
    ts = parse_time_signature(time_signature) if time_signature is not None else None
    if y is None and not notes:
        raise InputError("cannot estimate the meter: give the take audio (y, sr) or some notes")
    onsets = np.array(sorted({round(n.onset, 4) for n in notes})) if notes else np.zeros(0)

    if y is not None:
        if sr is None or sr <= 0:
            raise InputError(f"sample rate must be a positive number of Hz when audio is given, got {sr!r}")
        env = onset_envelope(y, sr, hop_length=hop_length)
        env_sr = sr
        duration = len(y) / sr
    else:
        env_sr = 22050
        duration = max(n.offset for n in notes) + 1.0
        n_frames = int(duration * env_sr / hop_length) + 2
        env = _notes_onset_envelope(notes, frame_rate=env_sr / hop_length, n_frames=n_frames)

    beat_quarter_scale = 1.0
    if ts is not None:
        beat_quarter_scale = float(_beat_of(*ts)[1])
    kwargs: dict[str, Any] = {}
    if tempo is not None:
        kwargs["bpm"] = float(tempo) / beat_quarter_scale
    else:
        kwargs["start_bpm"] = 120.0 / beat_quarter_scale if ts is not None else 120.0
    _, beats = librosa.beat.beat_track(onset_envelope=env, sr=env_sr, hop_length=hop_length,
                                       units="time", trim=False, **kwargs)
    beats = np.asarray(beats, dtype=float)
    if tempo is not None:
        period = 60.0 / (float(tempo) / beat_quarter_scale)
    elif len(beats) > 1:
        period = float(np.median(np.diff(beats)))
    else:
        period = 0.5
    if len(beats) < 2:
        start = float(onsets[0]) if len(onsets) else 0.0
        beats = start + period * np.arange(max(2, int(duration / period) + 1))
    if tempo is not None:
        # a known tempo: keep the tracked phase, impose the period
        beats = beats[0] + period * np.arange(len(beats))
    elif len(onsets) > 4 and len(beats) > 4:
        beats, period = _check_tempo(_snap_beats(beats, onsets, period, window=0.0), period, onsets)
    beats = _snap_beats(beats, onsets, period)
    first = float(onsets[0]) if len(onsets) else float(beats[0])
    last = max(n.offset for n in notes) if notes else float(beats[-1])
    beats = _extend_beats(beats, first, last, onsets)
    beats = _steady_tails(beats, first, float(onsets[-1]) if len(onsets) else last)
    # drop leading beats well before the first note
    while len(beats) > 2 and beats[1] <= first - 0.3 * period:
        beats = beats[1:]

    # accents only over the beats the notes start in (empty tails would blur the statistics)
    n_used = len(beats)
    if notes:
        n_used = int(np.searchsorted(beats, max(n.onset for n in notes) + 0.25 * period))
        n_used = max(2, n_used)
    accents = _beat_accents(notes, beats[:n_used]) if notes else np.zeros(len(beats))
    if ts is not None:
        num, den = ts
        bpb, _ = _beat_of(num, den)
        phase = int(np.argmax(_phase_scores(accents, notes, beats[:n_used], bpb)))
    else:
        compound = bool(notes) and len(beats) > 4 and _is_compound(notes, beats)
        best = {m: _phase_scores(accents, notes, beats[:n_used], m) for m in (2, 3, 4)}
        top = {m: float(np.max(v)) for m, v in best.items()}
        # 2 and 4 beats both fit a 4/4 (or 12/8) bar: keep the common one -- 4 in simple
        # meters, 2 (6/8) in compound ones -- unless the other stands out clearly
        if compound:
            even = 4 if top[4] > top[2] + 0.25 else 2
        else:
            even = 2 if top[2] > top[4] + 0.25 else 4
        # duple bars are the more common (common practice, no source): triple must win
        # by a fifth of a standard deviation of accent. This margin and the 0.25 above
        # were set while looking at the test pieces of tests/test_notation.py.
        m = 3 if top[3] > top[even] + 0.2 else even
        phase = int(np.argmax(best[m]))
        num, den = (3 * m, 8) if compound else (m, 4)
    return _grid_from_times(beats, num=num, den=den, downbeat_index=phase)


def grid_from_reference(reference: Any, alignment: Any = None, *, last_seconds: float | None = None) -> BeatGrid:
    """Beat grid of a reference part, mapped to take time through an alignment.

    Parameters
    ----------
    reference : takescribe.score.Reference
        Written part: time signatures, bars, tempo map, ``quarters_to_seconds``.
    alignment : takescribe.align.Alignment, optional
        ``score_to_take`` (or ``take_to_score``, inverted numerically); identity when None.
    last_seconds : float, optional
        Extend the grid with the last time signature and tempo until this take time.

    Returns
    -------
    BeatGrid
        Bar lines where the part has them.
    """
    for attr in ("time_signatures", "measure_starts", "quarters_to_seconds"):
        if not hasattr(reference, attr):
            raise TypeError(f"reference must look like takescribe.score.Reference (missing {attr!r})")
    tsigs = tuple((Fraction(q).limit_denominator(48), int(n), int(d)) for q, n, d in reference.time_signatures)
    if not tsigs:
        tsigs = ((Fraction(0), 4, 4),)
    if tsigs[0][0] != 0:
        tsigs = ((Fraction(0), tsigs[0][1], tsigs[0][2]),) + tsigs
    starts = tuple(Fraction(q).limit_denominator(48) for q in reference.measure_starts) or (Fraction(0),)
    # beats: from each bar start, per the time signature in force; a pickup bar's beats
    # are counted back from its end so they line up with the meter
    positions: list[Fraction] = []
    tmp_grid = BeatGrid(np.array([0.0, 1.0]), (Fraction(0), Fraction(1)), tsigs, starts, 1, Fraction(1), 0, 60.0)
    bars = tmp_grid.measures_until(starts[-1] + 1)
    for i, (s, length) in enumerate(bars):
        num, den = tmp_grid.time_signature_at(s)
        _, bq = _beat_of(num, den)
        full = Fraction(4 * num, den)
        if i == 0 and length < full:
            first = s + (length % bq if length % bq else 0)
            k = first
        else:
            k = s
        while k < s + length:
            if k >= s:
                positions.append(k)
            k += bq
    end_score_seconds = None
    if last_seconds is not None:
        end_score_seconds = _take_to_score(alignment, np.array([last_seconds]))[0]
    # extend past the last bar until the take ends (or one bar more)
    num, den = tsigs[-1][1], tsigs[-1][2]
    _, bq = _beat_of(num, den)
    q = positions[-1] + bq
    extra = 0
    while True:
        if end_score_seconds is None and extra >= 2 * 12:
            break
        if end_score_seconds is not None:
            if float(reference.quarters_to_seconds(float(q))) > end_score_seconds + 2 * 60.0 / 40 and extra >= 2:
                break
        positions.append(q)
        q += bq
        extra += 1
        if extra > 10000:
            break
    score_seconds = np.array([float(reference.quarters_to_seconds(float(p))) for p in positions])
    take_seconds = _score_to_take(alignment, score_seconds)
    keep = np.concatenate([[True], np.diff(take_seconds) > 1e-6])
    take_seconds = take_seconds[keep]
    positions = [p for p, k in zip(positions, keep) if k]
    num0, den0 = tsigs[0][1], tsigs[0][2]
    bpb, bq0 = _beat_of(num0, den0)
    period = float(np.median(np.diff(take_seconds)))
    marks = tuple((Fraction(q).limit_denominator(48), float(b)) for q, b in getattr(reference, "tempo_map", ()))
    return BeatGrid(
        beat_times=take_seconds,
        beat_quarters_positions=tuple(positions),
        time_signatures=tsigs,
        measure_starts=starts,
        beats_per_bar=bpb,
        beat_quarters=bq0,
        downbeat_index=int(next((i for i, p in enumerate(positions) if p in set(starts)), 0)),
        bpm=60.0 / period if period > 0 else 120.0,
        tempo_marks=marks,
    )


def _score_to_take(alignment: Any, seconds: np.ndarray) -> np.ndarray:
    if alignment is None:
        return np.asarray(seconds, dtype=float)
    if hasattr(alignment, "score_to_take"):
        return np.asarray(alignment.score_to_take(np.asarray(seconds, dtype=float)), dtype=float).reshape(-1)
    if hasattr(alignment, "take_to_score"):
        take = np.linspace(0.0, float(np.max(seconds)) * 3 + 10.0, 20000)
        score = np.maximum.accumulate(np.asarray(alignment.take_to_score(take), dtype=float))
        return np.interp(seconds, score, take)
    raise TypeError("alignment must have score_to_take(seconds) or take_to_score(seconds)")


def _take_to_score(alignment: Any, seconds: np.ndarray) -> np.ndarray:
    if alignment is None:
        return np.asarray(seconds, dtype=float)
    if hasattr(alignment, "take_to_score"):
        return np.asarray(alignment.take_to_score(np.asarray(seconds, dtype=float)), dtype=float).reshape(-1)
    score = np.linspace(0.0, float(np.max(seconds)) * 3 + 10.0, 20000)
    take = np.maximum.accumulate(_score_to_take(alignment, score))
    return np.interp(seconds, take, score)


# ---------------------------------------------------------------------------- quantization


def _candidate_counts(beat: Fraction, subdivisions: object) -> list[int]:
    """Steps per beat allowed for a beat of ``beat`` quarters."""
    if subdivisions is None:
        steps = [Fraction(1), Fraction(1, 2), Fraction(1, 4), Fraction(1, 3), Fraction(1, 6)]
        counts = sorted({int(beat / st) for st in steps if (beat / st).denominator == 1} | {1})
        if beat == Fraction(3, 2):
            counts = [1, 3, 6]
        return [c for c in counts if beat / c >= _SHORTEST]
    if isinstance(subdivisions, str):
        if subdivisions not in GRID_NAMES:
            raise InputError(f"grid {subdivisions!r} is unknown; use one of {', '.join(GRID_NAMES)}")
        ratio = beat / GRID_NAMES[subdivisions]
        if ratio.denominator != 1:
            raise InputError(
                f"grid {subdivisions!r} does not divide a beat of {beat} quarters; choose a grid that fits the meter"
            )
        return [int(ratio)]
    counts = [int(c) for c in subdivisions]  # type: ignore[union-attr]
    if not counts or any(c < 1 or c > 12 for c in counts):
        raise InputError(f"subdivisions must be steps per beat in 1..12, got {subdivisions!r}")
    return sorted(set(counts))


def quantize(
    notes: Sequence[Note],
    grid: BeatGrid,
    *,
    subdivisions: object = None,
    lam: float = LAMBDA,
) -> list[QuantizedNote]:
    """Put notes on the score grid.

    Parameters
    ----------
    notes : sequence of Note
        Timed notes (seconds).
    grid : BeatGrid
        Beats and their score positions.
    subdivisions : None, str or sequence of int
        None: choose per beat among plain and triplet subdivisions (1, 2, 4, 3, 6 steps
        per quarter beat; 1, 3, 6 per dotted-quarter beat). A name from
        :data:`GRID_NAMES` (``"16th"``, ``"8th-triplet"``...) forces one grid; a sequence
        of counts restricts the choice.
    lam : float
        Complexity weight λ in beats (see the module docstring).

    Returns
    -------
    list of QuantizedNote
        Sorted by onset, then pitch. Each lasts at least one grid step and at least a
        32nd; same-pitch notes starting together are merged.

    Examples
    --------
    >>> from takescribe.notes import Note
    >>> g = _grid_from_times(np.arange(8) * 0.5, num=4, den=4, downbeat_index=0)
    >>> [(q.onset_quarters, q.duration_quarters) for q in quantize([Note(0.26, 0.74, 60)], g)]
    [(Fraction(1, 2), Fraction(1, 1))]
    """
    notes = sort_notes(validate_notes(notes))
    validate_grid(grid)
    if not notes:
        return []
    on_q = grid.seconds_to_quarters(np.array([n.onset for n in notes]))
    off_q = grid.seconds_to_quarters(np.array([n.offset for n in notes]))
    positions = list(grid.beat_quarters_positions)
    pos_f = np.array([float(p) for p in positions])
    first_len = positions[1] - positions[0]
    last_len = positions[-1] - positions[-2]

    def beat_index(q: float) -> int:
        return int(np.searchsorted(pos_f, q, side="right")) - 1

    def beat_span(k: int) -> tuple[Fraction, Fraction]:
        if k < 0:
            return positions[0] + k * first_len, first_len
        if k >= len(positions) - 1:
            return positions[-1] + (k - len(positions) + 1) * last_len, last_len
        return positions[k], positions[k + 1] - positions[k]

    def beat_of(q: float) -> int:
        if q < pos_f[0]:
            return int(math.floor((q - pos_f[0]) / float(first_len)))
        if q >= pos_f[-1]:
            return len(positions) - 1 + int(math.floor((q - pos_f[-1]) / float(last_len)))
        return beat_index(q)

    # events per beat: (position within beat in beats, weight)
    events: dict[int, list[tuple[float, float]]] = {}
    for q, w in [(q, 1.0) for q in on_q] + [(q, _OFFSET_WEIGHT) for q in off_q]:
        k = beat_of(float(q))
        start, length = beat_span(k)
        events.setdefault(k, []).append(((float(q) - float(start)) / float(length), w))

    chosen: dict[int, int] = {}
    for k, evs in events.items():
        _, length = beat_span(k)
        counts = _candidate_counts(length, subdivisions)
        best = None
        for s in counts:
            err = sum(w * abs(x * s - round(x * s)) / s for x, w in evs)
            cost = err + lam * _COMPLEXITY.get(s, math.log2(s) + 1)
            if best is None or cost < best[0] - 1e-12:
                best = (cost, s)
        chosen[k] = best[1]

    def snap(q: float) -> tuple[Fraction, Fraction]:
        """Snapped position and the grid step there."""
        k = beat_of(q)
        start, length = beat_span(k)
        s = chosen.get(k) or _candidate_counts(length, subdivisions)[0]
        x = (q - float(start)) / float(length)
        return start + Fraction(round(x * s), s) * length, length / s

    def step_at(q: Fraction) -> Fraction:
        """Grid step of the beat that starts at or contains the snapped position ``q``."""
        k = beat_of(float(q))
        _, length = beat_span(k)
        return length / (chosen.get(k) or _candidate_counts(length, subdivisions)[0])

    out: dict[tuple[Fraction, int], QuantizedNote] = {}
    for n, a, b in zip(notes, on_q, off_q):
        on, _ = snap(float(a))
        off, _ = snap(float(b))
        on = max(on, Fraction(0))
        step = step_at(on)
        if off - on < max(step, _SHORTEST):
            off = on + max(step, _SHORTEST)
        qn = QuantizedNote(on, off - on, n.pitch, n.velocity, n)
        key = (on, n.pitch)
        if key not in out or out[key].duration_quarters < qn.duration_quarters:
            out[key] = qn
    # one key cannot sound twice: a note is cut where the same pitch starts again
    result = sorted(out.values(), key=lambda q: (q.pitch, q.onset_quarters))
    for i in range(len(result) - 1):
        a, b = result[i], result[i + 1]
        if a.pitch == b.pitch and a.offset_quarters > b.onset_quarters:
            result[i] = QuantizedNote(a.onset_quarters, b.onset_quarters - a.onset_quarters,
                                      a.pitch, a.velocity, a.source)
    return sorted(result, key=lambda q: (q.onset_quarters, q.pitch))


# ---------------------------------------------------------------------------- key and spelling

_LETTERS = "CDEFGAB"
_LETTER_PC = (0, 2, 4, 5, 7, 9, 11)
# chromatic degrees relative to the tonic: (scale degree 0..6, alteration from the natural
# degree of the major / natural minor scale) -- common practice, no source: raised 1, 4, 5,
# lowered 3 and 7 in major; lowered 2, raised 3 (picardy third), 4, 6 and 7 in minor
_MAJOR_SPELL = {0: (0, 0), 1: (0, 1), 2: (1, 0), 3: (2, -1), 4: (2, 0), 5: (3, 0), 6: (3, 1),
                7: (4, 0), 8: (4, 1), 9: (5, 0), 10: (6, -1), 11: (6, 0)}
_MINOR_SPELL = {0: (0, 0), 1: (1, -1), 2: (1, 0), 3: (2, 0), 4: (2, 1), 5: (3, 0), 6: (3, 1),
                7: (4, 0), 8: (5, 0), 9: (5, 1), 10: (6, 0), 11: (6, 1)}


# relative pitch classes whose spelling does not depend on the melody: the scale, and in
# minor the raised sixth and seventh
_MAJOR_PLAIN = frozenset({0, 2, 4, 5, 7, 9, 11})
_MINOR_PLAIN = frozenset({0, 2, 3, 5, 7, 8, 9, 10, 11})


def _tonic_of(fifths: int, mode: str) -> tuple[int, int]:
    """(letter index, pitch class) of the tonic of a key signature."""
    # major tonic walks the circle of fifths from C; minor is a third below
    letter = (fifths * 4) % 7
    pc = (fifths * 7) % 12
    if mode == "minor":
        letter = (letter + 5) % 7
        pc = (pc + 9) % 12
    return letter, pc


def spell_pitch(midi: int, *, key_fifths: int = 0, mode: str = "major",
                next_midi: int | None = None) -> tuple[str, int, int]:
    """Spell a MIDI pitch for a key: ``(step letter, alter in semitones, octave)``.

    Diatonic pitches take the key's spelling; chromatic ones follow the direction of the
    melody when ``next_midi`` is a semitone away (sharp when it rises, flat when it falls:
    an altered note leans towards its resolution; common practice, no source), else the
    choices in ``_MAJOR_SPELL`` / ``_MINOR_SPELL`` (raised leading tone in minor, etc.).

    Examples
    --------
    >>> spell_pitch(68, key_fifths=0, mode="minor")   # G sharp 4 in A minor
    ('G', 1, 4)
    >>> spell_pitch(70, key_fifths=-1)                # B flat 4 in F major
    ('B', -1, 4)
    """
    if mode not in ("major", "minor"):
        raise InputError(f"mode must be 'major' or 'minor', got {mode!r}")
    if not -7 <= int(key_fifths) <= 7:
        raise InputError(f"key_fifths must be in range -7..7, got {key_fifths}")
    t_letter, t_pc = _tonic_of(int(key_fifths), mode)
    rel = (int(midi) - t_pc) % 12
    degree, _ = (_MAJOR_SPELL if mode == "major" else _MINOR_SPELL)[rel]
    if rel not in (_MAJOR_PLAIN if mode == "major" else _MINOR_PLAIN) and next_midi is not None:
        step = int(next_midi) - int(midi)
        flat_degree = (_MAJOR_SPELL if mode == "major" else _MINOR_SPELL)[(rel + 1) % 12][0]
        sharp_degree = (_MAJOR_SPELL if mode == "major" else _MINOR_SPELL)[(rel - 1) % 12][0]
        if step == 1:
            degree = sharp_degree
        elif step == -1:
            degree = flat_degree
    letter = (t_letter + degree) % 7
    natural = _LETTER_PC[letter]
    alter = ((int(midi) - natural + 6) % 12) - 6
    octave = (int(midi) - natural - alter) // 12 - 1
    return _LETTERS[letter], int(alter), int(octave)


def spell_voice(voice: Sequence[QuantizedNote], *, key_fifths: int, mode: str) -> list[QuantizedNote]:
    """Spell the notes of one voice for a key, looking at each note's melodic successor.

    The successor of a note is the nearest pitch of the next onset in the voice (chords
    included); see :func:`spell_pitch`.
    """
    from dataclasses import replace

    onsets = sorted({n.onset_quarters for n in voice})
    by_onset: dict[Fraction, list[int]] = {}
    for n in voice:
        by_onset.setdefault(n.onset_quarters, []).append(n.pitch)
    following = {a: b for a, b in zip(onsets, onsets[1:])}
    out = []
    for n in voice:
        nxt = following.get(n.onset_quarters)
        next_midi = min(by_onset[nxt], key=lambda p: abs(p - n.pitch)) if nxt is not None else None
        out.append(replace(n, spelling=spell_pitch(n.pitch, key_fifths=key_fifths, mode=mode, next_midi=next_midi)))
    return out


def estimate_key(notes: Sequence[Note] | Sequence[QuantizedNote], *, key_fifths: int | None = None) -> tuple[int, str]:
    """Key signature and mode of some notes: ``(fifths, "major"|"minor")``.

    Uses music21's Krumhansl–Schmuckler key finder on duration-weighted pitch classes
    (Krumhansl 1990). With ``key_fifths`` given (from a reference part) only the mode is
    chosen, between the major key and its relative minor.
    """
    from music21 import analysis, note, stream

    s = stream.Stream()
    for n in notes:
        dur = float(n.duration_quarters) if isinstance(n, QuantizedNote) else float(n.duration) * 2
        m = note.Note(int(n.pitch))
        m.quarterLength = max(min(dur, 8.0), 0.125)
        s.append(m)
    if len(s) == 0:
        return (int(key_fifths) if key_fifths is not None else 0), "major"
    ks = analysis.discrete.KrumhanslSchmuckler()
    solutions = ks.getSolution(s).alternateInterpretations + [ks.getSolution(s)]
    best = max(solutions, key=lambda k: k.correlationCoefficient)
    if key_fifths is None:
        fifths = int(best.sharps)
        if fifths > 6:
            fifths -= 12
        if fifths < -6:
            fifths += 12
        return fifths, str(best.mode)
    cands = [k for k in solutions if int(k.sharps) == int(key_fifths) and k.mode in ("major", "minor")]
    if not cands:
        return int(key_fifths), "major"
    return int(key_fifths), str(max(cands, key=lambda k: k.correlationCoefficient).mode)


# ---------------------------------------------------------------------------- hands and voices

_TENTH = 16  # semitones: a major tenth, about the widest comfortable hand span (common practice, no source)


def split_hands(notes: Sequence[QuantizedNote]) -> tuple[list[QuantizedNote], list[QuantizedNote]]:
    """Split piano notes between right and left hand with continuity.

    Greedy over onsets: for the notes starting together (sorted by pitch) every split
    point is scored by distance to each hand's running centre, the span of each hand
    with the notes it still holds (more than a tenth costs a lot), and a weak pull of
    the right hand above and the left hand below middle C. Centres follow the chosen
    assignment, so a line that wanders across middle C stays in one hand.

    Returns
    -------
    (right, left) : lists of QuantizedNote
    """
    right: list[QuantizedNote] = []
    left: list[QuantizedNote] = []
    if not notes:
        return right, left
    groups: dict[Fraction, list[QuantizedNote]] = {}
    for n in notes:
        groups.setdefault(n.onset_quarters, []).append(n)
    pitches = [n.pitch for n in notes]
    c_right = float(max(np.percentile(pitches, 75), 64))
    c_left = float(min(np.percentile(pitches, 25), 55))
    active_r: list[QuantizedNote] = []
    active_l: list[QuantizedNote] = []
    for onset in sorted(groups):
        group = sorted(groups[onset], key=lambda n: n.pitch)
        active_r = [n for n in active_r if n.offset_quarters > onset]
        active_l = [n for n in active_l if n.offset_quarters > onset]
        held_r = [n.pitch for n in active_r]
        held_l = [n.pitch for n in active_l]
        best = None
        for k in range(len(group) + 1):
            lh = [n.pitch for n in group[:k]]
            rh = [n.pitch for n in group[k:]]
            cost = sum(abs(p - c_left) for p in lh) + sum(abs(p - c_right) for p in rh)
            for hand, held in ((lh, held_l), (rh, held_r)):
                allp = hand + held if hand else []
                if allp:
                    span = max(allp) - min(allp)
                    cost += 20.0 * max(0, span - _TENTH)
                if len(hand) > 5:
                    cost += 50.0 * (len(hand) - 5)
            cost += sum(0.5 * max(0, p - 64) for p in lh) + sum(0.5 * max(0, 55 - p) for p in rh)
            # hands crossing held notes of the other hand
            if lh and held_r and max(lh) > min(held_r):
                cost += 10.0
            if rh and held_l and min(rh) < max(held_l):
                cost += 10.0
            if best is None or cost < best[0]:
                best = (cost, k)
        k = best[1]
        left.extend(group[:k])
        right.extend(group[k:])
        active_l.extend(group[:k])
        active_r.extend(group[k:])
        if k:
            c_left = 0.6 * c_left + 0.4 * float(np.mean([n.pitch for n in group[:k]]))
        if k < len(group):
            c_right = 0.6 * c_right + 0.4 * float(np.mean([n.pitch for n in group[k:]]))
        if c_right - c_left < 7:
            mid = (c_right + c_left) / 2
            c_right, c_left = mid + 3.5, mid - 3.5
    return right, left


def assign_voices(notes: Sequence[QuantizedNote], *, max_voices: int = 2) -> list[list[QuantizedNote]]:
    """Chords within a voice, a second voice where lines overlap in one staff.

    Notes that start and end together form a chord. Each chord goes to the first voice
    that is free at its onset (higher chords first). When every voice is busy, the voice
    that frees first is clipped at the new onset (legato overlap) -- or, if the busy chord
    starts at the same time, the new notes join it with its length.
    """
    chords: dict[tuple[Fraction, Fraction], list[QuantizedNote]] = {}
    for n in notes:
        chords.setdefault((n.onset_quarters, n.duration_quarters), []).append(n)
    order = sorted(chords, key=lambda k: (k[0], -max(n.pitch for n in chords[k])))
    voices: list[list[list[QuantizedNote]]] = []
    ends: list[Fraction] = []
    for k in order:
        onset = k[0]
        chord = chords[k]
        free = [v for v in range(len(voices)) if ends[v] <= onset]
        if free:
            v = free[0]
        elif len(voices) < max_voices:
            voices.append([])
            ends.append(Fraction(0))
            v = len(voices) - 1
        else:
            v = min(range(len(voices)), key=lambda i: ends[i])
            last = voices[v][-1]
            if last[0].onset_quarters < onset:
                clipped = [QuantizedNote(x.onset_quarters, onset - x.onset_quarters, x.pitch, x.velocity, x.source)
                           for x in last]
                voices[v][-1] = clipped
            else:
                length = last[0].duration_quarters
                merged = [x for x in last] + [
                    QuantizedNote(x.onset_quarters, length, x.pitch, x.velocity, x.source)
                    for x in chord if x.pitch not in {y.pitch for y in last}
                ]
                voices[v][-1] = merged
                continue
        voices[v].append(list(chord))
        ends[v] = onset + chord[0].duration_quarters
    return [[n for ch in voice for n in ch] for voice in voices]


# ---------------------------------------------------------------------------- notate


def notate(
    notes: Sequence[Note],
    *,
    reference: Any = None,
    alignment: Any = None,
    y: np.ndarray | None = None,
    sr: int | None = None,
    instrument_name: str = "Piano",
    part_name: str | None = None,
    midi_program: int = 0,
    grand_staff: bool | None = None,
    tempo: float | None = None,
    time_signature: object | None = None,
    key: tuple[int, str] | None = None,
    grid: str | None = None,
) -> Notation:
    """Quantize, spell and voice transcribed notes into a :class:`Notation`.

    Parameters
    ----------
    notes : sequence of Note
        Transcribed notes in take seconds.
    reference : takescribe.score.Reference, optional
        The written part: its bars, time signatures, tempo marks, key and names are used.
    alignment : takescribe.align.Alignment, optional
        Take ↔ score time map for ``reference`` (identity when None).
    y, sr : audio of the take, optional
        For beat tracking when there is no reference.
    instrument_name, part_name : str
        Names in the score (the reference's names win when given).
    midi_program : int
        General MIDI program 0..127 (the reference's wins when given).
    grand_staff : bool or None
        Two staves split by hand; None: True for the piano programs 0–7.
    tempo : float, optional
        Quarter notes per minute, overriding the estimate.
    time_signature : str or (int, int), optional
        Overrides the meter guess, e.g. ``"6/8"``.
    key : (int, str), optional
        ``(fifths, mode)``, overriding the reference and the estimate.
    grid : str, optional
        Force one quantization grid (a name of :data:`GRID_NAMES`).

    Returns
    -------
    Notation
    """
    notes = sort_notes(validate_notes(notes))
    if not notes:
        warnings.warn("no notes to notate: the score will hold empty bars", NotationWarning, stacklevel=2)
    if not isinstance(midi_program, (int, np.integer)) or not 0 <= int(midi_program) <= 127:
        raise InputError(f"midi_program must be a General MIDI program in range 0..127, got {midi_program!r}")
    if grid is not None and grid not in GRID_NAMES:
        raise InputError(f"grid {grid!r} is unknown; use one of {', '.join(GRID_NAMES)}")
    if reference is not None:
        last = max((n.offset for n in notes), default=0.0)
        beat_grid = grid_from_reference(reference, alignment, last_seconds=last)
        instrument_name = getattr(reference, "instrument_name", None) or instrument_name
        part_name = getattr(reference, "part_name", None) or part_name
        ref_prog = getattr(reference, "midi_program", None)
        if ref_prog is not None:
            midi_program = int(ref_prog)
    elif notes or y is not None:
        beat_grid = estimate_meter(y, sr, notes, tempo=tempo, time_signature=time_signature)
    else:
        ts = parse_time_signature(time_signature or "4/4")
        period = 60.0 / (tempo or 120.0) * float(_beat_of(*ts)[1])
        beat_grid = _grid_from_times(period * np.arange(8), num=ts[0], den=ts[1], downbeat_index=0)
    part_name = part_name or instrument_name
    qnotes = quantize(notes, beat_grid, subdivisions=grid)
    if key is not None:
        fifths, mode = int(key[0]), str(key[1])
        spell_pitch(60, key_fifths=fifths, mode=mode)  # validates
    elif reference is not None and getattr(reference, "mode", None) in ("major", "minor"):
        fifths, mode = int(reference.key_fifths), str(reference.mode)
    elif reference is not None and getattr(reference, "key_fifths", None) is not None:
        fifths, mode = estimate_key(qnotes, key_fifths=int(reference.key_fifths))
    else:
        fifths, mode = estimate_key(qnotes)
    if grand_staff is None:
        grand_staff = int(midi_program) in _PIANO_PROGRAMS
    def voiced(staff_notes):
        return tuple(tuple(spell_voice(v, key_fifths=fifths, mode=mode)) for v in assign_voices(staff_notes))

    if grand_staff:
        right, left = split_hands(qnotes)
        staves = (voiced(right), voiced(left))
        clefs = ("treble", "bass")
    else:
        staves = (voiced(qnotes),)
        median = float(np.median([n.pitch for n in qnotes])) if qnotes else 65.0
        clefs = ("treble" if median >= 57 else "bass",)
    return Notation(
        grid=beat_grid,
        key_fifths=fifths,
        key_mode=mode,
        staves=staves,
        clefs=clefs,
        part_name=str(part_name),
        instrument_name=str(instrument_name),
        midi_program=int(midi_program),
    )


# ---------------------------------------------------------------------------- music21 score

_PLAIN_VALUES = [Fraction(v) for v in ("4", "3", "2", "3/2", "1", "3/4", "1/2", "3/8", "1/4", "1/8")]
_TRIPLET_VALUES = [Fraction(4, 3), Fraction(2, 3), Fraction(1, 3), Fraction(1, 6), Fraction(1, 12)]


def _pieces(start: Fraction, end: Fraction, beat: Fraction) -> list[Fraction]:
    """Split ``[start, end)`` (quarters from the bar start) into lengths a reader expects.

    Beat-aligned spans take the longest plain values; spans that start or end inside a
    beat are cut at beat lines, then greedily into triplet values when an end lies on a
    triplet grid, else plain values (common practice, no source).
    """
    plain = sorted(_PLAIN_VALUES, reverse=True)
    triplet = sorted(_TRIPLET_VALUES, reverse=True)
    out: list[Fraction] = []
    pos = start
    while pos < end:
        if pos % beat == 0 and end - pos >= beat:
            span_end = pos + ((end - pos) // beat) * beat
        else:
            span_end = min(end, (pos // beat + 1) * beat)
        remaining = span_end - pos
        in_triplets = pos.denominator % 3 == 0 or span_end.denominator % 3 == 0
        for v in (triplet + plain) if in_triplets else (plain + triplet):
            if v <= remaining and _fits(remaining - v):
                break
        else:  # not a sum of our values (off-grid input): take what is left as is
            v = remaining
        out.append(v)
        pos += v
    return out


def _fits(x: Fraction) -> bool:
    """Can ``x`` be written as a sum of our values? (multiples of a 32nd or a 16th triplet)."""
    return (x / Fraction(1, 8)).denominator == 1 or (x / Fraction(1, 12)).denominator == 1


def _m21_pitch(n: QuantizedNote, fifths: int, mode: str):
    from music21 import pitch

    step, alter, octave = n.spelling or spell_pitch(n.pitch, key_fifths=fifths, mode=mode)
    p = pitch.Pitch()
    p.step = step
    p.octave = octave
    if alter:
        p.accidental = pitch.Accidental(alter)
    return p


def _voice_events(voice: Sequence[QuantizedNote]) -> list[tuple[Fraction, Fraction, list[QuantizedNote]]]:
    groups: dict[Fraction, list[QuantizedNote]] = {}
    for n in voice:
        groups.setdefault(n.onset_quarters, []).append(n)
    out = []
    for on in sorted(groups):
        chord = groups[on]
        out.append((on, max(n.duration_quarters for n in chord), chord))
    # no overlaps inside a voice (assign_voices guarantees it; keep it safe)
    for i in range(len(out) - 1):
        if out[i][0] + out[i][1] > out[i + 1][0]:
            out[i] = (out[i][0], out[i + 1][0] - out[i][0], out[i][2])
    return out


def _fill_measure(container, events, m_start: Fraction, m_len: Fraction, beat: Fraction,
                  fifths: int, mode: str) -> None:
    """Append notes, chords and rests of one voice for one bar, with ties."""
    from music21 import chord, duration, note, tie

    m_end = m_start + m_len
    pos = m_start
    items: list[tuple[Fraction, Fraction, list | None, bool, bool]] = []
    for on, dur, ch in events:
        off = on + dur
        if off <= m_start or on >= m_end:
            continue
        a, b = max(on, m_start), min(off, m_end)
        if a > pos:
            items.append((pos, a, None, False, False))
        items.append((a, b, ch, on < m_start, off > m_end))
        pos = b
    if pos < m_end:
        items.append((pos, m_end, None, False, False))
    for a, b, ch, tied_in, tied_out in items:
        lengths = _pieces(a - m_start, b - m_start, beat)
        for i, v in enumerate(lengths):
            d = duration.Duration(v)
            if ch is None:
                el = note.Rest()
                el.duration = d
            else:
                pitches = [_m21_pitch(n, fifths, mode) for n in sorted(ch, key=lambda n: n.pitch)]
                el = note.Note(pitches[0]) if len(pitches) == 1 else chord.Chord(pitches)
                el.duration = d
                vel = int(np.mean([n.velocity for n in ch]))
                el.volume.velocity = vel
                starts = tied_in or i > 0
                continues = tied_out or i < len(lengths) - 1
                if starts and continues:
                    el.tie = tie.Tie("continue")
                elif continues:
                    el.tie = tie.Tie("start")
                elif starts:
                    el.tie = tie.Tie("stop")
            container.append(el)


def to_music21(notation: Notation):
    """Build a music21 ``Score`` from a :class:`Notation` (a new one on every call).

    One ``Part`` (or two ``PartStaff`` in a brace ``StaffGroup`` for a grand staff, which
    music21 writes as one MusicXML part with two staves), bars from the grid, key and time
    signatures, a tempo mark, rests filled, ties over bar lines and beats, tuplet brackets.
    """
    from music21 import clef, duration, instrument, key, layout, meter, metadata, stream, tempo
    from music21.stream import makeNotation

    g = notation.grid
    bars = g.measures_until(max(notation.end_quarters(), Fraction(1, 1000)))
    score = stream.Score()
    score.metadata = metadata.Metadata()
    score.metadata.title = f"{notation.part_name} (draft)"
    score.metadata.movementName = score.metadata.title
    num0, den0 = g.time_signature_at(Fraction(0))
    first_number = 0 if bars[0][1] < Fraction(4 * num0, den0) else 1  # a pickup bar is bar 0
    parts = []
    for s, staff in enumerate(notation.staves):
        part = stream.PartStaff() if notation.grand_staff else stream.Part()
        inst = instrument.instrumentFromMidiProgram(int(notation.midi_program))
        inst = copy.deepcopy(inst)
        inst.instrumentName = notation.instrument_name
        inst.partName = notation.part_name
        inst.midiProgram = int(notation.midi_program)
        part.insert(0, inst)
        part.partName = notation.part_name
        voice_events = [_voice_events(v) for v in staff]
        last_ts = None
        for i, (m_start, m_len) in enumerate(bars):
            num, den = g.time_signature_at(m_start)
            _, beat = _beat_of(num, den)
            m = stream.Measure(number=i + first_number)
            if i == 0:
                m.insert(0, clef.TrebleClef() if notation.clefs[s] == "treble" else clef.BassClef())
                m.insert(0, key.Key(_tonic_name(notation.key_fifths, notation.key_mode), notation.key_mode))
            if (num, den) != last_ts:
                m.insert(0, meter.TimeSignature(f"{num}/{den}"))
                last_ts = (num, den)
            if s == 0:
                for q, bpm in g.tempo_marks:
                    if m_start <= q < m_start + m_len:
                        _, bq = _beat_of(*g.time_signature_at(q))
                        mm = tempo.MetronomeMark(number=round(float(bpm) / float(bq)),
                                                 referent=duration.Duration(bq))
                        m.insert(q - m_start, mm)
            full = Fraction(4 * num, den)
            if m_len < full:
                if i == 0:
                    m.paddingLeft = float(full - m_len)
                else:
                    m.paddingRight = float(full - m_len)
            used = [ev for ev in voice_events
                    if any(on < m_start + m_len and on + d > m_start for on, d, _ in ev)]
            if len(used) <= 1:
                _fill_measure(m, used[0] if used else [], m_start, m_len, beat,
                              notation.key_fifths, notation.key_mode)
                makeNotation.makeTupletBrackets(m, inPlace=True)
            else:
                for vi, ev in enumerate(used):
                    v = stream.Voice(id=str(vi + 1))
                    _fill_measure(v, ev, m_start, m_len, beat, notation.key_fifths, notation.key_mode)
                    makeNotation.makeTupletBrackets(v, inPlace=True)
                    m.insert(0, v)
            part.append(m)
        parts.append(part)
        score.insert(0, part)
    if notation.grand_staff:
        score.insert(0, layout.StaffGroup(parts, name=notation.part_name, symbol="brace", barTogether=True))
    return score


def _tonic_name(fifths: int, mode: str) -> str:
    letter, pc = _tonic_of(fifths, mode)
    natural = _LETTER_PC[letter]
    alter = ((pc - natural + 6) % 12) - 6
    name = _LETTERS[letter] + ("#" * alter if alter > 0 else "-" * (-alter))
    return name if mode == "major" else name.lower()


def musicxml_string(notation: Notation) -> str:
    """MusicXML 4.0 text of a :class:`Notation` (music21's exporter)."""
    from music21.musicxml.m21ToXml import GeneralObjectExporter

    score = to_music21(notation)
    data = GeneralObjectExporter(score).parse()
    return data.decode("utf-8")


def write_musicxml(
    notation: Notation | Sequence[Note],
    path: str | Path,
    *,
    force: bool = False,
    **notate_options: Any,
) -> Path:
    """Write a :class:`Notation` (or notes, notated first with ``notate_options``) as MusicXML 4.0.

    Parameters
    ----------
    notation : Notation or sequence of Note
        What to write; notes are passed to :func:`notate` with ``notate_options``
        (``reference``, ``instrument_name``, ``midi_program``, ``tempo``,
        ``time_signature``, ``key``, ``grid``...); unknown options raise ``TypeError``.
    path : path-like
        Destination ``.musicxml`` / ``.xml`` file (uncompressed).
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
    path = Path(path)
    if path.suffix.lower() == ".mxl":
        raise OutputError(f"{path}: compressed MusicXML is not written; use a .musicxml or .xml name")
    check_writable(path, force=force)
    if not isinstance(notation, Notation):
        notation = notate(notation, **notate_options)
    elif notate_options:
        raise TypeError(f"options {sorted(notate_options)} apply only when notes are given, not a Notation")
    text = musicxml_string(notation)
    if "<score-partwise" not in text:
        raise OutputError(f"{path}: music21 produced no partwise MusicXML; please report this")
    return write_text(path, text, force=force)
