"""Note-level and frame-level transcription metrics, following mir_eval's conventions.

One matching routine (:func:`match_notes`, built from :func:`candidate_matrix`
and :func:`maximum_matching`) serves every metric here and the take-versus-part
comparison in :mod:`takescribe.compare`.

Conventions
-----------
Note matching follows ``mir_eval.transcription.match_notes`` (mir_eval 0.8,
MIREX note-tracking criteria) exactly, with pitches as MIDI numbers instead of Hz:

- **Onset**: ``round(|ref_onset - est_onset|, 4) <= onset_tolerance``
  (0.05 s by default). The *distance* is rounded to 4 decimals before the
  comparison, so a difference of exactly 50 ms matches despite float error.
- **Pitch**: ``round(100 * |ref_pitch - est_pitch|, 4) <= pitch_tolerance``
  (50 cents by default). mir_eval compares ``1200 * |log2(f_ref) - log2(f_est)|``
  in Hz without rounding; the two agree except when the distance is within
  5e-5 cent of the tolerance, where mir_eval's outcome depends on the
  round-off of the Hz conversion (a pair exactly 50 cents apart matches here,
  as ``<=`` intends, and matches in mir_eval only for some pitches).
  ``pitch_tolerance=None`` ignores pitch (used to find wrong-pitch partners).
- **Offset** (only when ``offset_ratio`` is not None):
  ``round(|ref_offset - est_offset|, 4) <= max(offset_ratio * ref_duration,
  offset_min_tolerance)``, defaults 0.2 and 0.05 s. The tolerance itself is
  not rounded.
- ``strict=True`` uses ``<`` instead of ``<=`` everywhere, as mir_eval.
- **Matching**: a maximum bipartite matching of the candidate graph by the
  Hopcroft–Karp algorithm, explored in the same order as mir_eval's
  ``util._bipartite_match`` (graph keyed by estimate index in order of first
  appearance, reference neighbours ascending), so the *pairs* equal mir_eval's,
  not only their number; this matters for the average overlap ratio.
- **Scores**: precision = matches / n_est, recall = matches / n_ref,
  F = 2PR / (P + R) (0 when both are 0); average overlap ratio is the mean over
  matched pairs of overlap / span. An empty reference or estimate gives all
  zeros and a ``UserWarning`` (mir_eval warns and returns zeros too).
- **Frames**: a grid of frames at ``k * hop`` seconds, ``k = 0, 1, ...``. A note
  covers frame ``k`` when ``onset <= k * hop < offset``; to absorb float error
  the frame index of a time ``t`` is ``ceil(round(t / hop, 6))``, so a note
  covers frames ``ceil(round(onset / hop, 6))`` up to, not including,
  ``ceil(round(offset / hop, 6))``. Each frame holds the *set* of distinct
  pitches sounding in it (two overlapping notes of one pitch count once).
  Per frame, true positives are a maximum matching of reference and estimated
  pitches within 0.5 semitone (``mir_eval.multipitch`` default window);
  precision, recall and accuracy = TP / (TP + FP + FN) are summed over all
  frames before dividing, as ``mir_eval.multipitch.metrics``. Frame F-measure
  is 2PR / (P + R). Frames where neither side sounds do not change the scores.

References
----------
.. [1] C. Raffel et al., "mir_eval: A Transparent Implementation of Common MIR
   Metrics", ISMIR 2014.
.. [2] M. Bay, A. F. Ehmann, J. S. Downie, "Evaluation of multiple-F0 estimation
   and tracking systems", ISMIR 2009.
.. [3] J. E. Hopcroft, R. M. Karp, "An n^5/2 algorithm for maximum matchings in
   bipartite graphs", SIAM J. Computing 2(4), 1973.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np

from ..notes import Note, notes_to_arrays

__all__ = [
    "N_DECIMALS",
    "NoteScores",
    "FrameScores",
    "validate_note_arrays",
    "candidate_matrix",
    "maximum_matching",
    "match_notes",
    "note_scores",
    "notes_to_frames",
    "frame_scores",
    "evaluate_notes",
]

#: Decimals kept in time (seconds) and pitch (cents) distances before comparing
#: with a tolerance, as ``mir_eval.transcription.N_DECIMALS``.
N_DECIMALS = 4

#: Digits kept in ``time / hop`` before taking the frame index (float guard).
_FRAME_DECIMALS = 6


# --------------------------------------------------------------------------- values


@dataclass(frozen=True, slots=True)
class NoteScores:
    """Note-level scores of an estimate against a reference.

    Attributes
    ----------
    precision, recall, f_measure, average_overlap_ratio : float
        As ``mir_eval.transcription.precision_recall_f1_overlap``.
    n_matched, n_reference, n_estimate : int
        Matched pairs, reference notes, estimated notes.
    """

    precision: float
    recall: float
    f_measure: float
    average_overlap_ratio: float
    n_matched: int
    n_reference: int
    n_estimate: int


@dataclass(frozen=True, slots=True)
class FrameScores:
    """Frame-level scores of an estimate against a reference.

    Attributes
    ----------
    precision, recall, accuracy : float
        As the first three values of ``mir_eval.multipitch.metrics``.
    f_measure : float
        ``2 * precision * recall / (precision + recall)``, 0 when both are 0.
    n_true_positive, n_reference, n_estimate : int
        Sums over frames of matched, reference and estimated pitches.
    """

    precision: float
    recall: float
    accuracy: float
    f_measure: float
    n_true_positive: int
    n_reference: int
    n_estimate: int


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


def _as_arrays(notes, name: str) -> tuple[np.ndarray, np.ndarray]:
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


def _check_tolerance(value, name: str, *, allow_none: bool) -> None:
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
    _check_tolerance(onset_tolerance, "onset_tolerance", allow_none=True)
    _check_tolerance(pitch_tolerance, "pitch_tolerance", allow_none=True)
    _check_tolerance(offset_ratio, "offset_ratio", allow_none=True)
    _check_tolerance(offset_min_tolerance, "offset_min_tolerance", allow_none=False)
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


# --------------------------------------------------------------------------- metrics


def _f_measure(precision: float, recall: float) -> float:
    if precision == 0 and recall == 0:
        return 0.0
    return 2.0 * precision * recall / (precision + recall)


def note_scores(
    ref_notes,
    est_notes,
    *,
    with_offsets: bool,
    onset_tolerance: float = 0.05,
    pitch_tolerance: float = 50.0,
    offset_ratio: float = 0.2,
    offset_min_tolerance: float = 0.05,
) -> NoteScores:
    """Note precision, recall, F-measure and average overlap ratio.

    Parameters
    ----------
    ref_notes, est_notes : list of Note, or (intervals (n, 2), pitches (n,))
        Reference and estimate; pitches as MIDI numbers.
    with_offsets : bool
        Also require offsets to match (``offset_ratio``, ``offset_min_tolerance``).
    onset_tolerance, pitch_tolerance, offset_ratio, offset_min_tolerance
        See :func:`candidate_matrix`.

    Returns
    -------
    NoteScores
        Equal to ``mir_eval.transcription.precision_recall_f1_overlap`` with
        ``offset_ratio=None`` when ``with_offsets`` is false.

    Warns
    -----
    UserWarning
        When either side is empty (all scores are then 0).

    Examples
    --------
    >>> from takescribe.notes import Note
    >>> note_scores([Note(0.0, 1.0, 60)], [Note(0.01, 0.5, 60)], with_offsets=False).f_measure
    1.0
    """
    ref_intervals, ref_pitches = _as_arrays(ref_notes, "reference")
    est_intervals, est_pitches = _as_arrays(est_notes, "estimate")
    n_ref, n_est = len(ref_pitches), len(est_pitches)
    if n_ref == 0 or n_est == 0:
        _warn_empty(n_ref, n_est)
        return NoteScores(0.0, 0.0, 0.0, 0.0, 0, n_ref, n_est)
    pairs = match_notes(
        ref_intervals,
        ref_pitches,
        est_intervals,
        est_pitches,
        onset_tolerance=onset_tolerance,
        pitch_tolerance=pitch_tolerance,
        offset_ratio=offset_ratio if with_offsets else None,
        offset_min_tolerance=offset_min_tolerance,
    )
    precision = len(pairs) / n_est
    recall = len(pairs) / n_ref
    if pairs:
        ref_idx, est_idx = np.array(pairs).T
        ref_sel, est_sel = ref_intervals[ref_idx], est_intervals[est_idx]
        overlap = np.minimum(ref_sel[:, 1], est_sel[:, 1]) - np.maximum(ref_sel[:, 0], est_sel[:, 0])
        span = np.maximum(ref_sel[:, 1], est_sel[:, 1]) - np.minimum(ref_sel[:, 0], est_sel[:, 0])
        average_overlap_ratio = float(np.mean(overlap / span))
    else:
        average_overlap_ratio = 0.0
    return NoteScores(
        precision, recall, _f_measure(precision, recall), average_overlap_ratio, len(pairs), n_ref, n_est
    )


def _warn_empty(n_ref: int, n_est: int) -> None:
    which = " and ".join(s for s, n in (("reference", n_ref), ("estimate", n_est)) if n == 0)
    warnings.warn(f"{which} notes are empty; scores are 0", UserWarning, stacklevel=3)


def _frame_index(times: np.ndarray, hop: float) -> np.ndarray:
    return np.ceil(np.round(times / hop, _FRAME_DECIMALS)).astype(np.int64)


def notes_to_frames(intervals, pitches, *, hop: float = 0.01, n_frames: int | None = None) -> list[np.ndarray]:
    """Sample notes on a frame grid at ``k * hop`` seconds.

    Parameters
    ----------
    intervals : array_like, shape (n, 2)
        Onsets and offsets in seconds.
    pitches : array_like, shape (n,)
        MIDI numbers.
    hop : float
        Frame spacing in seconds (> 0).
    n_frames : int or None
        Number of frames; by default up to the last frame any note covers.

    Returns
    -------
    frames : list of np.ndarray
        ``frames[k]`` holds the sorted distinct pitches sounding at ``k * hop``
        (see the module Conventions for which frames a note covers).

    Examples
    --------
    >>> [f.tolist() for f in notes_to_frames([[0.0, 0.02], [0.01, 0.03]], [60, 64])]
    [[60.0], [60.0, 64.0], [64.0]]
    """
    intervals, pitches = validate_note_arrays(intervals, pitches, name="notes")
    if not (isinstance(hop, (int, float)) and math.isfinite(hop) and hop > 0):
        raise ValueError(f"hop must be a positive number of seconds, got {hop!r}")
    starts = _frame_index(intervals[:, 0], hop)
    stops = _frame_index(intervals[:, 1], hop)
    total = int(stops.max()) if len(stops) else 0
    if n_frames is None:
        n_frames = total
    frames: list[set] = [set() for _ in range(n_frames)]
    for start, stop, pitch in zip(starts, stops, pitches):
        for k in range(int(start), min(int(stop), n_frames)):
            frames[k].add(float(pitch))
    return [np.array(sorted(f), dtype=float) for f in frames]


def _piano_roll(intervals: np.ndarray, pitches: np.ndarray, hop: float, n_frames: int) -> np.ndarray:
    """Boolean ``(128, n_frames)`` roll of whole-number pitches, same frame rule as :func:`notes_to_frames`."""
    counts = np.zeros((128, n_frames + 1), dtype=np.int64)
    starts = _frame_index(intervals[:, 0], hop)
    stops = _frame_index(intervals[:, 1], hop)
    rows = pitches.astype(np.int64)
    np.add.at(counts, (rows, np.minimum(starts, n_frames)), 1)
    np.add.at(counts, (rows, np.minimum(stops, n_frames)), -1)
    return np.cumsum(counts, axis=1)[:, :n_frames] > 0


def _frame_true_positives(ref_frames: list[np.ndarray], est_frames: list[np.ndarray], window: float) -> int:
    total = 0
    for ref_frame, est_frame in zip(ref_frames, est_frames):
        if ref_frame.size == 0 or est_frame.size == 0:
            continue
        hits = np.abs(np.subtract.outer(ref_frame, est_frame)) <= window
        total += len(maximum_matching(hits))
    return total


def frame_scores(ref_notes, est_notes, *, hop: float = 0.01) -> FrameScores:
    """Frame precision, recall, accuracy and F-measure on a ``hop``-second grid.

    Parameters
    ----------
    ref_notes, est_notes : list of Note, or (intervals (n, 2), pitches (n,))
        Reference and estimate; pitches as MIDI numbers.
    hop : float
        Frame spacing in seconds (default 10 ms).

    Returns
    -------
    FrameScores
        precision, recall and accuracy equal to ``mir_eval.multipitch.metrics``
        given both sides sampled by :func:`notes_to_frames` (in Hz).

    Warns
    -----
    UserWarning
        When either side has no sounding frame (the missing ratios are 0).

    Examples
    --------
    >>> from takescribe.notes import Note
    >>> s = frame_scores([Note(0.0, 0.1, 60)], [Note(0.05, 0.1, 60)])
    >>> (s.precision, s.recall)
    (1.0, 0.5)
    """
    ref_intervals, ref_pitches = _as_arrays(ref_notes, "reference")
    est_intervals, est_pitches = _as_arrays(est_notes, "estimate")
    if not (isinstance(hop, (int, float)) and math.isfinite(hop) and hop > 0):
        raise ValueError(f"hop must be a positive number of seconds, got {hop!r}")
    ref_stop = _frame_index(ref_intervals[:, 1], hop).max() if len(ref_pitches) else 0
    est_stop = _frame_index(est_intervals[:, 1], hop).max() if len(est_pitches) else 0
    n_frames = int(max(ref_stop, est_stop))
    if np.all(ref_pitches == np.round(ref_pitches)) and np.all(est_pitches == np.round(est_pitches)):
        # whole MIDI numbers: within 0.5 semitone means equal, so a piano roll suffices
        ref_roll = _piano_roll(ref_intervals, ref_pitches, hop, n_frames)
        est_roll = _piano_roll(est_intervals, est_pitches, hop, n_frames)
        n_ref, n_est = int(ref_roll.sum()), int(est_roll.sum())
        true_positives = int((ref_roll & est_roll).sum())
    else:
        ref_frames = notes_to_frames(ref_intervals, ref_pitches, hop=hop, n_frames=n_frames)
        est_frames = notes_to_frames(est_intervals, est_pitches, hop=hop, n_frames=n_frames)
        n_ref = int(sum(f.size for f in ref_frames))
        n_est = int(sum(f.size for f in est_frames))
        true_positives = _frame_true_positives(ref_frames, est_frames, 0.5)
    if n_ref == 0 or n_est == 0:
        _warn_empty(n_ref, n_est)
    precision = true_positives / n_est if n_est else 0.0
    recall = true_positives / n_ref if n_ref else 0.0
    denominator = n_est + n_ref - true_positives
    accuracy = true_positives / denominator if denominator else 0.0
    return FrameScores(
        precision, recall, accuracy, _f_measure(precision, recall), true_positives, n_ref, n_est
    )


def evaluate_notes(ref_notes, est_notes, *, hop: float = 0.01) -> dict[str, float | int]:
    """Every metric of this module in one flat dict.

    Parameters
    ----------
    ref_notes, est_notes : list of Note, or (intervals (n, 2), pitches (n,))
        Reference and estimate; pitches as MIDI numbers.
    hop : float
        Frame spacing in seconds for the frame metrics.

    Returns
    -------
    dict
        ``onset.{precision,recall,f_measure,average_overlap_ratio,n_matched}``
        (onset and pitch), ``onset_offset.{...}`` (also offsets),
        ``frame.{precision,recall,accuracy,f_measure,n_true_positive,n_reference,n_estimate}``,
        and ``n_reference``, ``n_estimate`` (note counts).

    Examples
    --------
    >>> from takescribe.notes import Note
    >>> evaluate_notes([Note(0.0, 0.5, 60)], [Note(0.0, 0.5, 60)])["onset_offset.f_measure"]
    1.0
    """
    ref = _as_arrays(ref_notes, "reference")
    est = _as_arrays(est_notes, "estimate")
    out: dict[str, float | int] = {"n_reference": len(ref[1]), "n_estimate": len(est[1])}
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        onset = note_scores(ref, est, with_offsets=False)
        onset_offset = note_scores(ref, est, with_offsets=True)
        frame = frame_scores(ref, est, hop=hop)
    # one warning for the caller, not three
    if caught:
        warnings.warn(str(caught[0].message), UserWarning, stacklevel=2)
    for prefix, scores in (("onset", onset), ("onset_offset", onset_offset)):
        out[f"{prefix}.precision"] = scores.precision
        out[f"{prefix}.recall"] = scores.recall
        out[f"{prefix}.f_measure"] = scores.f_measure
        out[f"{prefix}.average_overlap_ratio"] = scores.average_overlap_ratio
        out[f"{prefix}.n_matched"] = scores.n_matched
    out["frame.precision"] = frame.precision
    out["frame.recall"] = frame.recall
    out["frame.accuracy"] = frame.accuracy
    out["frame.f_measure"] = frame.f_measure
    out["frame.n_true_positive"] = frame.n_true_positive
    out["frame.n_reference"] = frame.n_reference
    out["frame.n_estimate"] = frame.n_estimate
    return out
