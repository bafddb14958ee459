"""Restarts: a run of unmatched played notes that repeats, with one time shift, notes matched
elsewhere in the take is a second attempt at the same bars.

Both attempts must be heard; a run that holds notes matched further on is a repeated motif,
not a restart. The earlier attempt is the left-off one.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .part import Part
from .settings import TUNING, ComparisonTuning

__all__: list[str] = []


@dataclass
class Restart:
    abandoned: list  # played indices
    resumed_pairs: list  # (ref, played) of the later attempt to use as anchors
    dropped_pairs: list  # (ref, played) of the earlier attempt to drop from the anchors
    voter_pairs: list  # (ref, played) of the run that repeats the part
    abandoned_refs: dict  # played index of the left-off attempt -> reference note it played
    to_ref: int  # first reference note of the resumed attempt
    from_ref: int  # last reference note reached in the abandoned attempt
    from_time: float
    to_time: float


@dataclass
class _Attempts:
    """The two attempts of one candidate restart, as found so far."""

    refs: list  # reference notes heard twice
    voter_pairs: list
    resumed: list
    dropped: list
    earlier_start: float
    later_start: float
    head: int  # earliest reference note heard twice


def _unmatched_runs(played_on: np.ndarray, matched_ref_of: dict, ignore: set) -> list[list[int]]:
    """Runs of unmatched played notes (in take order), tolerating one matched note inside."""
    order = np.argsort(played_on, kind="stable")
    runs, current, matched_streak = [], [], 0
    for j in order:
        if j in ignore:
            continue
        if j in matched_ref_of:
            matched_streak += 1
            if matched_streak >= 2 and current:
                runs.append(current)
                current = []
            continue
        matched_streak = 0
        current.append(int(j))
    if current:
        runs.append(current)
    return runs


def _vote_shift(run, part, played_on, played_pitch, partner_of_ref, used, *, min_restart_notes, tuning):
    """The one time shift most notes of ``run`` share with their partners; (voter_pairs, shift) or None."""
    vote_tolerance = tuning.vote_tolerance
    candidates = []  # (j, i, shift)
    for j in run:
        for i in np.flatnonzero(part.pitches == played_pitch[j]):
            if i not in partner_of_ref:
                continue  # a restart needs the other attempt in the take, not just a shifted run
            shift = float(played_on[j] - played_on[partner_of_ref[i]])
            if abs(shift) >= tuning.min_restart_shift:
                candidates.append((j, int(i), shift))
    if not candidates:
        return None
    shifts = np.array([c[2] for c in candidates])
    best_count, best_shift = 0, 0.0
    for c in shifts:
        voters = {candidates[k][0] for k in np.flatnonzero(np.abs(shifts - c) <= vote_tolerance)}
        if len(voters) > best_count or (len(voters) == best_count and abs(c) < abs(best_shift)):
            best_count, best_shift = len(voters), float(c)
    if best_count < max(min_restart_notes, int(np.ceil(tuning.majority * len(run)))):
        return None
    close = np.abs(shifts - best_shift) <= vote_tolerance
    best_shift = float(np.median(shifts[close]))
    votes: dict = {}
    for k in np.flatnonzero(np.abs(shifts - best_shift) <= vote_tolerance):
        j, i, shift = candidates[k]
        if i in used:
            continue
        if j not in votes or abs(shift - best_shift) < abs(votes[j][1] - best_shift):
            votes[j] = (i, shift)
    # one reference note per voter
    seen_ref: dict = {}
    for j, (i, shift) in votes.items():
        if i not in seen_ref or abs(shift - best_shift) < abs(votes[seen_ref[i]][1] - best_shift):
            seen_ref[i] = j
    voter_pairs = [(i, j) for i, j in seen_ref.items()]
    if len(voter_pairs) < min_restart_notes:
        return None
    return voter_pairs, best_shift


def _attempts(voter_pairs, best_shift, part, played_on, partner_of_ref) -> _Attempts:
    refs = [i for i, _ in voter_pairs]
    run_times = [played_on[j] for _, j in voter_pairs]
    partner_times = [played_on[partner_of_ref[i]] for i in refs]
    if best_shift < 0:  # the run came first: it is the abandoned attempt
        earlier_start, later_start = min(run_times), min(partner_times)
        resumed, dropped = [], []
    else:  # the run is the second attempt; the anchors there were the abandoned one
        earlier_start, later_start = min(partner_times), min(run_times)
        resumed = voter_pairs
        dropped = [(i, partner_of_ref[i]) for i in refs if i in partner_of_ref]
    head = min(refs, key=lambda i: part.onsets[i])
    return _Attempts(refs, voter_pairs, resumed, dropped, float(earlier_start), float(later_start), head)


def _extend_head(found: _Attempts, gap, part, played_on, played_pitch, matched_ref_of, partner_of_ref, used,
                 ignore, *, min_restart_notes, slope, tuning) -> None:
    """Walk back through the part while a note is heard twice, ``gap`` apart, just before the
    attempts as found so far: the first notes of the repeated stretch may have paired across
    the two attempts."""
    vote_tolerance = tuning.vote_tolerance
    voters_refs = set(found.refs)
    score_order = [int(i) for i in np.lexsort((part.pitches, part.onsets))]
    first = min(score_order.index(i) for i in found.refs)
    for position in range(first - 1, max(first - tuning.restart_walk_back * min_restart_notes, -1), -1):
        i = score_order[position]
        if i in used or i in voters_refs:
            continue
        same = np.flatnonzero((played_pitch == part.pitches[i]) & ~np.isin(np.arange(len(played_on)), list(ignore)))
        # where the later attempt would have played it, at the overall pace
        due = found.later_start - slope * (part.onsets[found.head] - part.onsets[i])
        later = [j for j in same if abs(played_on[j] - due) <= 2.0 * vote_tolerance and played_on[j] < found.later_start
                 and (j not in matched_ref_of or matched_ref_of[j] == i)]
        pair = None
        for j_later in sorted(later, key=lambda j: -played_on[j]):
            earlier = [j for j in same if abs(played_on[j_later] - played_on[j] - gap) <= vote_tolerance]
            if earlier:
                pair = (min(earlier, key=lambda j: abs(played_on[j_later] - played_on[j] - gap)), int(j_later))
                break
        if pair is None:
            break
        j_earlier, j_later = pair
        found.earlier_start = min(found.earlier_start, played_on[j_earlier])
        found.later_start = min(found.later_start, played_on[j_later])
        voters_refs.add(i)
        found.refs.append(i)
        if part.onsets[i] < part.onsets[found.head]:
            found.head = i
        found.resumed = [p for p in found.resumed if p[0] != i] + [(i, j_later)]
        if i in partner_of_ref and partner_of_ref[i] != j_later:
            found.dropped = [p for p in found.dropped if p[0] != i] + [(i, partner_of_ref[i])]


def _stop_time(abandoned, ref_of_played, from_ref, part, played_on, played_off, played_pitch, *, slope, tuning):
    """Where the left-off attempt stopped: the end of the written value of its last note, at the
    overall pace (a release just before the bar line is still "the end of the bar")."""
    last_played = max(abandoned, key=lambda j: (played_on[j], played_off[j]))
    last_ref = ref_of_played.get(last_played)
    if last_ref is None:
        # the note the player stopped on: its pitch at or just after the last repeated note
        after = [i for i in np.flatnonzero(part.pitches == played_pitch[last_played])
                 if part.onsets[from_ref] - 1e-6 <= part.onsets[i] <= part.onsets[from_ref] + tuning.stopped_note_reach]
        last_ref = min(after, key=lambda i: part.onsets[i]) if after else None
    written_end = played_off[last_played]
    if last_ref is not None:
        written_end = played_on[last_played] + slope * (part.offsets[last_ref] - part.onsets[last_ref])
    return written_end


def find_restarts(
    part: Part,
    played_on: np.ndarray,
    played_off: np.ndarray,
    played_pitch: np.ndarray,
    anchors: list,
    *,
    min_restart_notes: int,
    ignore: set = frozenset(),
    used_refs: set = frozenset(),
    slope: float = 1.0,
    tuning: ComparisonTuning = TUNING,
) -> list[Restart]:
    """Restarts among the played notes left without anchors (see the module docstring)."""
    matched_ref_of = {j: i for i, j in anchors}
    partner_of_ref = {i: j for i, j in anchors}
    restarts: list[Restart] = []
    used: set = set(used_refs)
    for run in _unmatched_runs(played_on, matched_ref_of, ignore):
        if len(run) < min_restart_notes:
            continue
        voted = _vote_shift(run, part, played_on, played_pitch, partner_of_ref, used,
                            min_restart_notes=min_restart_notes, tuning=tuning)
        if voted is None:
            continue
        voter_pairs, best_shift = voted
        found = _attempts(voter_pairs, best_shift, part, played_on, partner_of_ref)
        _extend_head(found, abs(best_shift), part, played_on, played_pitch, matched_ref_of, partner_of_ref, used,
                     ignore, min_restart_notes=min_restart_notes, slope=slope, tuning=tuning)
        abandoned = [int(j) for j in np.flatnonzero((played_on >= found.earlier_start - 1e-6)
                                                    & (played_on < found.later_start - 1e-6))]
        if not abandoned:
            continue
        to_ref = min(found.refs, key=lambda i: (part.onsets[i], part.pitches[i]))
        from_ref = max(found.refs, key=lambda i: (part.onsets[i], -part.pitches[i]))
        # a left-off attempt holds the repeated stretch (and perhaps the note stumbled on), not
        # notes matched further on: otherwise this is a repeated motif, not a restart
        beyond = [j for j in abandoned if j in matched_ref_of and part.onsets[matched_ref_of[j]] > part.onsets[from_ref] + 1e-6]
        if len(beyond) > 1:
            continue
        ref_of_played = {**matched_ref_of, **({j: i for i, j in voter_pairs} if best_shift < 0 else {})}
        written_end = _stop_time(abandoned, ref_of_played, from_ref, part, played_on, played_off, played_pitch,
                                 slope=slope, tuning=tuning)
        used.update(found.refs)
        restarts.append(Restart(
            abandoned=abandoned,
            resumed_pairs=found.resumed,
            dropped_pairs=found.dropped,
            voter_pairs=voter_pairs,
            abandoned_refs={j: i for j, i in ref_of_played.items() if j in set(abandoned)},
            to_ref=int(to_ref),
            from_ref=int(from_ref),
            from_time=float(min(max(written_end, max(played_off[abandoned])), found.later_start)),
            to_time=float(found.later_start),
        ))
    return restarts
