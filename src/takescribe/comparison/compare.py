"""Findings of a take against its reference part: wrong, missed, extra, early, late, held notes,
hesitations and restarts.

The comparison works on note lists: the reference part (:mod:`takescribe.score`), the
score-to-take alignment (:mod:`takescribe.align`) and the notes heard in the take (ground
truth or a transcription, :class:`takescribe.notes.Note`).

Method
------
1. Every reference note is placed in the take through the alignment (``score_to_take``).
2. Anchors: played notes are matched to reference notes of the same pitch with
   :func:`takescribe.evaluate.match_notes` (maximum bipartite matching, mir_eval
   conventions) in a wide window (``anchor_window``). The anchors are then re-made around
   the local-tempo prediction of step 4 (a few rounds), so they follow a take that drifts
   away from a coarse alignment; a stretch of at least ``min_restart_notes`` reference notes
   left without anchors (an unnoticed pause, a misplaced jump) is laid over the free played
   notes between its neighbouring anchors at the overall pace, at the one offset that lines
   up most of its pitches.
3. Restarts: a run of at least ``min_restart_notes`` unmatched played notes that repeats,
   with one consistent time shift, notes already matched elsewhere in the take is a second
   attempt at the same bars (both attempts must be heard; a run that holds notes matched
   further on is a repeated motif, not a restart). The earlier attempt is the left-off one:
   its notes become ``extra`` findings linked to ONE ``restart`` finding (placed where that
   attempt was in the part), and the timing model is cut at the note the player went back to.
4. Local tempo: reference onsets are grouped (chords), and the take time of each group is
   predicted by a robust line (Siegel's repeated median) through its neighbouring groups
   (``neighbours`` on each side, the group itself left out; fewer than four groups take the
   overall pace). Gradual tempo drift is followed by the line, so only the local residual
   counts as early or late. At the edge of a timing segment (the first or last notes, next
   to a pause) the line is extrapolated from one side, so the note is also read against
   the overall pace through the same neighbours, and only a residual beyond the tolerance
   in both readings counts. Likewise every note is read against a closer line (half the
   neighbours, at least two a side): rubato that swells and relaxes within a phrase bends
   the take's time line faster than the wider line follows, and it is the player's pulse.
   The closer line counts only where its own groups lie on it (within half the tolerance):
   a rushed run that jumps back into time is no pulse.
5. Hesitations: walking through the part, a group that arrives more than
   ``hesitation_threshold`` seconds after the line through the groups before it *and*
   whose delay persists on the next group (the music resumes shifted, rather than one
   late note) opens a new timing segment. The pause is ONE ``hesitation`` finding, timed
   where the music should have gone on (the onset after the longest silence minus the
   pause); the delayed notes are judged against the tempo after the pause and are
   reported ``late`` only if they are late against that tempo as well, with ``linked_to``
   pointing to the hesitation. A chord split by the pause (one hand before, one after) is
   matched on both sides, and a note held into the pause is not ``held_long``.
6. Final matching: same-pitch matching in ``timing_tolerance + match_margin`` around the
   local-tempo prediction, each played note then moved to the nearest free reference note
   of its pitch (the maximum matching only maximises the count); among the leftovers,
   pitch-free matching pairs ``wrong_pitch`` notes; the remaining reference notes are
   ``missed`` and the remaining played notes ``extra``.
7. Durations: a correctly pitched note held for less than ``1 - duration_tolerance`` or
   more than ``1 + duration_tolerance`` times its written length at the local tempo (and
   off by more than ``timing_tolerance`` seconds) is ``held_short`` / ``held_long``; a
   note released just as the next one starts is never ``held_short`` (the next note, if
   early or extra, is reported itself), and a note that sounds on through the place of a
   missing repeat of its pitch is not ``held_long``: the missing note is the one finding
   (its text says the pitch sounded on through its place).

Conventions
-----------
- Times are seconds in the take; pitches are MIDI numbers (C4 = 60, A4 = 69 = 440 Hz).
- The default timing tolerance, 100 ms, is wider than the 50 ms onset tolerance of
  mir_eval's transcription metrics on purpose: a teacher cares about audible timing
  errors, not transcription precision (common practice, no source).
- A "beat" in the tempo curve is a quarter note of the part.
- Without an alignment (``alignment=None``), the take is assumed to follow the written
  tempo from time 0.

The JSON document is described in :mod:`takescribe.comparison.findings`.
"""

from __future__ import annotations

import warnings
from collections import Counter
from typing import Any, Sequence

import numpy as np

from ..errors import ComparisonWarning, InputError
from ..notes import Note, validate_notes
from .builders import (
    Collector,
    Settled,
    extra_findings,
    hesitation_findings,
    missed_findings,
    restart_findings,
    timing_and_length_findings,
    wrong_pitch_findings,
)
from .findings import KINDS, Comparison, Finding, findings_json, number_findings, pitch_name
from .pairing import match_pairs, recover_stretches, same_pitch_pairs, uncross
from .part import Part, part_from_reference, score_to_take_function
from .restarts import Restart, find_restarts
from .settings import TUNING, ComparisonTuning
from .tempo import TempoModel, overall_slope, tempo_curve, tempo_model

__all__ = [
    "KINDS",
    "Finding",
    "Comparison",
    "compare_notes",
    "findings_json",
    "pitch_name",
    "validate_comparison_options",
]


def validate_comparison_options(
    *,
    timing_tolerance: float,
    duration_tolerance: float,
    match_margin: float,
    anchor_window: float,
    hesitation_threshold: float,
    neighbours: int,
    min_restart_notes: int,
) -> None:
    """Check the numeric options of :func:`compare_notes`; raise ``InputError`` naming the bad one."""
    for name, value, low, high in (
        ("timing_tolerance", timing_tolerance, 0.0, 2.0),
        ("duration_tolerance", duration_tolerance, 0.0, 10.0),
        ("match_margin", match_margin, 0.0, 2.0),
        ("anchor_window", anchor_window, 0.0, 10.0),
        ("hesitation_threshold", hesitation_threshold, 0.0, 30.0),
    ):
        if not isinstance(value, (int, float, np.floating, np.integer)) or not np.isfinite(value):
            raise InputError(f"{name} must be a finite number of seconds, got {value!r}")
        if not low < float(value) <= high:
            raise InputError(f"{name} must be in range ({low}, {high}], got {value!r}")
    if not isinstance(neighbours, (int, np.integer)) or not 1 <= neighbours <= 50:
        raise InputError(f"neighbours must be an integer in range 1..50, got {neighbours!r}")
    if not isinstance(min_restart_notes, (int, np.integer)) or not 2 <= min_restart_notes <= 100:
        raise InputError(f"min_restart_notes must be an integer in range 2..100, got {min_restart_notes!r}")


def compare_notes(
    reference: Any,
    alignment: Any,
    played_notes: Sequence[Note],
    *,
    timing_tolerance: float = 0.100,
    duration_tolerance: float = 0.5,
    match_margin: float = 0.3,
    anchor_window: float = 0.5,
    hesitation_threshold: float = 0.3,
    neighbours: int = 4,
    min_restart_notes: int = 3,
    judge_durations: bool = True,
    faint_notes: Sequence[Note] | None = None,
    mask_partials: bool = False,
) -> Comparison:
    """Compare the notes of a take with the reference part.

    Parameters
    ----------
    reference : takescribe.score.Reference
        The part; uses ``notes`` (pitch, onset, offset in seconds at the written tempo,
        onset_quarters, measure, beat), ``measure_beat(q)``, ``measure_starts`` and
        ``quarters_to_seconds`` where present.
    alignment : takescribe.align.Alignment or None
        Score time -> take time (``score_to_take``); ``None`` means the take follows the
        written tempo from 0 s.
    played_notes : sequence of Note
        What was played (ground truth or a transcription), seconds in the take.
    timing_tolerance : float
        Seconds a note may be off the player's own local pulse before it is early/late.
    duration_tolerance : float
        Relative: a note held for less than ``1 - duration_tolerance`` or more than
        ``1 + duration_tolerance`` times its written length at the local tempo is
        held_short / held_long.
    match_margin : float
        Seconds added to ``timing_tolerance`` for the final matching window, so early and
        late notes are still recognised as the note meant.
    anchor_window : float
        Seconds, first-pass matching window around the alignment's prediction.
    hesitation_threshold : float
        Seconds of unwritten pause (persisting on the next note) that make a hesitation.
    neighbours : int
        Onset groups on each side used for the local tempo line.
    min_restart_notes : int
        Notes of the abandoned attempt needed to recognise a restart.
    judge_durations : bool
        Report ``held_short`` / ``held_long``. Turn off when the note ends are not reliable
        (a transcription of a piano or plucked take, where the end of a note is the end of
        its audible decay rather than the player's release).
    faint_notes : sequence of Note, optional
        Notes heard only faintly (below the draft's threshold, where the part expects them,
        or a struck key played again while it still rings; :func:`takescribe.informed.faint_notes`). A part note that would be ``missed`` but has a
        faint note of its pitch starting within 0.15 s of where it should sound gets the status
        ``"uncertain"`` and no finding: the evidence is too weak to put it in the draft and too
        strong to tell the player it was not played.
    mask_partials : bool
        For played notes from a transcription: a part note that would be ``missed`` while a
        played note 12, 19 or 24 semitones below it sounds where it starts gets the status
        ``"uncertain"`` and no finding. Its partials coincide with that note's 2nd, 3rd or 4th
        partial, so a spectrum cannot tell whether it was played (the factorization gives
        that energy to the lower note). Off for notes known exactly (ground truth, MIDI).

    Returns
    -------
    Comparison

    Raises
    ------
    InputError
        If an option is out of range or the reference notes are malformed.
    TypeError
        If ``played_notes`` is not a sequence of Note or the reference/alignment lack the
        attributes used.

    Examples
    --------
    >>> from types import SimpleNamespace as NS
    >>> from takescribe.notes import Note
    >>> ref = NS(notes=[NS(pitch=60 + k, onset=0.5 * k, offset=0.5 * k + 0.45, onset_quarters=k,
    ...                   measure=1 + k // 4, beat=1.0 + k % 4) for k in range(8)])
    >>> played = [Note(0.5 * k, 0.5 * k + 0.45, 60 + k) for k in range(8) if k != 3]
    >>> result = compare_notes(ref, None, played)
    >>> [(f.kind, f.expected_pitch) for f in result.findings]
    [('missed', 63)]
    """
    if not isinstance(judge_durations, (bool, np.bool_)):
        raise TypeError(f"judge_durations must be True or False, got {judge_durations!r}")
    validate_comparison_options(
        timing_tolerance=timing_tolerance,
        duration_tolerance=duration_tolerance,
        match_margin=match_margin,
        anchor_window=anchor_window,
        hesitation_threshold=hesitation_threshold,
        neighbours=neighbours,
        min_restart_notes=min_restart_notes,
    )
    played = validate_notes(played_notes, name="played_notes")
    part = part_from_reference(reference)
    to_take = score_to_take_function(alignment)
    n_ref, n_played = len(part.onsets), len(played)
    if n_played == 0:
        warnings.warn("no notes were heard in the take: every note of the part is reported missed",
                      ComparisonWarning, stacklevel=2)
    if n_ref == 0:
        warnings.warn("the part has no notes: every played note is reported extra", ComparisonWarning, stacklevel=2)
    take = _Take(np.array([p.onset for p in played], dtype=float), np.array([p.offset for p in played], dtype=float),
                 np.array([p.pitch for p in played], dtype=int))
    expected0 = to_take(part.onsets) if n_ref else np.zeros(0)
    expected0_off = to_take(part.offsets) if n_ref else np.zeros(0)
    options = _Options(timing_tolerance=timing_tolerance, match_margin=match_margin, anchor_window=anchor_window,
                       hesitation_threshold=hesitation_threshold, neighbours=neighbours,
                       min_restart_notes=min_restart_notes, default_slope=overall_slope(part.onsets, expected0),
                       tuning=TUNING)
    settled = _settle(part, take, expected0, expected0_off, options)
    ctx = Settled(part, take.on, take.off, take.pitch, *settled, timing_tolerance=timing_tolerance,
                  duration_tolerance=duration_tolerance, judge_durations=bool(judge_durations), mask_partials=mask_partials,
                  faint_notes=tuple(faint_notes or ()), tuning=TUNING, written_offset=_written_offset(reference))
    findings, flagged = _build_findings(ctx)
    summary = _summary(ctx, findings, flagged, alignment, played_count=n_played)
    return Comparison(
        findings=tuple(findings),
        summary=summary,
        note_status=tuple(ctx.note_status),
        played_status=tuple(ctx.played_status),
        pairs=tuple(sorted(ctx.same + ctx.wrong)),
        expected_onsets=ctx.predicted,
        expected_offsets=ctx.pred_off,
        played_notes=tuple(played),
        measure_times={m: float(ctx.model.predict(s, fallback=float(to_take(np.array([s]))[0])))
                       for m, s in part.measure_starts.items()},
    )


# --------------------------------------------------------------------------- steps


class _Take:
    """The played notes as arrays (seconds, MIDI)."""

    __slots__ = ("on", "off", "pitch")

    def __init__(self, on: np.ndarray, off: np.ndarray, pitch: np.ndarray) -> None:
        self.on, self.off, self.pitch = on, off, pitch


class _Options:
    """The options of one comparison, validated, with the overall pace of the alignment."""

    def __init__(self, *, timing_tolerance, match_margin, anchor_window, hesitation_threshold, neighbours,
                 min_restart_notes, default_slope, tuning: ComparisonTuning) -> None:
        self.timing_tolerance = float(timing_tolerance)
        self.match_margin = float(match_margin)
        self.anchor_window = float(anchor_window)
        self.hesitation_threshold = float(hesitation_threshold)
        self.neighbours = int(neighbours)
        self.min_restart_notes = int(min_restart_notes)
        self.default_slope = float(default_slope)
        self.tuning = tuning

    def model(self, part: Part, take: _Take, pairs, breaks) -> TempoModel:
        return tempo_model(part.onsets, take.on, pairs, breaks=breaks, neighbours=self.neighbours,
                           hesitation_threshold=self.hesitation_threshold, default_slope=self.default_slope,
                           tuning=self.tuning)


def _predict(part: Part, model: TempoModel, fallback: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Expected onsets and offsets of the part's notes on the model's local lines."""
    if len(part.onsets) == 0:
        return np.zeros(0), np.zeros(0)
    predicted = np.array([model.predict(s, fallback=e) for s, e in zip(part.onsets, fallback)])
    return predicted, predicted + np.array([model.slope(s) for s in part.onsets]) * (part.offsets - part.onsets)


def _reanchor(part: Part, take: _Take, anchors, breaks, pool, predicted, options: _Options):
    """Anchors re-made around the local-tempo prediction until they settle (at most three rounds)."""
    for _ in range(3):
        model = options.model(part, take, anchors, breaks)
        predicted, pred_off = _predict(part, model, predicted)
        again = match_pairs(predicted, pred_off, part.pitches, take.on[pool], take.off[pool], take.pitch[pool],
                            window=options.anchor_window, same_pitch=True)
        again = uncross([(i, int(pool[j])) for i, j in again], predicted, take.on, key=lambda i, j: part.pitches[i])
        again += recover_stretches(part, predicted, take.on, take.pitch, pool, again,
                                   min_notes=options.min_restart_notes, slope=model.default_slope,
                                   tuning=options.tuning)
        if sorted(again) == sorted(anchors) or len(again) < len(anchors):
            break
        anchors = again
    return anchors, model, predicted


def _anchors_and_restarts(part: Part, take: _Take, expected0: np.ndarray, expected0_off: np.ndarray,
                          options: _Options):
    """Steps 1-3: anchors, restarts, and the local tempo and hesitations from the anchors.

    Re-anchoring around the local-tempo prediction lets the anchors follow a take that drifts
    away from a coarse alignment, and a restart hidden by a coarse alignment shows up once the
    anchors settle.
    """
    anchors = match_pairs(expected0, expected0_off, part.pitches, take.on, take.off,
                          take.pitch, window=options.anchor_window, same_pitch=True)
    anchors = uncross(anchors, expected0, take.on, key=lambda i, j: part.pitches[i])
    restarts: list[Restart] = []
    abandoned_owner: dict = {}
    breaks: list[float] = []
    predicted, model = expected0, None
    for round_ in range(2):
        found = find_restarts(part, take.on, take.off, take.pitch, anchors,
                              min_restart_notes=options.min_restart_notes, ignore=set(abandoned_owner),
                              used_refs={i for r in restarts for i, _ in r.resumed_pairs + r.voter_pairs},
                              slope=options.default_slope if round_ == 0 else model.default_slope,
                              tuning=options.tuning)
        for r in found:
            for j in r.abandoned:
                abandoned_owner.setdefault(j, len(restarts))
            restarts.append(r)
        dropped = {p for r in found for p in r.dropped_pairs}
        anchors = [(i, j) for i, j in anchors if (i, j) not in dropped and j not in abandoned_owner]
        anchored_refs = {i for i, _ in anchors}
        anchors += [(i, j) for r in found for i, j in r.resumed_pairs if i not in anchored_refs]
        # a segment starts just before the note the player went back to (group keys are rounded)
        breaks = [float(part.onsets[r.to_ref]) - 1e-3 for r in restarts]
        pool = np.array([j for j in range(len(take.on)) if j not in abandoned_owner], dtype=int)
        anchors, model, predicted = _reanchor(part, take, anchors, breaks, pool, predicted, options)
    return model, predicted, pool, restarts, abandoned_owner, breaks


def _split_chord_pairs(part: Part, take: _Take, model: TempoModel, predicted, pred_off, pool, same, window):
    """Around a hesitation a chord can be split by the pause (one hand before it, one after):
    the notes left over next to the pause are tried against the tempo line of the other side.
    Returns the new pairs and the expected onsets they were paired at."""
    alt_expected: dict = {}
    taken_ref, taken_played = {i for i, _ in same}, {j for _, j in same}
    for k, _pause, _start in model.hesitations:
        s_here, s_before = float(model.group_scores[k]), float(model.group_scores[k - 1])
        seg = int(model.segment_of_group[k])
        for i in range(len(part.onsets)):
            if i in taken_ref:
                continue
            s_i = float(part.onsets[i])
            if abs(s_i - s_here) < 1e-3:
                alt_expected[i] = model.predict_in_segment(s_i, seg - 1)
            elif s_before - 1e-3 < s_i < s_here - 1e-3:
                alt_expected[i] = model.predict_in_segment(s_i, seg)
    if not alt_expected:
        return [], {}
    refs = np.array(sorted(alt_expected), dtype=int)
    alt_on = predicted.copy()
    alt_on[refs] = [alt_expected[i] for i in refs]
    free = np.array([j for j in pool if j not in taken_played], dtype=int)
    extra_pairs = same_pitch_pairs(alt_on, alt_on + (pred_off - predicted), part.pitches, take.on, take.off,
                                   take.pitch, free, refs, window=window)
    return extra_pairs, {i: alt_expected[i] for i, _ in extra_pairs}


def _final_pairs(part: Part, take: _Take, model: TempoModel, predicted, pool, options: _Options):
    """Step 6: same-pitch pairs around the local-tempo prediction, then wrong-pitch pairs."""
    n_ref = len(part.onsets)
    pred_off = predicted + np.array([model.slope(s) for s in part.onsets]) * (part.offsets - part.onsets) if n_ref else np.zeros(0)
    window = options.timing_tolerance + options.match_margin
    same = same_pitch_pairs(predicted, pred_off, part.pitches, take.on, take.off, take.pitch, pool,
                            np.arange(n_ref), window=window)
    extra_pairs, alt_expected = _split_chord_pairs(part, take, model, predicted, pred_off, pool, same, window)
    same += extra_pairs
    left_ref = np.array(sorted(set(range(n_ref)) - {i for i, _ in same}), dtype=int)
    left_played = np.array(sorted(set(pool.tolist()) - {j for _, j in same}), dtype=int)
    wrong = match_pairs(predicted[left_ref], pred_off[left_ref], part.pitches[left_ref], take.on[left_played],
                        take.off[left_played], take.pitch[left_played], window=window, same_pitch=False)
    wrong = [(int(left_ref[i]), int(left_played[j])) for i, j in wrong]
    # within a chord, pair wrong notes by pitch order (lowest with lowest)
    wrong = uncross(wrong, part.pitches, take.pitch, key=lambda i, j: round(float(part.onsets[i]), 4))
    return same, wrong, alt_expected


def _settle(part: Part, take: _Take, expected0: np.ndarray, expected0_off: np.ndarray, options: _Options) -> tuple:
    """Steps 1-6 and the final refit; returns the fields of :class:`Settled` after the take's arrays."""
    model, predicted, pool, restarts, abandoned_owner, breaks = _anchors_and_restarts(
        part, take, expected0, expected0_off, options)
    same, wrong, alt_expected = _final_pairs(part, take, model, predicted, pool, options)
    # refit the tempo with every pairing (the split-chord notes aside), keeping the restart cuts
    model = options.model(part, take, [p for p in same if p[0] not in alt_expected] + wrong, breaks)
    n_ref = len(part.onsets)
    predicted = np.array([model.predict(s, fallback=e) for s, e in zip(part.onsets, predicted)]) if n_ref else np.zeros(0)
    slopes = np.array([model.slope(s) for s in part.onsets]) if n_ref else np.zeros(0)
    pred_off = predicted + slopes * (part.offsets - part.onsets)
    for i in alt_expected:
        predicted[i] = alt_expected[i]
        pred_off[i] = alt_expected[i] + slopes[i] * (part.offsets[i] - part.onsets[i])
    return model, predicted, pred_off, slopes, same, wrong, alt_expected, pool, restarts, abandoned_owner


def _build_findings(ctx: Settled) -> tuple[list[Finding], set]:
    """Every builder, in a fixed order; returns the numbered findings and the part notes flagged."""
    out = Collector()
    restart_items = restart_findings(ctx, out)
    hesitation_of_group = hesitation_findings(ctx, out)
    flagged = timing_and_length_findings(ctx, out, hesitation_of_group)
    wrong_pitch_findings(ctx, out)
    missed_findings(ctx, out)
    extra_findings(ctx, out, restart_items)
    return number_findings(out.raw), flagged


def _written_offset(reference: Any) -> int:
    """Semitones from sounding to written pitch of a part read with ``<transpose>`` (0 otherwise)."""
    return -int(getattr(reference, "transposition", 0) or 0)


def _summary(ctx: Settled, findings: list[Finding], flagged: set, alignment: Any, *, played_count: int) -> dict:
    """The summary of the JSON document (see :mod:`takescribe.comparison.findings`)."""
    # one event, one count: notes linked to a restart or a hesitation are details of it
    events = [f for f in findings if f.linked_to is None]
    counts = {kind: 0 for kind in KINDS}
    for f in events:
        counts[f.kind] += 1
    n_ref = len(ctx.part.onsets)
    take_end = float(max(ctx.played_off.max() if played_count else 0.0, ctx.predicted.max() if n_ref else 0.0))
    per_bar = Counter(f.measure for f in events if f.measure is not None)
    correct = sum(1 for i in range(n_ref) if ctx.note_status[i] == "played" and i not in flagged)
    confidence = getattr(alignment, "confidence", None) if alignment is not None else None
    if confidence is not None and not np.isscalar(confidence):
        confidence = float(np.mean(np.asarray(confidence, dtype=float))) if np.size(confidence) else None
    return {
        "notes_in_part": n_ref,
        "notes_played": played_count,
        "notes_played_correctly": int(correct),
        "notes_uncertain": int(sum(1 for status in ctx.note_status if status == "uncertain")),
        "counts": counts,
        "linked_details": len(findings) - len(events),
        "findings_per_minute": round(len(events) / (take_end / 60.0), 3) if take_end > 0 else 0.0,
        "tempo_curve": tempo_curve(ctx.part, ctx.model, tuning=ctx.tuning),
        "bars_with_most_findings": [{"measure": int(m), "findings": int(c)}
                                    for m, c in sorted(per_bar.items(), key=lambda mc: (-mc[1], mc[0]))[:5]],
        "alignment_confidence": None if confidence is None else round(float(confidence), 4),
        "take_duration": round(take_end, 4),
        # pitches in findings are sounding; the texts name written pitch = sounding + this
        "written_minus_sounding": int(ctx.written_offset),
    }
