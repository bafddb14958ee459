"""Quantization: timed notes onto the score grid, and their written values.

Cost
----
For each beat and each candidate count ``s`` of grid steps per beat, the cost is
``sum(|error| / beat) + λ · complexity(s)`` over the onsets in the beat (measured offsets
count with weight 0.5), errors in beats. ``complexity`` is 0, 1, 2, 2, 3 for ``s`` = 1, 2,
3, 4, 6 (levels of subdivision a reader must parse; triplets cost as much as the next
plain level). ``λ = 0.05`` beat: a finer subdivision is chosen only when it moves the
events of the beat by more than a twentieth of a beat in total per level. Cases behind
the value: a lone off-beat onset costs 0.5 on the coarse grid and 0.05 on eighths, so
eighths; straight sixteenths cost two errors of 0.083 on sextuplets, so sixteenths; a 4 %
early off-beat still prefers eighths (0.09) to sixteenths (0.14).

A tuplet reading (a step that is no multiple of a 32nd) is taken only when at least
:attr:`~.settings.QuantizeSettings.triplet_min_onsets` onsets of the beat sit on its
off-plain points and it beats the best plain reading by
:attr:`~.settings.QuantizeSettings.triplet_margin`: the simple reading wins.

Written values (:func:`written_values`): a note lasts until the next onset of its staff,
unless a clear silence follows it (then it ends where it was heard to end, on the grid).
For sustaining instruments the measured offsets are trusted more (a shorter silence
counts as a rest), for struck and plucked ones less (their sound decays by itself).
"""

from __future__ import annotations

import math
from dataclasses import replace
from fractions import Fraction
from typing import Sequence

import numpy as np

from ..errors import InputError
from ..notes import Note, sort_notes, validate_notes
from .grid import GRID_NAMES, BeatGrid, validate_grid
from .model import QuantizedNote
from .settings import QUANTIZE, QuantizeSettings

__all__ = ["LAMBDA", "quantize", "written_values"]

#: Complexity weight λ in beats (see the module docstring and :class:`.settings.QuantizeSettings`).
LAMBDA = QUANTIZE.complexity_weight
_SHORTEST = QUANTIZE.shortest


def _is_tuplet(length: Fraction, count: int) -> bool:
    """A step of ``length / count`` quarters that no plain value (a multiple of a 32nd) writes."""
    return ((length / count) / Fraction(1, 8)).denominator != 1


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



class _Beats:
    """Beat index and span of score positions, extrapolated before and after the grid."""

    def __init__(self, grid: BeatGrid) -> None:
        self.positions = list(grid.beat_quarters_positions)
        self.pos_f = np.array([float(p) for p in self.positions])
        self.first_len = self.positions[1] - self.positions[0]
        self.last_len = self.positions[-1] - self.positions[-2]

    def index(self, q: float) -> int:
        if q < self.pos_f[0]:
            return int(math.floor((q - self.pos_f[0]) / float(self.first_len)))
        if q >= self.pos_f[-1]:
            return len(self.positions) - 1 + int(math.floor((q - self.pos_f[-1]) / float(self.last_len)))
        return int(np.searchsorted(self.pos_f, q, side="right")) - 1

    def span(self, k: int) -> tuple[Fraction, Fraction]:
        if k < 0:
            return self.positions[0] + k * self.first_len, self.first_len
        if k >= len(self.positions) - 1:
            return self.positions[-1] + (k - len(self.positions) + 1) * self.last_len, self.last_len
        return self.positions[k], self.positions[k + 1] - self.positions[k]


def _choose_count(events: list[tuple[float, float]], counts: list[int], length: Fraction, *,
                  lam: float, settings: QuantizeSettings) -> int:
    """Steps per beat for the events ``(position in beats, weight)`` of one beat."""
    def cost(s: int) -> float:
        err = sum(w * abs(x * s - round(x * s)) / s for x, w in events)
        return err + lam * settings.complexity.get(s, math.log2(s) + 1)

    plain = [s for s in counts if not _is_tuplet(length, s)]
    tuplet = [s for s in counts if _is_tuplet(length, s)]
    if not plain or not tuplet:
        return min(counts, key=lambda s: (cost(s), s))
    best_plain = min(plain, key=lambda s: (cost(s), s))
    best_tuplet = min(tuplet, key=lambda s: (cost(s), s))
    off_plain = 0
    for x, w in events:
        k = round(x * best_tuplet)
        point = length * Fraction(k, best_tuplet)
        near = abs(x * best_tuplet - k) / best_tuplet <= settings.tuplet_tolerance
        if w == 1.0 and near and (point / Fraction(1, 8)).denominator != 1:
            off_plain += 1
    if off_plain >= settings.triplet_min_onsets and cost(best_tuplet) + settings.triplet_margin < cost(best_plain):
        return best_tuplet
    return best_plain


def quantize(
    notes: Sequence[Note],
    grid: BeatGrid,
    *,
    subdivisions: object = None,
    lam: float = LAMBDA,
    measured_offsets: bool = True,
    settings: QuantizeSettings = QUANTIZE,
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
        per quarter beat; 1, 3, 6 per dotted-quarter beat), tuplets only by the rule of the
        module docstring. A name from :data:`GRID_NAMES` (``"16th"``, ``"8th-triplet"``...)
        forces one grid; a sequence of counts restricts the choice.
    lam : float
        Complexity weight λ in beats (see the module docstring).
    measured_offsets : bool
        Let the offsets weigh in the choice of subdivision (sustaining instruments).
    settings : QuantizeSettings

    Returns
    -------
    list of QuantizedNote
        Sorted by onset, then pitch. Each lasts at least one grid step and at least a
        32nd (its sounding length; see :func:`written_values`); same-pitch notes starting
        together are merged, and a note is cut where its pitch starts again.

    Examples
    --------
    >>> from takescribe.notes import Note
    >>> from takescribe.notation.grid import grid_from_times
    >>> g = grid_from_times(np.arange(8) * 0.5, num=4, den=4, downbeat_index=0)
    >>> [(q.onset_quarters, q.duration_quarters) for q in quantize([Note(0.26, 0.74, 60)], g)]
    [(Fraction(1, 2), Fraction(1, 1))]
    """
    notes = sort_notes(validate_notes(notes))
    validate_grid(grid)
    if not notes:
        return []
    on_q = grid.seconds_to_quarters(np.array([n.onset for n in notes]))
    off_q = grid.seconds_to_quarters(np.array([n.offset for n in notes]))
    beats = _Beats(grid)
    events: dict[int, list[tuple[float, float]]] = {}
    weighted = [(q, 1.0) for q in on_q] + ([(q, settings.offset_weight) for q in off_q] if measured_offsets else [])
    for q, w in weighted:
        k = beats.index(float(q))
        start, length = beats.span(k)
        events.setdefault(k, []).append(((float(q) - float(start)) / float(length), w))
    chosen = {k: _choose_count(evs, _candidate_counts(beats.span(k)[1], subdivisions), beats.span(k)[1],
                               lam=lam, settings=settings) for k, evs in events.items()}
    return _snap_notes(notes, on_q, off_q, beats, chosen, subdivisions)


def _snap_notes(notes, on_q, off_q, beats: _Beats, chosen: dict, subdivisions) -> list[QuantizedNote]:
    """Snap onsets and offsets to the chosen grid of their beat; merge and cut repeats."""
    def count(k: int) -> int:
        return chosen.get(k) or _candidate_counts(beats.span(k)[1], subdivisions)[0]

    def snap(q: float) -> Fraction:
        k = beats.index(q)
        start, length = beats.span(k)
        s = count(k)
        return start + Fraction(round((q - float(start)) / float(length) * s), s) * length

    def step_at(q: Fraction) -> Fraction:
        k = beats.index(float(q))
        return beats.span(k)[1] / count(k)

    out: dict[tuple[Fraction, int], QuantizedNote] = {}
    for n, a, b in zip(notes, on_q, off_q):
        on = max(snap(float(a)), Fraction(0))
        off = snap(float(b))
        shortest = max(step_at(on), _SHORTEST)
        if off - on < shortest:
            off = on + shortest
        qn = QuantizedNote(on, off - on, n.pitch, n.velocity, n)
        key = (on, n.pitch)
        if key not in out or out[key].duration_quarters < qn.duration_quarters:
            out[key] = qn
    return _cut_repeats(list(out.values()))


def _cut_repeats(notes: list[QuantizedNote]) -> list[QuantizedNote]:
    """One key cannot sound twice: a note is cut where the same pitch starts again."""
    # the longer of two notes of one pitch starting together stays (the one placed by a part)
    result = sorted(notes, key=lambda q: (q.pitch, q.onset_quarters, -q.duration_quarters))
    kept: list[QuantizedNote] = []
    for b in result:
        if kept and kept[-1].pitch == b.pitch and kept[-1].onset_quarters == b.onset_quarters:
            continue
        if kept and kept[-1].pitch == b.pitch and kept[-1].offset_quarters > b.onset_quarters:
            kept[-1] = replace(kept[-1], duration_quarters=b.onset_quarters - kept[-1].onset_quarters)
        kept.append(b)
    return sorted(kept, key=lambda q: (q.onset_quarters, q.pitch))


def written_values(notes: Sequence[QuantizedNote], grid: BeatGrid, *, measured_offsets: bool,
                   fixed: frozenset = frozenset(), settings: QuantizeSettings = QUANTIZE) -> list[QuantizedNote]:
    """Written lengths of the notes of one staff from musical intent, not sounding length.

    A note lasts until the first later onset of its staff that it does not clearly sound
    past (so a note held under moving ones keeps its length), unless a clear silence comes
    first: a gap of at least :attr:`~.settings.QuantizeSettings.rest_beats` beats
    (``rest_beats_decaying`` for struck and plucked sounds, whose measured end says little)
    after a sound that stopped within :attr:`~.settings.QuantizeSettings.rest_share` of the
    way. Then it keeps its sounding length on the grid. The last note keeps its sounding
    length, and so do the notes in ``fixed`` (placed by the part).
    """
    onsets = np.array(sorted({float(n.onset_quarters) for n in notes}))
    exact = {float(n.onset_quarters): n.onset_quarters for n in notes}
    beat = grid.beat_quarters
    rest_beats = settings.rest_beats if measured_offsets else settings.rest_beats_decaying
    out = []
    for n in notes:
        # the first later onset the note does not clearly sound past
        k = int(np.searchsorted(onsets, max(float(n.onset_quarters) + 1e-9,
                                            float(n.offset_quarters - settings.overlap_beats * beat)), side="left"))
        k += int(k < len(onsets) and onsets[k] <= float(n.onset_quarters))
        if k >= len(onsets) or n in fixed:
            out.append(n)
            continue
        nxt = exact[onsets[k]]
        ioi = nxt - n.onset_quarters
        gap = nxt - n.offset_quarters
        clear_rest = gap >= rest_beats * beat and n.duration_quarters <= settings.rest_share * ioi
        out.append(n if clear_rest else replace(n, duration_quarters=ioi))
    return _cut_repeats(out)
