"""The bundled demo: it runs, writes every file, finds the planted mistakes and little else.

The demo takes (``src/takescribe/data/demo``, rebuilt by ``fixtures/build_demo.py``) are
performances we invented, with mistakes planted at known places (``planted.json``). The
demo runs once per test session into a temporary folder (about 30 s on 2 cores).

Matching rule (a planted mistake is *found* when)
-------------------------------------------------
- ``wrong_pitch``: a ``wrong_pitch`` finding with the same expected and played pitch;
- ``missed``: a ``missed`` finding with the same expected pitch;
- ``extra``: an ``extra`` finding with the same played pitch;
- ``hesitation``: a ``hesitation`` finding;
- ``rushed`` (a few consecutive notes increasingly early): an ``early`` or ``late``
  finding on at least one of its notes (same pitch), or a ``rushed`` finding over the passage;

each within ``TIME_TOLERANCE`` (0.5 s) of the planted time (for the rushed passage: of that
note's played onset). 0.5 s is about one beat at the demo tempi: a teacher reading the
report would look at the same spot (common practice, no source).
The matching is tests/support/matching.py's (one finding per planted mistake and the reverse),
with this module's tolerance, every finding counted, and early/late notes allowed for a passage.

"Nothing else of significance"
------------------------------
Every finding not used to match a planted mistake is *unplanned*, except findings that
describe a planted mistake in other words: those linked (``linked_to``) to a matched
finding, and timing findings (``early``, ``late``, ``hesitation``) between 0.5 s before a
rushed passage and 0.5 s after the player is back in time (``resume_time``), since
returning to the pulse after rushing is itself a timing event. Every kind counts, held
notes included. At most ``max(1, floor(duration / 30 s))`` unplanned findings are allowed per
take: about one per half minute of music.
"""

from __future__ import annotations

import json
import math

import music21
import pytest

from support.matching import match_findings
from takescribe.cli import build_parser, main
from takescribe.jobs.demo import (CAUTION, DEMO_STUDENTS, DRAFT_FILES, DemoResult, demo_bundle, format_demo_summary,
                             load_scenario, run_demo)
from takescribe.errors import EXIT_OUTPUT, OutputError
from takescribe.export.midi import read_midi_notes
from takescribe.export.noteio import read_maps
from takescribe.jobs.pipeline import REPORT_FILES, format_findings_counts
from takescribe.reference.part import load_reference

TIME_TOLERANCE = 0.5
UNPLANNED_PER_SECONDS = 30.0
TIMING_KINDS = ("early", "late", "hesitation")


@pytest.fixture(scope="module")
def demo(tmp_path_factory) -> DemoResult:
    return run_demo(tmp_path_factory.mktemp("demo") / "out")


@pytest.fixture(scope="module")
def planted() -> dict:
    with demo_bundle() as bundle:
        return {s: json.loads((bundle / s / "planted.json").read_text()) for s in DEMO_STUDENTS}


def _match(plans: list[dict], findings: list[dict]):
    """The matching of tests/support/matching.py under this module's rule (module docstring):
    every finding counts, a rushed passage is reported by an early or late note of it."""
    return match_findings(findings, plans, time_tolerance=TIME_TOLERANCE, count_linked=True,
                          count_uncertain=True, note_kinds_for_passages=("early", "late"))


def _unplanned(plans: list[dict], findings: list[dict]) -> list[dict]:
    matched = {id(findings[j]) for _, j in _match(plans, findings).pairs}
    matched_ids = {f["id"] for f in findings if id(f) in matched}
    rush_spans = [(p["notes"][0]["time"] - TIME_TOLERANCE, p["resume_time"] + TIME_TOLERANCE)
                  for p in plans if p["kind"] == "rushed"]
    out = []
    for f in findings:
        if id(f) in matched or f.get("linked_to") in matched_ids:
            continue
        if f["kind"] in TIMING_KINDS and any(a <= f["time"] <= b for a, b in rush_spans):
            continue
        out.append(f)
    return out


def _describe(findings: list[dict]) -> str:
    return "; ".join(f"{f['kind']} at {f['time']:.2f} s (bar {f['measure']}, beat {f['beat']}, "
                     f"expected {f['expected_pitch']}, played {f['played_pitch']})" for f in findings)


# --------------------------------------------------------------------------- the bundle


@pytest.mark.parametrize("student", DEMO_STUDENTS)
def test_bundle_ground_truth_is_consistent_with_the_part(student, planted):
    """played.txt = the part's notes (as music21 reads the MusicXML) minus missed plus extra,
    and every planted wrong/extra pitch is in played.txt at its planted time."""
    with demo_bundle() as bundle:
        played = read_maps(bundle / student / "played.txt")
        # music21 is the outside reader of the MusicXML (tied notes merged by stripTies)
        score = music21.converter.parse(str(bundle / student / "part.musicxml")).stripTies()
        n_part = sum(len(el.pitches) for el in score.recurse().notes)
        scenario = load_scenario(bundle)
    plans = planted[student]
    n_missed = sum(p["kind"] == "missed" for p in plans)
    n_extra = sum(p["kind"] == "extra" for p in plans)
    assert len(played) == n_part - n_missed + n_extra
    for p in plans:
        if p["kind"] in ("wrong_pitch", "extra"):
            assert any(n.pitch == p["played_pitch"] and abs(n.onset - p["time"]) < 1e-3 for n in played), p
        if p["kind"] == "rushed":
            for q in p["notes"]:
                assert q["deviation"] < 0
                assert any(n.pitch == q["pitch"] and abs(n.onset - q["time"]) < 1e-3 for n in played), q
    entry = next(e for e in scenario["students"] if e["folder"] == student)
    assert entry["notes_in_part"] == n_part and entry["notes_played"] == len(played)


# Sharps of a key signature in order of fifths (common practice, no source).
_SHARP_ORDER, _FLAT_ORDER = "FCGDAEB", "BEADGCF"


def _needless_accidentals(path) -> list[str]:
    """Accidentals written where the key signature and the bar already give the pitch."""
    from lxml import etree

    needless = []
    for part in etree.parse(str(path)).getroot().iter("part"):
        signature: dict[str, int] = {}
        for measure in part.iter("measure"):
            fifths = measure.findtext("attributes/key/fifths")
            if fifths is not None:
                n = int(fifths)
                signature = {s: 1 for s in _SHARP_ORDER[:n]} if n >= 0 else {s: -1 for s in _FLAT_ORDER[:-n]}
            in_bar: dict[tuple[str, str, str], int] = {}
            for note in measure.iter("note"):
                if note.find("pitch") is None:
                    continue
                step, octave = note.findtext("pitch/step"), note.findtext("pitch/octave")
                alter = int(float(note.findtext("pitch/alter") or 0))
                where = (step, octave, note.findtext("staff") or "1")
                current = in_bar.get(where, signature.get(step, 0))
                if note.find("accidental") is not None and alter == current:
                    needless.append(f"bar {measure.get('number')} {step}{octave}")
                in_bar[where] = alter
    return needless


@pytest.mark.parametrize("student", DEMO_STUDENTS)
def test_bundle_part_writes_no_needless_accidentals(student):
    """Issue #16: the demo part carried natural signs no engraver would write."""
    with demo_bundle() as bundle:
        assert _needless_accidentals(bundle / student / "part.musicxml") == []


def test_bundle_is_small():
    with demo_bundle() as bundle:
        total = sum(p.stat().st_size for p in bundle.rglob("*") if p.is_file())
    assert total < 3_000_000, f"the demo bundle is {total / 1e6:.1f} MB; keep it to a few MB"


# --------------------------------------------------------------------------- the run


def test_demo_writes_reports_and_drafts(demo):
    assert [s.folder for s in demo.students] == list(DEMO_STUDENTS)
    for s in demo.students:
        folder = demo.output_dir / s.folder
        for name in REPORT_FILES + DRAFT_FILES:
            assert (folder / name).is_file() and (folder / name).stat().st_size > 0, name
        doc = json.loads((folder / "findings.json").read_text())
        assert doc["summary"]["notes_in_part"] == s.notes_in_part
        assert len(doc["findings"]) == len(s.findings)
        assert s.report_html == folder / "report.html"
        # the draft MIDI holds the transcription: as many notes as the report's draft
        assert len(read_midi_notes(folder / "draft.mid")) > 0.5 * s.notes_in_part
        # the MusicXML draft reads back as a part (our reader; music21 reads it too)
        assert len(load_reference(folder / "draft.musicxml").notes) > 0.5 * s.notes_in_part
        assert music21.converter.parse(str(folder / "draft.musicxml")).recurse().notes


def test_draft_musicxml_is_valid_musicxml_4(demo, musicxml_schema):
    from lxml import etree

    # reference: the official MusicXML 4.0 XSD (shared standards folder, see conftest)
    schema = musicxml_schema
    for s in demo.students:
        for name in ("draft.musicxml", "annotated.musicxml"):
            doc = etree.parse(str(demo.output_dir / s.folder / name))
            assert schema.validate(doc), f"{s.folder}/{name}: {schema.error_log.last_error}"


@pytest.mark.parametrize("student", DEMO_STUDENTS)
def test_every_planted_mistake_is_found(demo, planted, student):
    result = next(s for s in demo.students if s.folder == student)
    findings = list(result.findings)
    missing = [planted[student][i] for i in _match(planted[student], findings).missed_planted]
    assert not missing, (
        f"{student}: planted mistakes not reported: "
        + "; ".join(f"{p['kind']} at {p['time']:.2f} s (bar {p['measure']}, beat {p['beat']})" for p in missing)
        + f". Findings: {_describe(findings)}")


@pytest.mark.parametrize("student", DEMO_STUDENTS)
def test_nothing_else_of_significance(demo, planted, student):
    result = next(s for s in demo.students if s.folder == student)
    unplanned = _unplanned(planted[student], list(result.findings))
    allowed = max(1, math.floor(result.duration / UNPLANNED_PER_SECONDS))
    assert len(unplanned) <= allowed, (
        f"{student}: {len(unplanned)} unplanned findings in {result.duration:.0f} s (allowed {allowed}): "
        + _describe(unplanned))


def test_summary_names_students_reports_and_caution(demo):
    text = format_demo_summary(demo)
    for s in demo.students:
        assert s.student in text and str(s.report_html) in text and s.piece in text
        # findings counted by kind, no grade-like share of notes right (issue #18)
        assert format_findings_counts(s.counts) in text
    assert "played as written" not in text and "%" not in text
    assert text.rstrip().endswith(CAUTION)


# --------------------------------------------------------------------------- refusals and CLI


def test_refuses_to_overwrite_without_force(demo):
    with pytest.raises(OutputError, match="already exists"):
        run_demo(demo.output_dir)


def test_cli_demo_refuses_existing_output_with_exit_code(demo, capsys):
    assert main(["demo", "-o", str(demo.output_dir), "--quiet"]) == EXIT_OUTPUT
    assert "--force" in capsys.readouterr().err


def test_cli_demo_arguments():
    args = build_parser().parse_args(["demo"])
    assert (args.command, args.output, args.force) == ("demo", "demo-output", False)
    args = build_parser().parse_args(["demo", "-o", "elsewhere", "--force"])
    assert (args.output, args.force) == ("elsewhere", True)
