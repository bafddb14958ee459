"""The shared findings-to-planted matching (tests/support/matching.py)."""

from support.matching import f_measure, match_findings


def test_one_to_one_and_nearest_in_time():
    planted = [{"kind": "missed", "time": 1.0, "expected_pitch": 60},
               {"kind": "missed", "time": 1.2, "expected_pitch": 60}]
    found = [{"kind": "missed", "time": 1.15, "expected_pitch": 60}]
    result = match_findings(found, planted)
    assert result.pairs == ((1, 0),) and result.missed_planted == (0,)


def test_maximum_matching_not_greedy():
    # a greedy pass would give finding 0 to planted 0 (nearest) and leave planted 1 unmatched;
    # a maximum bipartite matching (as mir_eval pairs notes) matches both
    planted = [{"kind": "early", "time": 1.0, "expected_pitch": 62},
               {"kind": "early", "time": 1.3, "expected_pitch": 62}]
    found = [{"kind": "early", "time": 1.1, "expected_pitch": 62},
             {"kind": "early", "time": 0.8, "expected_pitch": 62}]
    assert match_findings(found, planted).hits == 2


def test_pitch_roles_kinds_linked_and_uncertain():
    planted = [{"kind": "wrong_pitch", "time": 2.0, "expected_pitch": 64, "played_pitch": 65}]
    wrong_played = [{"kind": "wrong_pitch", "time": 2.0, "expected_pitch": 64, "played_pitch": 66}]
    assert match_findings(wrong_played, planted).hits == 0
    ok = {"kind": "wrong_pitch", "time": 2.1, "expected_pitch": 64, "played_pitch": 65}
    detail = {"kind": "late", "time": 2.5, "expected_pitch": 67, "linked_to": 3}
    unsure = {"kind": "extra", "time": 3.0, "played_pitch": 70, "status": "check_by_ear"}
    result = match_findings([ok, detail, unsure], planted)
    assert result.hits == 1 and result.n_found == 1
    assert match_findings([ok, detail, unsure], planted, count_linked=True, count_uncertain=True).n_found == 3


def test_passages_overlap():
    planted = [{"kind": "rushed", "time": 4.0, "start_s": 4.0, "end_s": 8.0}]
    assert match_findings([{"kind": "rushed", "time": 5.0, "end_time": 9.0}], planted).hits == 1
    assert match_findings([{"kind": "rushed", "time": 8.5, "end_time": 9.0}], planted).hits == 0
    assert match_findings([{"kind": "dragged", "time": 5.0, "end_time": 9.0}], planted).hits == 0


def test_f_measure_conventions():
    assert f_measure(0, 0, 0) == (1.0, 1.0, 1.0)
    assert f_measure(0, 3, 0)[2] == 0.0
    p, r, f = f_measure(3, 4, 6)
    assert (p, r) == (0.75, 0.5) and abs(f - 0.6) < 1e-12


def test_passage_reported_by_its_notes_only_when_asked():
    # the demo's rule: an early note on a rushed passage's note (same pitch, in time) reports it
    planted = [{"kind": "rushed", "time": 4.0, "resume_time": 6.0,
                "notes": [{"time": 4.0, "pitch": 69}, {"time": 4.5, "pitch": 71}]}]
    early = {"kind": "early", "time": 4.45, "played_pitch": 71}
    assert match_findings([early], planted).hits == 0
    assert match_findings([early], planted, note_kinds_for_passages=("early",)).hits == 1
    other_pitch = {"kind": "early", "time": 4.45, "played_pitch": 72}
    assert match_findings([other_pitch], planted, note_kinds_for_passages=("early",)).hits == 0
