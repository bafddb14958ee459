"""Finding detection through the whole pipeline (score-informed transcription + alignment + comparison).

Fixtures: the held-out deviation pieces (piano waltz, violin minuet) in fixtures/deviations,
rendered with sampled GM soundfonts; injected deviations are the ground truth. A finding
matches an injected deviation by kind, pitch and time within 0.25 s; findings linked to a
hesitation or restart belong to that one event. Measured on 2026-12-02: F = 0.89 (17 of 18
found, 20 findings), false findings per minute on the correct takes 0.0 (piano), 4.2 (piano,
slower take) and 0.0 (violin); the floors are those figures minus 0.05 (or one more false
finding for the rate). The issue's targets (F >= 0.90 for every kind, <= 1 false finding a
minute) are not met on all pieces yet (over all 19 deviation takes F = 0.77, the cello and
the piano march weakest); the gap comes from the transcription (chord notes missed, repeated
bowed notes merged), see
tests/benchmarks/bench_findings.py --ground-truth for the comparison alone (F = 1.0).
"""

from __future__ import annotations

import json
import warnings

import pytest

from takescribe.audio import load_audio
from takescribe.pipeline import compare_take
from takescribe.score import load_reference

from conftest import FIXTURES

DEV = FIXTURES / "deviations"
PIECES = ("dev_piano_waltz", "dev_violin_minuet")
PITCHED = {"wrong_pitch": ("expected_pitch", "played_pitch"), "missed": ("expected_pitch",),
           "extra": ("played_pitch",), "early": ("expected_pitch",), "late": ("expected_pitch",)}


def _match(found, injected, tolerance=0.25):
    used, hits = set(), 0
    for d in injected:
        candidates = [
            (abs(f["time"] - d["time"]), j) for j, f in enumerate(found)
            if j not in used and f["kind"] == d["kind"] and abs(f["time"] - d["time"]) <= tolerance
            and all(f.get(key) == d.get(key) for key in PITCHED.get(d["kind"], ()))
        ]
        if candidates:
            used.add(min(candidates)[1])
            hits += 1
    return hits


@pytest.fixture(scope="module")
def results():
    index = [e for e in json.loads((DEV / "index.json").read_text()) if e["piece"] in PIECES]
    out = []
    for e in index:
        reference = load_reference(DEV / e["files"]["score"])
        y, sr = load_audio(DEV / e["files"]["audio"])
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            comparison, _, _ = compare_take(y, sr, reference, instrument=e["instrument_program"])
        found = [f for f in comparison.to_json()["findings"] if f.get("linked_to") is None]
        injected = json.loads((DEV / e["files"]["deviations"]).read_text())
        out.append((e, len(y) / sr, found, injected))
    return out


def test_finding_detection_f_measure(results):
    hits = sum(_match(found, injected) for _, _, found, injected in results)
    n_found = sum(len(found) for _, _, found, _ in results)
    n_injected = sum(len(injected) for _, _, _, injected in results)
    precision, recall = hits / n_found, hits / n_injected
    f = 2 * precision * recall / (precision + recall)
    assert n_injected >= 15
    assert f >= 0.84, f"precision {precision:.2f} recall {recall:.2f} F {f:.2f}"
    assert recall >= 0.89


def test_false_findings_on_correct_takes(results):
    for e, seconds, found, injected in results:
        if injected:
            continue
        per_minute = len(found) / (seconds / 60)
        limit = 2.0 if e["instrument_program"] >= 8 else 9.0  # measured 0 (violin); 0 and 4.2 (piano)
        assert per_minute <= limit, f"{e['name']}: {per_minute:.1f} false findings per minute"
