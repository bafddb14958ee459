"""The beat grid: where beats fall in the take and where they sit in the score.

Conventions
-----------
- Times are seconds of the take; score positions are quarter notes (``*_quarters``) as
  :class:`fractions.Fraction`.
- ``bpm`` of a :class:`BeatGrid` counts *beats* per minute, a beat lasting
  ``beat_quarters`` quarters (a dotted quarter in 6/8).
- A reference part is anything with the attributes of
  :class:`takescribe.reference.part.Reference` used here (``time_signatures``,
  ``measure_starts``, ``tempo_map``, ``quarters_to_seconds``); an alignment is anything
  with ``score_to_take(seconds)`` or ``take_to_score(seconds)``.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from fractions import Fraction
from typing import Any

import numpy as np

from ..errors import InputError

__all__ = ["BeatGrid", "GRID_NAMES", "parse_time_signature", "validate_grid", "beat_of", "grid_from_times",
           "grid_from_reference", "score_to_take", "take_to_score", "interp_extrap"]

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

# a part's grid is extended past its last bar by at most this many beats without a take end
_EXTRA_BEATS = 24


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
        return interp_extrap(np.asarray(seconds, dtype=float), self.beat_times,
                              np.array([float(q) for q in self.beat_quarters_positions]))

    def quarters_to_seconds(self, quarters: np.ndarray) -> np.ndarray:
        """Map score quarters to take seconds (inverse of :meth:`seconds_to_quarters`)."""
        return interp_extrap(np.asarray(quarters, dtype=float),
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



def interp_extrap(x: np.ndarray, xp: np.ndarray, fp: np.ndarray) -> np.ndarray:
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


def beat_of(num: int, den: int) -> tuple[int, Fraction]:
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


def grid_from_times(times: np.ndarray, *, num: int, den: int, downbeat_index: int, tempo_marks=()) -> BeatGrid:
    bpb, beat_q = beat_of(num, den)
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



def _part_signatures(reference: Any) -> tuple[tuple, tuple]:
    """Time signatures (first at 0) and bar starts of a part, as Fractions."""
    for attr in ("time_signatures", "measure_starts", "quarters_to_seconds"):
        if not hasattr(reference, attr):
            raise TypeError(f"reference must look like takescribe.reference.part.Reference (missing {attr!r})")
    tsigs = tuple((Fraction(q).limit_denominator(48), int(n), int(d)) for q, n, d in reference.time_signatures)
    if not tsigs:
        tsigs = ((Fraction(0), 4, 4),)
    if tsigs[0][0] != 0:
        tsigs = ((Fraction(0), tsigs[0][1], tsigs[0][2]),) + tsigs
    starts = tuple(Fraction(q).limit_denominator(48) for q in reference.measure_starts) or (Fraction(0),)
    return tsigs, starts


def _part_beats(tsigs: tuple, starts: tuple) -> list[Fraction]:
    """Beat positions of the part's bars, per the time signature in force; a pickup bar's
    beats are counted back from its end so they line up with the meter."""
    positions: list[Fraction] = []
    tmp_grid = BeatGrid(np.array([0.0, 1.0]), (Fraction(0), Fraction(1)), tsigs, starts, 1, Fraction(1), 0, 60.0)
    for i, (s, length) in enumerate(tmp_grid.measures_until(starts[-1] + 1)):
        num, den = tmp_grid.time_signature_at(s)
        _, bq = beat_of(num, den)
        k = s + length % bq if i == 0 and length < Fraction(4 * num, den) else s
        while k < s + length:
            positions.append(k)
            k += bq
    return positions


def _extend_in_take_time(positions: list, take_seconds: np.ndarray, bq: Fraction,
                         last_seconds: float | None) -> tuple[list, np.ndarray]:
    """Beats past the part's end at the take's last pace, until ``last_seconds`` (a take
    that plays on after the part is notated on these beats), else for two bars."""
    period = float(np.median(np.diff(take_seconds[-9:]))) if len(take_seconds) > 1 else 0.5
    period = max(period, 1e-3)
    if last_seconds is None:
        n_extra = _EXTRA_BEATS
    else:
        n_extra = max(2, int(math.ceil((float(last_seconds) - take_seconds[-1]) / period)) + 2)
    extra_q = [positions[-1] + bq * (k + 1) for k in range(n_extra)]
    extra_t = take_seconds[-1] + period * np.arange(1, n_extra + 1)
    return positions + extra_q, np.concatenate([take_seconds, extra_t])


def grid_from_reference(reference: Any, alignment: Any = None, *, last_seconds: float | None = None) -> BeatGrid:
    """Beat grid of a reference part, mapped to take time through an alignment.

    Parameters
    ----------
    reference : takescribe.reference.part.Reference
        Written part: time signatures, bars, tempo map, ``quarters_to_seconds``.
    alignment : takescribe.alignment.align.Alignment, optional
        ``score_to_take`` (or ``take_to_score``, inverted numerically); identity when None.
    last_seconds : float, optional
        Extend the grid past the part, at the take's last pace, until this take time.

    Returns
    -------
    BeatGrid
        Bar lines where the part has them, then bars of the last time signature.
    """
    tsigs, starts = _part_signatures(reference)
    positions = _part_beats(tsigs, starts)
    score_seconds = np.array([float(reference.quarters_to_seconds(float(p))) for p in positions])
    take_seconds = score_to_take(alignment, score_seconds)
    keep = np.concatenate([[True], np.diff(take_seconds) > 1e-6])
    take_seconds = take_seconds[keep]
    positions = [p for p, k in zip(positions, keep) if k]
    _, bq_last = beat_of(tsigs[-1][1], tsigs[-1][2])
    positions, take_seconds = _extend_in_take_time(positions, take_seconds, bq_last, last_seconds)
    bpb, bq0 = beat_of(tsigs[0][1], tsigs[0][2])
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


def score_to_take(alignment: Any, seconds: np.ndarray) -> np.ndarray:
    """Take seconds of part seconds through an alignment (identity when None)."""
    if alignment is None:
        return np.asarray(seconds, dtype=float)
    if hasattr(alignment, "score_to_take"):
        return np.asarray(alignment.score_to_take(np.asarray(seconds, dtype=float)), dtype=float).reshape(-1)
    if hasattr(alignment, "take_to_score"):
        take = np.linspace(0.0, float(np.max(seconds)) * 3 + 10.0, 20000)
        score = np.maximum.accumulate(np.asarray(alignment.take_to_score(take), dtype=float))
        return np.interp(seconds, score, take)
    raise TypeError("alignment must have score_to_take(seconds) or take_to_score(seconds)")


def take_to_score(alignment: Any, seconds: np.ndarray) -> np.ndarray:
    """Part seconds of take seconds through an alignment (identity when None)."""
    if alignment is None:
        return np.asarray(seconds, dtype=float)
    if hasattr(alignment, "take_to_score"):
        return np.asarray(alignment.take_to_score(np.asarray(seconds, dtype=float)), dtype=float).reshape(-1)
    score = np.linspace(0.0, float(np.max(seconds)) * 3 + 10.0, 20000)
    take = np.maximum.accumulate(score_to_take(alignment, score))
    return np.interp(seconds, take, score)

