"""The player's own pulse: local tempo lines through the paired onset groups, and hesitations.

Onset groups (chords) of the part are placed in the take by a robust line (Siegel's repeated
median) through their neighbouring groups; a hesitation cuts the timing into segments.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np

from .part import Part
from .settings import TUNING, ComparisonTuning

__all__: list[str] = []


def robust_line(x: np.ndarray, y: np.ndarray, default_slope: float, *,
                tuning: ComparisonTuning = TUNING) -> tuple[float, float]:
    """Siegel's repeated-median line (breakdown point 50 %): one late or early note among
    its neighbours does not tilt the local tempo."""
    if len(x) == 0:
        return default_slope, 0.0
    slope = default_slope
    # fewer than four points: the overall pace is a safer slope than a line through them
    if len(np.unique(np.round(x, 6))) >= tuning.min_line_points:
        dx = x[None, :] - x[:, None]
        dy = y[None, :] - y[:, None]
        valid = np.abs(dx) > 1e-6
        per_point = []
        for k in range(len(x)):
            if np.any(valid[k]):
                per_point.append(float(np.median(dy[k, valid[k]] / dx[k, valid[k]])))
        if per_point:
            slope = float(np.median(per_point))
    # a local line steeper or flatter than four times the overall pace is not a tempo
    slope = float(np.clip(slope, default_slope / tuning.slope_limit, default_slope * tuning.slope_limit))
    intercept = float(np.median(y - slope * x))
    return slope, intercept


@dataclass
class TempoModel:
    group_scores: np.ndarray  # score seconds of each onset group with a pairing
    group_takes: np.ndarray  # median take onset of each group
    segment_of_group: np.ndarray
    segment_starts: list  # score seconds where each segment starts
    default_slope: float
    neighbours: int
    hesitations: list  # (group index, pause seconds, pause start take time)

    def segment_at(self, s: float) -> int:
        return int(np.searchsorted(np.asarray(self.segment_starts), s + 1e-9, side="right")) - 1

    def _around(self, s: float, exclude_group: int | None, segment: int | None = None, neighbours: int | None = None):
        """Groups of the segment of ``s`` (or ``segment``): up to ``neighbours`` before it, at it, after it."""
        seg = self.segment_at(s) if segment is None else segment
        n = self.neighbours if neighbours is None else neighbours
        members = np.flatnonzero(self.segment_of_group == seg)
        if exclude_group is not None:
            members = members[members != exclude_group]
        gs = self.group_scores[members]
        return (members[gs < s - 1e-9][-n:], members[np.abs(gs - s) <= 1e-9], members[gs > s + 1e-9][:n])

    def fit(self, s: float, *, exclude_group: int | None = None, segment: int | None = None,
            neighbours: int | None = None) -> tuple[float, float] | None:
        """Local line (slope, intercept) of take time against score time around ``s``."""
        before, at, after = self._around(s, exclude_group, segment, neighbours)
        chosen = np.concatenate([before, at, after])
        if chosen.size == 0:
            return None
        return robust_line(self.group_scores[chosen], self.group_takes[chosen], self.default_slope)

    def predict(self, s: float, *, exclude_group: int | None = None, fallback: float | None = None) -> float:
        line = self.fit(s, exclude_group=exclude_group)
        if line is None:
            return float(s * self.default_slope) if fallback is None else float(fallback)
        slope, intercept = line
        return slope * s + intercept

    def close_prediction(self, s: float, *, exclude_group: int | None = None, fit_tolerance: float) -> float | None:
        """The take time of ``s`` on a line through half as many neighbours (at least two a side).

        Rubato that swells and relaxes within a phrase bends the take's time line faster
        than the local line follows; a line through the nearest groups follows it. None where
        it has fewer than two groups on each side (the edges have their own reading), or where
        those groups stray more than ``fit_tolerance`` seconds from the line: that is no
        pulse but a jump (a rushed run that falls back into time), which the wider line reads.
        """
        n = max(2, self.neighbours // 2)
        before, _, after = self._around(s, exclude_group, neighbours=n)
        if before.size < 2 or after.size < 2:
            return None
        slope, intercept = self.fit(s, exclude_group=exclude_group, neighbours=n)
        chosen = np.concatenate([before, after])
        if np.max(np.abs(self.group_takes[chosen] - (slope * self.group_scores[chosen] + intercept))) > fit_tolerance:
            return None
        return slope * s + intercept

    def edge_prediction(self, s: float, *, exclude_group: int | None = None) -> float | None:
        """At the edge of a timing segment, the take time of ``s`` at the overall pace.

        There the local line is extrapolated from notes on one side only, so an error in
        its slope grows with the distance; this second reading keeps the intercept of the
        same notes but the overall pace. None away from an edge.
        """
        before, at, after = self._around(s, exclude_group)
        chosen = np.concatenate([before, after])
        if chosen.size == 0 or (before.size and after.size):
            return None
        x, y = self.group_scores[chosen], self.group_takes[chosen]
        return float(self.default_slope * s + np.median(y - self.default_slope * x))

    def predict_in_segment(self, s: float, segment: int) -> float:
        """Take time of score time ``s`` on the tempo line of another timing segment."""
        line = self.fit(s, segment=segment)
        if line is None:
            return self.predict(s)
        return line[0] * s + line[1]

    def slope(self, s: float) -> float:
        line = self.fit(s)
        return self.default_slope if line is None else line[0]


def tempo_model(
    score_on: np.ndarray,
    played_on: np.ndarray,
    pairs: Sequence[tuple[int, int]],
    *,
    breaks: Sequence[float],
    neighbours: int,
    hesitation_threshold: float,
    default_slope: float,
    tuning: ComparisonTuning = TUNING,
) -> TempoModel:
    by_group: dict = {}
    for i, j in pairs:
        by_group.setdefault(round(float(score_on[i]), 4), []).append(float(played_on[j]))
    gs = np.array(sorted(by_group), dtype=float)
    gt = np.array([float(np.median(by_group[s])) for s in gs], dtype=float)
    breaks = sorted(set(float(b) for b in breaks))
    starts = [-np.inf] + breaks

    def segments_for(starts_: list) -> np.ndarray:
        return np.searchsorted(np.asarray(starts_), gs + 1e-9, side="right") - 1

    # overall pace: median ratio of consecutive gaps within segments
    seg = segments_for(starts)
    ratios = []
    for k in range(1, len(gs)):
        if seg[k] == seg[k - 1] and gs[k] - gs[k - 1] > 1e-6:
            ratios.append((gt[k] - gt[k - 1]) / (gs[k] - gs[k - 1]))
    ratios = [r for r in ratios if r > 0]
    if ratios:
        default_slope = float(np.median(ratios))

    hesitations = []
    for k in range(1, len(gs)):
        seg = segments_for(starts)
        if seg[k] != seg[k - 1]:
            continue
        left = np.flatnonzero((seg == seg[k]) & (np.arange(len(gs)) < k))[-neighbours:]
        slope, intercept = robust_line(gs[left], gt[left], default_slope, tuning=tuning)
        pred_k = slope * gs[k] + intercept
        shift_k = gt[k] - pred_k
        expected_gap = slope * (gs[k] - gs[k - 1])
        if shift_k <= max(hesitation_threshold, tuning.hesitation_gap_share * expected_gap):
            continue
        if k + 1 >= len(gs) or seg[k + 1] != seg[k]:
            continue  # nothing after it to show that the delay persists: judged as late
        shift_next = gt[k + 1] - (slope * gs[k + 1] + intercept)
        if shift_next < tuning.hesitation_persist * shift_k:
            continue  # one late note, the music went on at the old place
        pause_start = float(pred_k)
        hesitations.append((k, float(shift_k), pause_start))
        starts = sorted(starts + [float(gs[k]) - 1e-3])
    seg = segments_for(starts)
    return TempoModel(gs, gt, seg, starts, default_slope, neighbours, hesitations)




def overall_slope(score_on: np.ndarray, take_on: np.ndarray) -> float:
    """Median take seconds per score second between consecutive onsets (pauses and jumps aside)."""
    order = np.argsort(score_on, kind="stable")
    ds, dt = np.diff(score_on[order]), np.diff(take_on[order])
    ratios = dt[ds > 1e-6] / ds[ds > 1e-6]
    ratios = ratios[np.isfinite(ratios) & (ratios > 0)]
    return float(np.median(ratios)) if ratios.size else 1.0


def take_to_score(model: TempoModel, t: float) -> float:
    """Score seconds at take time ``t`` through the nearest group's local line."""
    if len(model.group_takes) == 0:
        return float(t / model.default_slope)
    k = int(np.argmin(np.abs(model.group_takes - t)))
    s = float(model.group_scores[k])
    slope, intercept = model.fit(s) or (model.default_slope, float(model.group_takes[k] - model.default_slope * s))
    return float((t - intercept) / slope) if slope > 0 else s


def tempo_curve(part: Part, model: TempoModel, *, tuning: ComparisonTuning = TUNING) -> list[dict]:
    """Take seconds per quarter note, one sample per measure of the part."""
    if len(part.onsets) < 2 or len(model.group_scores) == 0:
        return []
    order = np.argsort(part.onsets, kind="stable")
    s_sorted, q_sorted = part.onsets[order], part.quarters[order]
    curve = []
    for m, s in sorted(part.measure_starts.items()):
        # sample the middle of the bar's notes
        sel = part.measures == m
        s_mid = float(np.median(part.onsets[sel])) if np.any(sel) else float(s)
        score_seconds_per_quarter = _local_rate(s_sorted, q_sorted, s_mid, reach=tuning.rate_reach)
        take_per_score = model.slope(s_mid)
        seconds_per_beat = take_per_score * score_seconds_per_quarter
        if not np.isfinite(seconds_per_beat) or seconds_per_beat <= 0:
            continue
        curve.append({
            "measure": int(m),
            "score_quarters": round(float(np.interp(s, s_sorted, q_sorted)), 4),
            "take_time": round(float(model.predict(float(s))), 4),
            "seconds_per_beat": round(float(seconds_per_beat), 4),
            "beats_per_minute": round(60.0 / float(seconds_per_beat), 2),
        })
    return curve


def _local_rate(s_sorted: np.ndarray, q_sorted: np.ndarray, s: float, *, reach: int) -> float:
    """Score seconds per quarter note around score time ``s``."""
    k = int(np.searchsorted(s_sorted, s))
    lo, hi = max(k - reach, 0), min(k + reach, len(s_sorted) - 1)
    dq = q_sorted[hi] - q_sorted[lo]
    ds = s_sorted[hi] - s_sorted[lo]
    if dq <= 0 or ds <= 0:
        dq, ds = q_sorted[-1] - q_sorted[0], s_sorted[-1] - s_sorted[0]
    return float(ds / dq) if dq > 0 else 0.5
