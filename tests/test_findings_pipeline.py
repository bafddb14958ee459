"""Finding detection through the whole pipeline (score-informed transcription + alignment + comparison).

Fixtures: the held-out deviation pieces (piano waltz, violin minuet) in fixtures/deviations,
rendered with sampled GM soundfonts; injected deviations are the ground truth. A finding
matches an injected deviation by kind, pitch and time within 0.25 s; findings linked to a
hesitation or restart belong to that one event. Measured on 2026-12-02 (third session): on the
held-out pieces F = 0.97 (17 of 18 found, 17 findings), no false finding on the correct
takes; over all 19 deviation takes F = 0.966, every kind >= 0.889. The floors are those figures
minus 0.05 (or one more false finding for the rate). tests/benchmarks/bench_findings.py prints the
figures per take; with --ground-truth it scores the comparison alone (F = 1.0).
"""

from __future__ import annotations

import json
import warnings

import pytest

from takescribe.audio.load import load_audio
from takescribe.jobs.pipeline import compare_take
from takescribe.reference.part import load_reference

from conftest import FIXTURES
from support.matching import match_findings

DEV = FIXTURES / "deviations"
PIECES = ("dev_piano_waltz", "dev_violin_minuet")


def _match(found, injected):
    """Hits of the shared matching of findings to planted mistakes (tests/support/matching.py)."""
    return match_findings(found, injected).hits


@pytest.fixture(scope="module")
def all_results():
    index = json.loads((DEV / "index.json").read_text())
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


@pytest.fixture(scope="module")
def results(all_results):
    return [r for r in all_results if r[0]["piece"] in PIECES]


def test_finding_detection_f_measure(results):
    hits = sum(_match(found, injected) for _, _, found, injected in results)
    n_found = sum(len(found) for _, _, found, _ in results)
    n_injected = sum(len(injected) for _, _, _, injected in results)
    precision, recall = hits / n_found, hits / n_injected
    f = 2 * precision * recall / (precision + recall)
    assert n_injected >= 15
    assert f >= 0.89, f"precision {precision:.2f} recall {recall:.2f} F {f:.2f}"
    assert recall >= 0.89


def test_finding_detection_per_kind_on_every_deviation_take(all_results):
    # the targets over all 19 takes (tuning and held-out pieces): F >= 0.90 overall
    # and >= 0.85 per kind; measured overall 0.956, lowest kind 0.889 (extra, missed), so the
    # per-kind floor is that minus 0.05
    per_kind = {}
    for _, _, found, injected in all_results:
        for kind in {d["kind"] for d in injected} | {f["kind"] for f in found}:
            hits = _match([f for f in found if f["kind"] == kind], [d for d in injected if d["kind"] == kind])
            counts = per_kind.setdefault(kind, [0, 0, 0])
            counts[0] += hits
            counts[1] += sum(f["kind"] == kind for f in found)
            counts[2] += sum(d["kind"] == kind for d in injected)
    total = [sum(c[i] for c in per_kind.values()) for i in range(3)]
    f_overall = 2 * total[0] / (total[1] + total[2])
    assert f_overall >= 0.90, per_kind
    for kind, (hits, n_found, n_injected) in per_kind.items():
        assert n_injected > 0, f"{kind}: {n_found} findings of a kind never injected"
        assert 2 * hits / (n_found + n_injected) >= 0.84, (kind, hits, n_found, n_injected)


def test_false_findings_on_correct_takes(results):
    for e, seconds, found, injected in results:
        if injected:
            continue
        # measured 0 on every correct and tempo take (all 19 deviation takes: 0 on all nine);
        # the floor allows one false finding in a take, at most 1 a minute over them all
        assert len(found) <= 1, f"{e['name']}: {len(found) / (seconds / 60):.1f} false findings per minute"
    correct = [(seconds, found) for _, seconds, found, injected in results if not injected]
    assert sum(len(found) for _, found in correct) / (sum(seconds for seconds, _ in correct) / 60) <= 1.0
