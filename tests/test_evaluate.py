"""Tests of takescribe.evaluation.metrics against mir_eval (the reference implementation).

Every score check compares with mir_eval 0.8 (``mir_eval.transcription`` and
``mir_eval.multipitch``) on the same notes converted to Hz
(f = 440 * 2 ** ((p - 69) / 12), A4 = 440 Hz per ISO 16).
"""

from __future__ import annotations

import warnings
from decimal import Decimal

import mir_eval
import numpy as np
import pytest
from scipy.sparse import csr_matrix
from scipy.sparse.csgraph import maximum_bipartite_matching

from takescribe.evaluation.metrics import (
    candidate_matrix,
    evaluate_notes,
    frame_scores,
    match_notes,
    maximum_matching,
    note_scores,
    notes_to_frames,
)
from takescribe.notes import Note

HOP = 0.01
# fractional pitch offsets whose pairwise differences never equal 0.5 semitone
# (at exactly 50 cents mir_eval's result depends on Hz round-off; see below)
DETUNINGS = np.array([0.0, 0.1, 0.25, -0.15, 0.4])


def to_hz(pitches):
    # ISO 16: A4 = MIDI 69 = 440 Hz; equal temperament
    return 440.0 * 2.0 ** ((np.asarray(pitches, dtype=float) - 69.0) / 12.0)


def random_pair(rng: np.random.Generator):
    """A reference and a perturbed estimate with many near-tolerance cases."""
    n_ref = int(rng.choice([0, 1, 2, 5, 10, 20], p=[0.04, 0.06, 0.1, 0.3, 0.3, 0.2]))
    on_grid = rng.random() < 0.6  # times on a 10 ms grid: exact-tolerance distances
    onsets = rng.uniform(0, 3, n_ref)
    if on_grid:
        onsets = np.round(onsets, 2)
    durations = rng.choice([0.05, 0.1, 0.2, 0.25, 0.5, 1.0], n_ref) if on_grid else rng.uniform(0.02, 1.0, n_ref)
    pitches = rng.integers(60, 65, n_ref).astype(float)  # few pitches: many conflicts
    if rng.random() < 0.3:
        pitches = pitches + rng.choice(DETUNINGS, n_ref)
    ref = np.column_stack([onsets, onsets + durations]), pitches

    est_on, est_off, est_p = [], [], []
    for (a, b), p in zip(*ref):
        r = rng.random()
        if r < 0.15:
            continue  # missed
        shift = rng.choice([0.0, 0.05, -0.05, 0.049, 0.0501, -0.0501, rng.normal(0, 0.03)])
        off_shift = rng.choice([0.0, 0.05, -0.05, 0.2 * (b - a), -0.2 * (b - a), rng.normal(0, 0.05)])
        a2 = max(0.0, a + shift)
        b2 = max(a2 + 0.01, b + shift * rng.integers(0, 2) + off_shift)
        q = p + rng.choice([0.0, 0.0, 0.0, 1.0, -1.0, 12.0, rng.choice(DETUNINGS)])
        est_on.append(a2), est_off.append(b2), est_p.append(q)
        if rng.random() < 0.1:  # duplicate (identical note) or overlapping same-pitch note
            lag = 0.0 if rng.random() < 0.5 else 0.02
            est_on.append(a2 + lag), est_off.append(b2 + lag), est_p.append(q)
    for _ in range(int(rng.integers(0, 4))):  # extra notes
        a2 = float(rng.uniform(0, 3))
        est_on.append(a2), est_off.append(a2 + float(rng.uniform(0.02, 0.5))), est_p.append(float(rng.integers(60, 65)))
    if rng.random() < 0.05:
        est_on, est_off, est_p = [], [], []
    if rng.random() < 0.05:  # identical lists
        est_on, est_off, est_p = list(ref[0][:, 0]), list(ref[0][:, 1]), list(ref[1])
    est = np.column_stack([est_on, est_off]).reshape(-1, 2), np.array(est_p, dtype=float)
    order = rng.permutation(len(est[1]))
    return ref, (est[0][order], est[1][order])


CASES = [random_pair(np.random.default_rng(seed)) for seed in range(400)]


@pytest.mark.parametrize("strict", [False, True])
def test_matching_pairs_equal_mir_eval(strict):
    for (ri, rp), (ei, ep) in CASES:
        for offset_ratio in (None, 0.2):
            ours = match_notes(ri, rp, ei, ep, offset_ratio=offset_ratio, strict=strict)
            # reference: mir_eval.transcription.match_notes (Hz pitches); same pairs, not only same count
            theirs = mir_eval.transcription.match_notes(
                ri, to_hz(rp), ei, to_hz(ep), offset_ratio=offset_ratio, strict=strict
            )
            assert ours == [(int(i), int(j)) for i, j in theirs]


def test_onset_only_and_offset_only_matching_equal_mir_eval():
    for (ri, rp), (ei, ep) in CASES[:200]:
        ours = match_notes(ri, rp, ei, ep, pitch_tolerance=None, offset_ratio=None)
        # reference: mir_eval.transcription.match_note_onsets ignores pitch and offsets
        assert ours == [(int(i), int(j)) for i, j in mir_eval.transcription.match_note_onsets(ri, ei)]
        ours = match_notes(ri, rp, ei, ep, onset_tolerance=None, pitch_tolerance=None)
        # reference: mir_eval.transcription.match_note_offsets
        assert ours == [(int(i), int(j)) for i, j in mir_eval.transcription.match_note_offsets(ri, ei)]


@pytest.mark.parametrize("with_offsets", [False, True])
def test_note_scores_equal_mir_eval(with_offsets):
    for (ri, rp), (ei, ep) in CASES:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # both sides warn on empty lists
            ours = note_scores((ri, rp), (ei, ep), with_offsets=with_offsets)
            # reference: mir_eval.transcription.precision_recall_f1_overlap
            theirs = mir_eval.transcription.precision_recall_f1_overlap(
                ri, to_hz(rp), ei, to_hz(ep), offset_ratio=0.2 if with_offsets else None
            )
        got = (ours.precision, ours.recall, ours.f_measure, ours.average_overlap_ratio)
        np.testing.assert_allclose(got, theirs, rtol=0, atol=1e-9)


def reference_frames(intervals, pitches, n_frames):
    """Slow sampler in exact decimal arithmetic: a note covers frame k when onset <= k*hop < offset.

    Times are taken to the nanosecond first, so that 0.68 + 0.05 (= 0.7300000000000001
    in binary floating point) counts as 0.73 s, the time the writer meant.
    """
    notes = [(Decimal(f"{a:.9f}"), Decimal(f"{b:.9f}"), float(p)) for (a, b), p in zip(intervals, pitches)]
    step = Decimal(str(HOP))
    frames = []
    for k in range(n_frames):
        t = k * step
        frames.append(np.array(sorted({p for a, b, p in notes if a <= t < b})))
    return frames


def test_notes_to_frames_matches_decimal_sampling():
    for (ri, rp), _ in CASES[:150]:
        ours = notes_to_frames(ri, rp, hop=HOP)
        theirs = reference_frames(ri, rp, len(ours))
        assert len(ours) == len(theirs)
        for a, b in zip(ours, theirs):
            np.testing.assert_array_equal(a, b)
        if len(rp):
            # the grid reaches the last covered frame and no further
            assert ours[-1].size > 0


def test_frame_scores_equal_mir_eval_multipitch():
    checked = 0
    for (ri, rp), (ei, ep) in CASES:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            ours = frame_scores((ri, rp), (ei, ep), hop=HOP)
        n_frames = max(len(notes_to_frames(ri, rp, hop=HOP)), len(notes_to_frames(ei, ep, hop=HOP)))
        if n_frames == 0:
            assert (ours.precision, ours.recall, ours.accuracy) == (0.0, 0.0, 0.0)
            continue
        times = np.arange(n_frames) * HOP
        ref_f = [to_hz(f) for f in reference_frames(ri, rp, n_frames)]
        est_f = [to_hz(f) for f in reference_frames(ei, ep, n_frames)]
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            # reference: mir_eval.multipitch.metrics -> (precision, recall, accuracy, ...)
            theirs = mir_eval.multipitch.metrics(times, ref_f, times, est_f)[:3]
        np.testing.assert_allclose((ours.precision, ours.recall, ours.accuracy), theirs, rtol=0, atol=1e-9)
        # F-measure from precision and recall, as mir_eval.util.f_measure
        np.testing.assert_allclose(
            ours.f_measure, mir_eval.util.f_measure(ours.precision, ours.recall), rtol=0, atol=1e-12
        )
        checked += 1
    assert checked > 300


def test_onset_exactly_at_tolerance_matches():
    ref = np.array([[1.0, 2.0]]), np.array([60.0])
    for shift, expected in ((0.05, 1), (-0.05, 1), (0.0501, 0), (0.04999, 1)):
        est = np.array([[1.0 + shift, 2.0]]), np.array([60.0])
        ours = match_notes(*ref, *est, offset_ratio=None)
        # reference: mir_eval.transcription.match_notes (distance rounded to 4 decimals, then <=)
        theirs = mir_eval.transcription.match_notes(ref[0], to_hz(ref[1]), est[0], to_hz(est[1]), offset_ratio=None)
        assert len(ours) == len(theirs) == expected
        # strict comparison (<) rejects the exact 50 ms case, as mir_eval strict=True
        assert len(match_notes(*ref, *est, offset_ratio=None, strict=True)) == len(
            mir_eval.transcription.match_notes(
                ref[0], to_hz(ref[1]), est[0], to_hz(est[1]), offset_ratio=None, strict=True
            )
        )


def test_offset_tolerance_is_max_of_ratio_and_minimum():
    # 2 s note: tolerance 0.4 s; 0.1 s note: tolerance 0.05 s (mir_eval/MIREX rule)
    ref = np.array([[0.0, 2.0], [3.0, 3.1]]), np.array([60.0, 62.0])
    est = np.array([[0.0, 2.4], [3.0, 3.15]]), np.array([60.0, 62.0])
    assert match_notes(*ref, *est) == [(0, 0), (1, 1)]
    est_late = np.array([[0.0, 2.41], [3.0, 3.16]]), np.array([60.0, 62.0])
    assert match_notes(*ref, *est_late) == []
    theirs = mir_eval.transcription.match_notes(ref[0], to_hz(ref[1]), est[0], to_hz(est[1]))
    assert [(int(i), int(j)) for i, j in theirs] == [(0, 0), (1, 1)]


def test_pitch_exactly_fifty_cents_matches_in_midi_space():
    # 100 cents per semitone (equal temperament); a quarter tone apart is exactly
    # the 50-cent tolerance, which `<=` includes. mir_eval works in Hz, where the
    # round-off of log2 decides this one case, so we pin our own rule here.
    ref = np.array([[0.0, 1.0]]), np.array([60.0])
    assert match_notes(*ref, np.array([[0.0, 1.0]]), np.array([60.5])) == [(0, 0)]
    assert match_notes(*ref, np.array([[0.0, 1.0]]), np.array([60.51])) == []
    assert match_notes(*ref, np.array([[0.0, 1.0]]), np.array([60.5]), strict=True) == []


def test_pitch_ignored_finds_wrong_pitch_partners():
    ref = np.array([[0.0, 0.5], [0.5, 1.0]]), np.array([60.0, 62.0])
    est = np.array([[0.01, 0.5], [0.52, 1.0]]), np.array([61.0, 62.0])
    assert match_notes(*ref, *est) == [(1, 1)]
    assert match_notes(*ref, *est, pitch_tolerance=None) == [(0, 0), (1, 1)]
    hits = candidate_matrix(*ref, *est, pitch_tolerance=None, offset_ratio=None)
    assert hits.shape == (2, 2) and hits[0, 0] and not hits[0, 1]


def test_maximum_matching_is_maximum_on_random_graphs():
    rng = np.random.default_rng(7)
    for _ in range(200):
        hits = rng.random((int(rng.integers(1, 15)), int(rng.integers(1, 15)))) < rng.uniform(0.05, 0.5)
        pairs = maximum_matching(hits)
        # reference: scipy.sparse.csgraph.maximum_bipartite_matching (Hopcroft-Karp) gives the size
        size = int((maximum_bipartite_matching(csr_matrix(hits), perm_type="column") >= 0).sum())
        assert len(pairs) == size
        assert all(hits[i, j] for i, j in pairs)
        assert len({i for i, _ in pairs}) == len({j for _, j in pairs}) == len(pairs)
        # and the very pairs of mir_eval's implementation on the same graph
        graph = {}
        for i, j in zip(*np.nonzero(hits)):
            graph.setdefault(j, []).append(i)
        assert pairs == [(int(i), int(j)) for i, j in sorted(mir_eval.util._bipartite_match(graph).items())]


def test_long_chain_does_not_recurse():
    # 3000 repeated notes 40 ms apart, estimate 30 ms late: each estimate is a
    # candidate for two references, a chain as long as the piece
    onsets = np.arange(3000) * 0.04
    ref = np.column_stack([onsets, onsets + 0.03]), np.full(3000, 60.0)
    est = np.column_stack([onsets + 0.03, onsets + 0.06]), np.full(3000, 60.0)
    pairs = match_notes(*ref, *est, offset_ratio=None)
    assert len(pairs) == 3000


def test_metrics_invariant_to_note_order():
    rng = np.random.default_rng(3)
    for (ri, rp), (ei, ep) in CASES[:100]:
        if len(rp) == 0 or len(ep) == 0:
            continue
        order = rng.permutation(len(ep))
        a = note_scores((ri, rp), (ei, ep), with_offsets=True)
        b = note_scores((ri, rp), (ei[order], ep[order]), with_offsets=True)
        assert (a.precision, a.recall, a.n_matched) == (b.precision, b.recall, b.n_matched)
        fa, fb = frame_scores((ri, rp), (ei, ep)), frame_scores((ri, rp), (ei[order], ep[order]))
        assert fa == fb


def test_empty_lists_warn_and_score_zero():
    notes = [Note(0.0, 1.0, 60)]
    for ref, est in (([], notes), (notes, []), ([], [])):
        with pytest.warns(UserWarning, match="empty"):
            scores = note_scores(ref, est, with_offsets=False)
        assert (scores.precision, scores.recall, scores.f_measure, scores.average_overlap_ratio) == (0, 0, 0, 0)
        with pytest.warns(UserWarning, match="empty"):
            result = evaluate_notes(ref, est)
        assert result["onset.f_measure"] == 0.0 and result["frame.accuracy"] == 0.0


def test_identical_notes_score_one():
    notes = [Note(0.0, 0.5, 60), Note(0.5, 1.0, 64), Note(0.5, 1.5, 67)]
    result = evaluate_notes(notes, notes)
    for key in ("onset", "onset_offset"):
        for metric in ("precision", "recall", "f_measure", "average_overlap_ratio"):
            assert result[f"{key}.{metric}"] == 1.0
    assert result["frame.accuracy"] == result["frame.f_measure"] == 1.0
    assert result["n_reference"] == result["n_estimate"] == result["onset.n_matched"] == 3


def test_evaluate_notes_keys_and_values_follow_the_parts():
    (ri, rp), (ei, ep) = CASES[11]
    ref = [Note(a, b, int(p)) for (a, b), p in zip(ri, np.round(rp))]
    est = [Note(a, b, int(p)) for (a, b), p in zip(ei, np.round(ep))]
    result = evaluate_notes(ref, est)
    expected = {
        "n_reference", "n_estimate",
        *(f"{k}.{m}" for k in ("onset", "onset_offset")
          for m in ("precision", "recall", "f_measure", "average_overlap_ratio", "n_matched")),
        *(f"frame.{m}" for m in ("precision", "recall", "accuracy", "f_measure", "n_true_positive",
                                 "n_reference", "n_estimate")),
    }
    assert set(result) == expected
    ri2 = np.array([[n.onset, n.offset] for n in ref]).reshape(-1, 2)
    ei2 = np.array([[n.onset, n.offset] for n in est]).reshape(-1, 2)
    theirs = mir_eval.transcription.precision_recall_f1_overlap(
        ri2, to_hz([n.pitch for n in ref]), ei2, to_hz([n.pitch for n in est])
    )
    # reference: mir_eval.transcription.precision_recall_f1_overlap (default offset_ratio=0.2)
    np.testing.assert_allclose(
        [result[f"onset_offset.{m}"] for m in ("precision", "recall", "f_measure", "average_overlap_ratio")],
        theirs, rtol=0, atol=1e-9,
    )


def test_bad_input_messages():
    with pytest.raises(ValueError, match="look like Hz"):
        match_notes([[0, 1]], [440.0], [[0, 1]], [60])
    with pytest.raises(ValueError, match=r"shape \(n, 2\)"):
        match_notes([0, 1, 2], [60], [[0, 1]], [60])
    with pytest.raises(ValueError, match="positive duration"):
        match_notes([[1, 1]], [60], [[0, 1]], [60])
    with pytest.raises(TypeError, match="must be a Note"):
        note_scores([(0, 1, 60)], [Note(0, 1, 60)], with_offsets=False)
    with pytest.raises(ValueError, match="onset_tolerance"):
        match_notes([[0, 1]], [60], [[0, 1]], [60], onset_tolerance=-1)
    with pytest.raises(ValueError, match="hop"):
        frame_scores([Note(0, 1, 60)], [Note(0, 1, 60)], hop=0)
