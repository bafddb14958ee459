"""Note matching with mir_eval's conventions: the one pairing routine of the package.

:func:`match_notes` (built from :func:`candidate_matrix` and :func:`maximum_matching`) serves
every metric in :mod:`takescribe.evaluation.metrics` and the take-versus-part comparison in
:mod:`takescribe.comparison`. Its conventions (onset, pitch and offset tolerances, rounding,
Hopcroft-Karp order) are listed in :mod:`takescribe.evaluation.metrics`.
"""

from __future__ import annotations

import math

import numpy as np

from ..notes import Note, notes_to_arrays

__all__ = ["N_DECIMALS", "validate_note_arrays", "as_note_arrays", "validate_tolerance", "candidate_matrix",
           "maximum_matching", "match_notes"]

#: Decimals kept in time (seconds) and pitch (cents) distances before comparing
#: with a tolerance, as ``mir_eval.transcription.N_DECIMALS``.
N_DECIMALS = 4


# --------------------------------------------------------------------------- input


def validate_note_arrays(intervals, pitches, *, name: str = "notes") -> tuple[np.ndarray, np.ndarray]:
    """Check and return ``intervals (n, 2)`` in seconds and ``pitches (n,)`` as MIDI numbers.

    Parameters
    ----------
    intervals : array_like, shape (n, 2)
        Onset and offset times in seconds; onsets >= 0, offsets > onsets.
    pitches : array_like, shape (n,)
        MIDI note numbers (floats allowed), 0..127.
    name : str
        Name used in error messages.

    Returns
    -------
    intervals : np.ndarray, shape (n, 2), float64
    pitches : np.ndarray, shape (n,), float64

    Raises
    ------
    ValueError
        On a wrong shape, non-finite, negative or empty-duration interval, or
        pitches outside 0..127 (the message says when they look like Hz).
    """
    intervals = np.asarray(intervals, dtype=float)
    pitches = np.asarray(pitches, dtype=float)
    if intervals.size == 0:
        intervals = intervals.reshape(0, 2)
    if intervals.ndim != 2 or intervals.shape[1] != 2:
        raise ValueError(f"{name}: intervals must have shape (n, 2), got {intervals.shape}")
    if pitches.ndim != 1 or pitches.shape[0] != intervals.shape[0]:
        raise ValueError(
            f"{name}: pitches must have shape ({intervals.shape[0]},) to match the intervals, got {pitches.shape}"
        )
    if not np.all(np.isfinite(intervals)):
        raise ValueError(f"{name}: intervals contain NaN or infinite times")
    if np.any(intervals < 0):
        raise ValueError(f"{name}: negative time {intervals.min()} s; times are seconds from the start")
    if np.any(intervals[:, 1] <= intervals[:, 0]):
        bad = int(np.flatnonzero(intervals[:, 1] <= intervals[:, 0])[0])
        raise ValueError(
            f"{name}: note {bad} has offset {intervals[bad, 1]} <= onset {intervals[bad, 0]}; "
            "every note needs a positive duration"
        )
    if not np.all(np.isfinite(pitches)):
        raise ValueError(f"{name}: pitches contain NaN or infinite values")
    if pitches.size and (pitches.min() < 0 or pitches.max() > 127):
        hint = " (these look like Hz; this function takes MIDI numbers)" if pitches.max() > 127 else ""
        raise ValueError(
            f"{name}: pitches must be MIDI note numbers in range 0..127, got {pitches.min()}..{pitches.max()}{hint}"
        )
    return intervals, pitches


def as_note_arrays(notes, name: str) -> tuple[np.ndarray, np.ndarray]:
    """Accept a sequence of :class:`Note` or a pair ``(intervals, pitches)``."""
    if isinstance(notes, tuple) and len(notes) == 2 and not any(isinstance(x, Note) for x in notes):
        return validate_note_arrays(notes[0], notes[1], name=name)
    if isinstance(notes, (str, bytes)) or not hasattr(notes, "__iter__"):
        raise TypeError(f"{name} must be a list of Note or a pair (intervals, pitches), got {type(notes).__name__}")
    notes = list(notes)
    for i, n in enumerate(notes):
        if not isinstance(n, Note):
            raise TypeError(f"{name}[{i}] must be a Note, got {type(n).__name__}")
    intervals, pitches, _ = notes_to_arrays(notes)
    return validate_note_arrays(intervals, pitches, name=name)


def validate_tolerance(value, name: str, *, allow_none: bool) -> None:
    if value is None:
        if not allow_none:
            raise ValueError(f"{name} must be a number >= 0, got None")
        return
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise TypeError(f"{name} must be a number, got {type(value).__name__}")
    if not (math.isfinite(value) and value >= 0):
        raise ValueError(f"{name} must be a finite number >= 0, got {value}")


# --------------------------------------------------------------------------- matching


def candidate_matrix(
    ref_intervals,
    ref_pitches,
    est_intervals,
    est_pitches,
    *,
    onset_tolerance: float | None = 0.05,
    pitch_tolerance: float | None = 50.0,
    offset_ratio: float | None = 0.2,
    offset_min_tolerance: float = 0.05,
    strict: bool = False,
) -> np.ndarray:
    """Which reference/estimate pairs may be matched (the candidate graph).

    Parameters
    ----------
    ref_intervals : array_like, shape (n_ref, 2)
        Reference onsets and offsets in seconds.
    ref_pitches : array_like, shape (n_ref,)
        Reference pitches, MIDI numbers.
    est_intervals : array_like, shape (n_est, 2)
        Estimated onsets and offsets in seconds.
    est_pitches : array_like, shape (n_est,)
        Estimated pitches, MIDI numbers.
    onset_tolerance : float or None
        Seconds; None ignores onsets.
    pitch_tolerance : float or None
        Cents; None ignores pitch.
    offset_ratio : float or None
        Fraction of the reference duration; None ignores offsets.
    offset_min_tolerance : float
        Seconds; lower bound of the offset tolerance.
    strict : bool
        Use ``<`` instead of ``<=``.

    Returns
    -------
    hits : np.ndarray, shape (n_ref, n_est), bool
        ``hits[i, j]`` is true when reference note ``i`` and estimated note
        ``j`` satisfy every enabled criterion (see the module Conventions).

    Examples
    --------
    >>> candidate_matrix([[0.0, 1.0]], [60], [[0.03, 0.9], [0.2, 1.0]], [60, 60]).tolist()
    [[True, False]]
    """
    ref_intervals, ref_pitches = validate_note_arrays(ref_intervals, ref_pitches, name="reference")
    est_intervals, est_pitches = validate_note_arrays(est_intervals, est_pitches, name="estimate")
    validate_tolerance(onset_tolerance, "onset_tolerance", allow_none=True)
    validate_tolerance(pitch_tolerance, "pitch_tolerance", allow_none=True)
    validate_tolerance(offset_ratio, "offset_ratio", allow_none=True)
    validate_tolerance(offset_min_tolerance, "offset_min_tolerance", allow_none=False)
    compare = np.less if strict else np.less_equal

    hits = np.ones((len(ref_pitches), len(est_pitches)), dtype=bool)
    if onset_tolerance is not None:
        onset_distances = np.around(
            np.abs(np.subtract.outer(ref_intervals[:, 0], est_intervals[:, 0])), decimals=N_DECIMALS
        )
        hits &= compare(onset_distances, onset_tolerance)
    if pitch_tolerance is not None:
        cent_distances = np.around(100.0 * np.abs(np.subtract.outer(ref_pitches, est_pitches)), decimals=N_DECIMALS)
        hits &= compare(cent_distances, pitch_tolerance)
    if offset_ratio is not None:
        offset_distances = np.around(
            np.abs(np.subtract.outer(ref_intervals[:, 1], est_intervals[:, 1])), decimals=N_DECIMALS
        )
        ref_durations = ref_intervals[:, 1] - ref_intervals[:, 0]
        offset_tolerances = np.maximum(offset_ratio * ref_durations, offset_min_tolerance)
        hits &= compare(offset_distances, offset_tolerances[:, None])
    return hits


def maximum_matching(hits) -> list[tuple[int, int]]:
    """Maximum bipartite matching of a candidate graph (Hopcroft–Karp).

    The search order is that of ``mir_eval.util._bipartite_match`` (itself
    after D. Eppstein's public implementation), so on the same graph it returns
    the same pairs as mir_eval. Augmenting paths are followed with an explicit
    stack, so long chains of candidates do not hit Python's recursion limit.

    Parameters
    ----------
    hits : array_like, shape (n_ref, n_est), bool
        Candidate pairs, e.g. from :func:`candidate_matrix` (possibly combined
        with a rule of the caller's own).

    Returns
    -------
    pairs : list of (int, int)
        ``(ref_index, est_index)`` sorted by reference index; each index
        appears at most once.

    Examples
    --------
    >>> maximum_matching([[True, True], [True, False]])
    [(0, 1), (1, 0)]
    """
    hits = np.asarray(hits, dtype=bool)
    if hits.ndim != 2:
        raise ValueError(f"hits must be a 2-D (n_ref, n_est) boolean matrix, got shape {hits.shape}")
    # Left side: estimate indices in order of first appearance in a row-major
    # scan; right side: reference indices ascending (mir_eval builds it so).
    graph: dict[int, list[int]] = {}
    for ref_i, est_i in zip(*np.nonzero(hits)):
        graph.setdefault(int(est_i), []).append(int(ref_i))

    matching: dict[int, int] = {}  # reference -> estimate
    for u in graph:  # greedy start
        for v in graph[u]:
            if v not in matching:
                matching[v] = u
                break

    while True:
        # Layered residual graph: pred[u] = previous-layer neighbour of u (or
        # the `unmatched` sentinel for free u); preds[v] = candidates for v.
        preds: dict[int, list[int]] = {}
        unmatched: list[int] = []
        pred: dict[int, object] = {u: unmatched for u in graph}
        for v in matching:
            del pred[matching[v]]
        layer = list(pred)
        while layer and not unmatched:
            new_layer: dict[int, list[int]] = {}
            for u in layer:
                for v in graph[u]:
                    if v not in preds:
                        new_layer.setdefault(v, []).append(u)
            layer = []
            for v in new_layer:
                preds[v] = new_layer[v]
                if v in matching:
                    layer.append(matching[v])
                    pred[matching[v]] = v
                else:
                    unmatched.append(v)
        if not unmatched:
            return sorted(matching.items())
        for v in unmatched:
            _augment(v, preds, pred, matching, unmatched)


def _augment(root: int, preds: dict, pred: dict, matching: dict, unmatched: list) -> bool:
    """Search back through the layers from ``root`` for an alternating path.

    Same visiting order as the recursive search in mir_eval (each frame tries
    the candidates of its vertex in order, consuming ``preds``/``pred`` entries
    as it goes); written with an explicit stack.
    """
    if root not in preds:
        return False
    # each frame: [v, candidate list, next index, u being tried]
    stack = [[root, preds.pop(root), 0, None]]
    child_result: bool | None = None
    while stack:
        frame = stack[-1]
        v, candidates = frame[0], frame[1]
        if child_result is not None:
            if child_result:
                matching[v] = frame[3]
                stack.pop()
                continue  # child_result stays True for the parent
            child_result = None
        descended = False
        while frame[2] < len(candidates):
            u = candidates[frame[2]]
            frame[2] += 1
            if u not in pred:
                continue
            pu = pred.pop(u)
            if pu is unmatched:
                matching[v] = u
                stack.pop()
                child_result = True
                descended = True
                break
            if pu in preds:
                frame[3] = u
                stack.append([pu, preds.pop(pu), 0, None])
                descended = True
                break
            # recursing into pu would fail at once: try the next candidate
        if not descended:
            stack.pop()
            child_result = False
    return bool(child_result)


def match_notes(
    ref_intervals,
    ref_pitches,
    est_intervals,
    est_pitches,
    *,
    onset_tolerance: float | None = 0.05,
    pitch_tolerance: float | None = 50.0,
    offset_ratio: float | None = 0.2,
    offset_min_tolerance: float = 0.05,
    strict: bool = False,
) -> list[tuple[int, int]]:
    """Maximum matching of reference and estimated notes (mir_eval conventions).

    Parameters
    ----------
    ref_intervals, ref_pitches, est_intervals, est_pitches
        See :func:`candidate_matrix`; pitches are MIDI numbers.
    onset_tolerance, pitch_tolerance, offset_ratio, offset_min_tolerance, strict
        See :func:`candidate_matrix`. ``pitch_tolerance=None`` ignores pitch,
        ``offset_ratio=None`` ignores offsets.

    Returns
    -------
    pairs : list of (int, int)
        ``(ref_index, est_index)``, sorted by reference index; equal to
        ``mir_eval.transcription.match_notes`` on the same notes in Hz.

    Examples
    --------
    >>> match_notes([[0.0, 1.0], [1.0, 2.0]], [60, 62], [[1.02, 2.1]], [62])
    [(1, 0)]
    """
    hits = candidate_matrix(
        ref_intervals,
        ref_pitches,
        est_intervals,
        est_pitches,
        onset_tolerance=onset_tolerance,
        pitch_tolerance=pitch_tolerance,
        offset_ratio=offset_ratio,
        offset_min_tolerance=offset_min_tolerance,
        strict=strict,
    )
    return maximum_matching(hits)
