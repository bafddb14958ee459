"""The draft with the part given: the part, with the player's deviations in it.

A played note that belongs to a note of the part (same pitch, close in time after the
alignment) is written with the part's position, written length, staff and spelling: the
player's intent is the part. A played note of another pitch in the place of a part note
that was not played (a wrong note) takes that note's place and length with its own pitch.
Other played notes (added notes) are quantized on the grid. Part notes nobody was heard
to play are left out; where the part sounds on through them, the note before lasts until
the next played note of its staff (a missed note is not a rest the part lacks), elsewhere
the part's own silence is a rest. A sustaining note stopped well before its written end
keeps the length it was heard to have.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from fractions import Fraction
from typing import Any, Sequence

import numpy as np

from ..notes import Note
from .grid import BeatGrid, score_to_take
from .model import QuantizedNote
from .settings import PART_DRAFT, PartDraftSettings

__all__ = ["PartMatch", "match_part", "part_end_quarters"]

# score positions of a part are read with this many divisions of a quarter at most
# (48 holds 32nd notes, triplets and sextuplets exactly)
_DIVISIONS = 48


@dataclass(frozen=True)
class PartMatch:
    """Played notes placed by the part, and those left for quantization.

    Attributes
    ----------
    placed : tuple of (QuantizedNote, int)
        Notes with the part's values and the part's staff (1 = top).
    unplaced : tuple of Note
        Played notes no part note accounts for.
    """

    placed: tuple
    unplaced: tuple


def part_end_quarters(reference: Any) -> Fraction:
    """End of the part's last bar in quarters (0 when unknown)."""
    starts = getattr(reference, "measure_starts", ())
    return Fraction(starts[-1]).limit_denominator(_DIVISIONS) if starts else Fraction(0)


def _pairs(played_on: np.ndarray, played_pitch: np.ndarray, part_on: np.ndarray, part_pitch: np.ndarray,
           window: float, *, same_pitch: bool) -> list[tuple[float, int, int]]:
    """Candidate ``(cost, played index, part index)`` within ``window`` seconds."""
    order = np.argsort(part_on)
    sorted_on = part_on[order]
    out = []
    for i, (t, p) in enumerate(zip(played_on, played_pitch)):
        lo, hi = np.searchsorted(sorted_on, [t - window, t + window])
        for j in order[lo:hi]:
            if same_pitch and part_pitch[j] != p:
                continue
            cost = abs(part_on[j] - t) + (0 if same_pitch else 0.01 * abs(int(part_pitch[j]) - int(p)))
            out.append((cost, i, int(j)))
    return out


def _greedy(pairs: list, used_played: set, used_part: set) -> dict[int, int]:
    """One-to-one matching, closest pairs first."""
    out: dict[int, int] = {}
    for _, i, j in sorted(pairs):
        if i in used_played or j in used_part:
            continue
        out[i] = j
        used_played.add(i)
        used_part.add(j)
    return out


def _held_length(note: Note, onset_q: Fraction, written: Fraction, grid: BeatGrid) -> Fraction:
    """Written length, or the heard one on a quarter-beat grid when clearly shorter."""
    off_q = float(grid.seconds_to_quarters(np.array([note.offset]))[0])
    step = grid.beat_quarters / 4
    heard = max(step, Fraction(round((off_q - float(onset_q)) / float(step))) * step)
    return heard if heard < written else written


def match_part(notes: Sequence[Note], reference: Any, alignment: Any, grid: BeatGrid, *,
               measured_offsets: bool, settings: PartDraftSettings = PART_DRAFT) -> PartMatch:
    """Give played notes the values of the part notes they stand for (see the module docstring)."""
    part = list(getattr(reference, "notes", ()) or ())
    if not part or not notes:
        return PartMatch((), tuple(notes))
    played_on = np.array([n.onset for n in notes])
    played_pitch = np.array([n.pitch for n in notes])
    part_on = score_to_take(alignment, np.array([sn.onset for sn in part], dtype=float))
    part_pitch = np.array([sn.pitch for sn in part])
    used_played: set = set()
    used_part: set = set()
    window = settings.match_window
    match = _greedy(_pairs(played_on, played_pitch, part_on, part_pitch, window, same_pitch=True),
                    used_played, used_part)
    if settings.wrong_notes_take_place:
        rest = [i for i in range(len(notes)) if i not in used_played]
        free = np.array([j not in used_part for j in range(len(part))])
        pairs = [(c, rest[i], j) for c, i, j in _pairs(played_on[rest], played_pitch[rest], part_on, part_pitch,
                                                      window / 2, same_pitch=False) if free[j]]
        match.update(_greedy(pairs, used_played, used_part))
    placed, heard_short = [], set()
    for i, j in sorted(match.items()):
        sn, n = part[j], notes[i]
        onset = Fraction(sn.onset_quarters).limit_denominator(_DIVISIONS)
        written = Fraction(sn.duration_quarters).limit_denominator(_DIVISIONS)
        length = written
        if measured_offsets and n.duration < settings.held_short_share * (sn.offset - sn.onset):
            length = _held_length(n, onset, written, grid)
            heard_short.add(len(placed))
        placed.append((QuantizedNote(onset, length, int(n.pitch), int(n.velocity), n), int(sn.staff)))
    if settings.bridge_unheard and len(match) < len(part):
        placed = _bridge_unheard(placed, part, keep=heard_short)
    unplaced = tuple(n for i, n in enumerate(notes) if i not in used_played)
    return PartMatch(tuple(placed), unplaced)


def _sounding_spans(part: list, staff: int) -> list[tuple[Fraction, Fraction]]:
    """Where the part's ``staff`` sounds, as merged ``(start, end)`` spans in quarters."""
    spans: list[list[Fraction]] = []
    for start, end in sorted((Fraction(sn.onset_quarters).limit_denominator(_DIVISIONS),
                              Fraction(sn.onset_quarters + sn.duration_quarters).limit_denominator(_DIVISIONS))
                             for sn in part if int(sn.staff) == staff and not getattr(sn, "is_grace", False)):
        if spans and start <= spans[-1][1]:
            spans[-1][1] = max(spans[-1][1], end)
        else:
            spans.append([start, end])
    return [(a, b) for a, b in spans]


def _bridge_unheard(placed: list, part: list, *, keep: set) -> list:
    """Lengthen a placed note to the next placed onset of its staff where the part sounds
    on through the gap (part notes not found in the take); notes in ``keep`` (heard short) stay."""
    out = list(placed)
    for staff in sorted({s for _, s in placed}):
        spans = _sounding_spans(part, staff)
        idx = sorted((k for k, (_, s) in enumerate(placed) if s == staff), key=lambda k: placed[k][0].onset_quarters)
        onsets = sorted({placed[k][0].onset_quarters for k in idx})
        for k in idx:
            if k in keep:
                continue
            q = placed[k][0]
            end = q.onset_quarters + q.duration_quarters
            later = [o for o in onsets if o > q.onset_quarters]
            if not later or later[0] <= end:
                continue
            if any(a <= end and later[0] <= b for a, b in spans):
                out[k] = (replace(q, duration_quarters=later[0] - q.onset_quarters), staff)
    return out
