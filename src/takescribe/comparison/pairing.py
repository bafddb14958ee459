"""Pairing part notes with played notes: maximum matchings, in time order, and stretches the
alignment misplaced."""

from __future__ import annotations

import numpy as np

from ..evaluation.metrics import match_notes
from .settings import TUNING, ComparisonTuning

__all__: list[str] = []


def match_pairs(ref_on, ref_off, ref_pitch, est_on, est_off, est_pitch, *, window: float, same_pitch: bool):
    """Maximum matching of two small note sets (indices local to the given arrays)."""
    if len(ref_on) == 0 or len(est_on) == 0:
        return []
    ref_intervals = np.column_stack([ref_on, np.maximum(ref_off, ref_on + 1e-3)])
    est_intervals = np.column_stack([est_on, np.maximum(est_off, est_on + 1e-3)])
    # shift both to non-negative times: predictions can fall just before 0
    shift = min(0.0, float(ref_intervals.min()), float(est_intervals.min()))
    ref_intervals = ref_intervals - shift
    est_intervals = est_intervals - shift
    pairs = match_notes(
        ref_intervals,
        np.asarray(ref_pitch, dtype=float),
        est_intervals,
        np.asarray(est_pitch, dtype=float),
        onset_tolerance=float(window),
        pitch_tolerance=50.0 if same_pitch else None,
        offset_ratio=None,
    )
    return [(int(i), int(j)) for i, j in pairs]


def uncross(pairs, ref_time, est_time, key):
    """Reorder pairs so that within each key group ref order follows played order.

    The maximum matching is indifferent to which of two equal-pitch notes pairs with which;
    pairing them in time order keeps every pair inside the window (exchange argument) and
    avoids two opposite timing errors where there are none.
    """
    groups: dict = {}
    for i, j in pairs:
        groups.setdefault(key(i, j), []).append((i, j))
    out = []
    for members in groups.values():
        refs = sorted((i for i, _ in members), key=lambda i: (ref_time[i], i))
        ests = sorted((j for _, j in members), key=lambda j: (est_time[j], j))
        out.extend(zip(refs, ests))
    return out


def same_pitch_pairs(ref_on, ref_off, ref_pitch, played_on, played_off, played_pitch, pool, refs, *, window):
    """Same-pitch matching of reference notes ``refs`` with played notes ``pool`` (global indices).

    After the maximum matching, each played note moves to the nearest free reference note of
    its pitch when that is closer (the matching only maximises the count), and notes freed
    that way get a second chance.
    """
    refs = np.asarray(refs, dtype=int)
    pool = np.asarray(pool, dtype=int)
    pairs = match_pairs(ref_on[refs], ref_off[refs], ref_pitch[refs], played_on[pool], played_off[pool],
                         played_pitch[pool], window=window, same_pitch=True)
    pairs = [(int(refs[i]), int(pool[j])) for i, j in pairs]
    pairs = uncross(pairs, ref_on, played_on, key=lambda i, j: ref_pitch[i])
    by_pitch: dict = {}
    for i in refs:
        by_pitch.setdefault(int(ref_pitch[i]), []).append(int(i))
    for _ in range(3):
        matched = {i for i, _ in pairs}
        changed = False
        for n, (i, j) in enumerate(pairs):
            best, best_distance = i, abs(ref_on[i] - played_on[j])
            for other in by_pitch.get(int(ref_pitch[i]), ()):
                distance = abs(ref_on[other] - played_on[j])
                if other not in matched and distance < best_distance - 1e-9:
                    best, best_distance = other, distance
            if best != i:
                matched.discard(i)
                matched.add(best)
                pairs[n] = (best, j)
                changed = True
        if not changed:
            break
    left_refs = np.array([i for i in refs if i not in {a for a, _ in pairs}], dtype=int)
    left_pool = np.array([j for j in pool if j not in {b for _, b in pairs}], dtype=int)
    if left_refs.size and left_pool.size:
        more = match_pairs(ref_on[left_refs], ref_off[left_refs], ref_pitch[left_refs], played_on[left_pool],
                            played_off[left_pool], played_pitch[left_pool], window=window, same_pitch=True)
        pairs += [(int(left_refs[i]), int(left_pool[j])) for i, j in more]
        pairs = uncross(pairs, ref_on, played_on, key=lambda i, j: ref_pitch[i])
    return pairs


def recover_stretches(part, predicted, played_on, played_pitch, pool, anchors, *, min_notes: int, slope: float,
                      tuning: ComparisonTuning = TUNING) -> list:
    """Anchors for stretches of the part that the alignment placed too far off.

    A stretch of at least ``min_notes`` consecutive reference notes without anchors (an
    unnoticed pause, a badly placed jump) is laid over the free played notes between the
    anchors around it at the overall pace (``slope`` take seconds per score second); the one
    time offset that lines up most of its notes with played notes of the same pitch places
    it, and the notes that then line up become anchors. The alignment's own placement
    inside the stretch is not used: it is what went wrong.
    """
    vote_tolerance = tuning.vote_tolerance
    anchored_refs = {i for i, _ in anchors}
    anchored_played = {j for _, j in anchors}
    free = np.array([j for j in pool if j not in anchored_played], dtype=int)
    if free.size == 0:
        return []
    anchor_s = np.array([part.onsets[i] for i, _ in anchors]) if anchors else np.zeros(0)
    anchor_t = np.array([played_on[j] for _, j in anchors]) if anchors else np.zeros(0)
    order = np.lexsort((part.pitches, part.onsets))
    stretches, current = [], []
    for i in order:
        if i in anchored_refs:
            if len(current) >= min_notes:
                stretches.append(current)
            current = []
        else:
            current.append(int(i))
    if len(current) >= min_notes:
        stretches.append(current)
    found = []
    taken: set = set()
    for stretch in stretches:
        s_first, s_last = part.onsets[stretch[0]], part.onsets[stretch[-1]]
        before = anchor_t[anchor_s < s_first - 1e-6]
        after = anchor_t[anchor_s > s_last + 1e-6]
        lo = before.max() if before.size else -np.inf
        hi = after.min() if after.size else np.inf
        window = free[(played_on[free] > lo) & (played_on[free] < hi)]
        candidates = []  # (ref, played, offset)
        for i in stretch:
            for j in window[played_pitch[window] == part.pitches[i]]:
                if j not in taken:
                    candidates.append((i, int(j), float(played_on[j] - slope * part.onsets[i])))
        if len(candidates) < min_notes:
            continue
        offsets = np.array([c[2] for c in candidates])
        best_count, best_offset = 0, 0.0
        for c in offsets:
            voters = {candidates[k][0] for k in np.flatnonzero(np.abs(offsets - c) <= vote_tolerance)}
            if len(voters) > best_count:
                best_count, best_offset = len(voters), float(c)
        if best_count < max(min_notes, int(np.ceil(tuning.majority * len(stretch)))):
            continue
        pairs: dict = {}
        for i, j, offset in candidates:
            if abs(offset - best_offset) <= vote_tolerance:
                if i not in pairs or abs(offset - best_offset) < abs(pairs[i][1] - best_offset):
                    pairs[i] = (j, offset)
        used_played: set = set()
        for i, (j, _) in sorted(pairs.items(), key=lambda item: part.onsets[item[0]]):
            if j not in used_played:
                found.append((i, j))
                used_played.add(j)
        taken |= used_played
    return found
