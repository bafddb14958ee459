"""The reference part and the alignment as the comparison reads them (arrays, one unit each)."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable

import numpy as np

from ..errors import InputError

__all__: list[str] = []


@dataclass(frozen=True)
class Part:
    """The reference as arrays (one name and unit per quantity)."""

    onsets: np.ndarray  # score seconds at the written tempo
    offsets: np.ndarray
    pitches: np.ndarray  # MIDI
    quarters: np.ndarray  # onset in quarter notes
    measures: np.ndarray  # int, -1 when unknown
    beats: np.ndarray  # float, nan when unknown
    measure_position: Callable[[float], tuple[int | None, float | None]]
    measure_starts: dict  # measure -> score seconds
    measure_end: float  # score seconds where the last bar ends
    measure_labels: tuple  # printed bar number of each bar (performance order), may be empty

    def label(self, measure: int | None) -> str | None:
        if measure is None:
            return None
        if 1 <= measure <= len(self.measure_labels) and self.measure_labels[measure - 1]:
            return self.measure_labels[measure - 1]
        return str(measure)

    def where(self, i: int) -> dict:
        """Measure, beat and printed label of part note ``i``."""
        m = int(self.measures[i]) if self.measures[i] >= 0 else None
        b = round(float(self.beats[i]), 3) if np.isfinite(self.beats[i]) else None
        if m is None:
            m, b = self.measure_position(float(self.onsets[i]))
        return {"measure": m, "beat": b, "measure_label": self.label(m)}


def part_from_reference(reference: Any, *, transpose_semitones: int = 0) -> Part:
    """The part's notes as arrays, ``transpose_semitones`` added to every pitch."""
    notes = getattr(reference, "notes", None)
    if notes is None:
        raise TypeError(f"reference must have a .notes sequence (takescribe.score.Reference), got {type(reference).__name__}")
    notes = list(notes)
    n = len(notes)
    onsets = np.array([float(x.onset) for x in notes], dtype=float)
    offsets = np.array([float(x.offset) for x in notes], dtype=float)
    pitches = np.array([int(x.pitch) for x in notes], dtype=int) + int(transpose_semitones)
    if n and (np.any(~np.isfinite(onsets)) or np.any(offsets < onsets)):
        raise InputError("reference notes must have finite onsets and offsets after their onsets (seconds)")
    quarters = np.array([float(getattr(x, "onset_quarters", np.nan)) for x in notes], dtype=float)
    if n and np.any(~np.isfinite(quarters)):
        quarters = onsets * 2.0  # written tempo unknown: 120 quarter notes per minute
    measures = np.array([int(getattr(x, "measure", -1) if getattr(x, "measure", None) is not None else -1) for x in notes])
    beats = np.array([float(getattr(x, "beat", np.nan) if getattr(x, "beat", None) is not None else np.nan) for x in notes])
    measure_position = _measure_position_function(reference, onsets, quarters, measures, beats)
    measure_starts, measure_end = _measure_starts(reference, onsets, offsets, quarters, measures, beats)
    labels = tuple(str(x) for x in getattr(reference, "measure_labels", ()) or ())
    return Part(onsets, offsets, pitches, quarters, measures, beats, measure_position, measure_starts,
                measure_end, labels)


def _seconds_to_quarters_function(onsets: np.ndarray, quarters: np.ndarray) -> Callable[[float], float]:
    """Quarter position of score seconds from the notes' own positions (extrapolated at the part's rate)."""
    n = len(onsets)
    order = np.argsort(onsets, kind="stable")
    s_sorted, q_sorted = onsets[order], quarters[order]

    def seconds_to_quarters(s: float) -> float:
        if n == 0:
            return 2.0 * s
        if n == 1 or s_sorted[-1] == s_sorted[0]:
            return float(q_sorted[0] + 2.0 * (s - s_sorted[0]))
        if s <= s_sorted[0] or s >= s_sorted[-1]:
            # extrapolate at the overall rate of the part
            rate = (q_sorted[-1] - q_sorted[0]) / (s_sorted[-1] - s_sorted[0])
            ref_s, ref_q = (s_sorted[0], q_sorted[0]) if s <= s_sorted[0] else (s_sorted[-1], q_sorted[-1])
            return float(ref_q + rate * (s - ref_s))
        return float(np.interp(s, s_sorted, q_sorted))

    return seconds_to_quarters


def _measure_position_function(reference: Any, onsets, quarters, measures, beats):
    """``measure_position(s) -> (measure, beat)`` from the reference's own methods, else the notes'."""
    n = len(onsets)
    order = np.argsort(onsets, kind="stable")
    s_sorted = onsets[order]
    seconds_to_quarters = _seconds_to_quarters_function(onsets, quarters)
    measure_beat = getattr(reference, "measure_beat", None)
    own_seconds_to_quarters = getattr(reference, "seconds_to_quarters", None)

    def measure_position(s: float) -> tuple[int | None, float | None]:
        if n == 0:
            return None, None
        q = None
        if callable(own_seconds_to_quarters):
            try:
                q = float(own_seconds_to_quarters(float(s)))
            except Exception:  # noqa: BLE001 - fall back to the notes' own positions
                q = None
        if q is None:
            q = seconds_to_quarters(s)
        if callable(measure_beat):
            try:
                m, b = measure_beat(q)
                return int(m), round(float(b), 2)
            except Exception:  # noqa: BLE001 - fall back to the notes' own positions
                pass
        # nearest note at or before s: same measure, beat advanced by the quarters elapsed
        k = int(np.searchsorted(s_sorted, s + 1e-9, side="right")) - 1
        k = max(k, 0)
        i = order[k]
        if measures[i] < 0:
            return None, None
        beat = beats[i] + (q - quarters[i]) if np.isfinite(beats[i]) else None
        return int(measures[i]), (None if beat is None else round(float(beat), 2))

    return measure_position


def _measure_starts(reference: Any, onsets, offsets, quarters, measures, beats) -> tuple[dict, float]:
    """Measure number -> score seconds where it starts, and where the last bar ends."""
    n = len(onsets)
    order = np.argsort(onsets, kind="stable")
    s_sorted, q_sorted = onsets[order], quarters[order]
    measure_starts: dict = {}
    starts = getattr(reference, "measure_starts", None)
    to_seconds = getattr(reference, "quarters_to_seconds", None)
    measure_end = None
    if starts is not None and callable(to_seconds) and len(starts) >= 2:
        try:
            # takescribe.score: quarter position of each bar (1-based, performance order), plus the end
            starts = [float(q) for q in starts]
            for m, q in enumerate(starts[:-1], start=1):
                measure_starts[m] = float(to_seconds(q))
            measure_end = float(to_seconds(starts[-1]))
        except Exception:  # noqa: BLE001 - fall back below
            measure_starts = {}
    if not measure_starts:
        for m in sorted(set(int(x) for x in measures if x >= 0)):
            sel = measures == m
            # the first note of the measure, moved back by its beat (beats counted from 1)
            k = np.flatnonzero(sel)[np.argmin(onsets[sel])]
            start = onsets[k]
            if np.isfinite(beats[k]) and len(s_sorted) > 1:
                q0 = quarters[k] - (beats[k] - 1.0)
                start = float(np.interp(q0, q_sorted, s_sorted, left=s_sorted[0] - (quarters[k] - q0) * 0.5))
            measure_starts[m] = float(start)
    if measure_end is None:
        measure_end = float(offsets.max()) if n else 0.0
    return measure_starts, measure_end


def score_to_take_function(alignment: Any) -> Callable[[np.ndarray], np.ndarray]:
    """Vectorised score seconds -> take seconds of an alignment (identity without one)."""
    if alignment is None:
        return lambda s: np.asarray(s, dtype=float)
    f = getattr(alignment, "score_to_take", None)
    if not callable(f):
        raise TypeError(f"alignment must have a score_to_take(t) method (takescribe.align.Alignment), got {type(alignment).__name__}")

    def mapped(s: np.ndarray) -> np.ndarray:
        s = np.asarray(s, dtype=float)
        try:
            out = np.asarray(f(s), dtype=float)
            if out.shape == s.shape:
                return out
        except Exception:  # noqa: BLE001 - scalar-only implementations
            pass
        return np.array([float(f(float(x))) for x in s.ravel()]).reshape(s.shape)

    return mapped
