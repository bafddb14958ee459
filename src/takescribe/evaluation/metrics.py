"""Note-level and frame-level transcription metrics, following mir_eval's conventions.

One matching routine (:func:`match_notes` in :mod:`takescribe.evaluation.matching`) serves
every metric here and the take-versus-part comparison in :mod:`takescribe.comparison`.

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

from ..errors import EvaluationWarning
from .matching import (  # noqa: F401  (the matching names stay importable from here)
    N_DECIMALS,
    as_note_arrays,
    validate_tolerance,
    candidate_matrix,
    match_notes,
    maximum_matching,
    validate_note_arrays,
)

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
    ref_intervals, ref_pitches = as_note_arrays(ref_notes, "reference")
    est_intervals, est_pitches = as_note_arrays(est_notes, "estimate")
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
    warnings.warn(f"{which} notes are empty; scores are 0", EvaluationWarning, stacklevel=3)


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
    ref_intervals, ref_pitches = as_note_arrays(ref_notes, "reference")
    est_intervals, est_pitches = as_note_arrays(est_notes, "estimate")
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
    ref = as_note_arrays(ref_notes, "reference")
    est = as_note_arrays(est_notes, "estimate")
    out: dict[str, float | int] = {"n_reference": len(ref[1]), "n_estimate": len(est[1])}
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        onset = note_scores(ref, est, with_offsets=False)
        onset_offset = note_scores(ref, est, with_offsets=True)
        frame = frame_scores(ref, est, hop=hop)
    # one warning for the caller, not three
    if caught:
        warnings.warn(str(caught[0].message), EvaluationWarning, stacklevel=2)
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
