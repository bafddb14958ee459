"""Finding detection through the whole pipeline on the deviation takes.

Usage::

    python tests/benchmarks/bench_findings.py [--ground-truth] [--onsets]

For every take in fixtures/deviations, runs ``takescribe.jobs.pipeline.compare_take`` (score-informed
transcription, alignment, comparison) — or, with ``--ground-truth``, compares the played
ground-truth notes, to separate comparison errors from transcription errors — and matches the
findings to the injected deviations by kind, pitch and time within 0.25 s. Prints per take and
per kind precision, recall and F-measure, and false findings per minute on the correct takes.
``--onsets`` adds, per take, the onset F-measure of the score-informed draft against the take's
played notes (mir_eval conventions through takescribe.evaluation.metrics: 50 ms, 50 cents).
"""

from __future__ import annotations

import argparse
import collections
import json
import sys
import warnings
from pathlib import Path

from takescribe.alignment.align import align_reference
from takescribe.audio.load import load_audio
from takescribe.comparison.compare import compare_notes
from takescribe.evaluation.metrics import note_scores
from takescribe.export.noteio import read_maps
from takescribe.jobs.pipeline import compare_take
from takescribe.reference.part import load_reference

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT / "tests"))
from support.matching import match_findings  # noqa: E402  (the one matching, shared with the tests)
DEV = ROOT / "fixtures" / "deviations"


def match(found, injected):
    """(planted index, finding index) pairs of the shared matching (tests/support/matching.py)."""
    return list(match_findings(found, injected).pairs)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--ground-truth", action="store_true")
    parser.add_argument("--onsets", action="store_true", help="also print the informed draft's onset F per take")
    args = parser.parse_args(argv)
    index = json.loads((DEV / "index.json").read_text())
    per_kind = collections.defaultdict(lambda: [0, 0, 0])  # hits, found, injected
    false_per_minute = []
    for e in index:
        reference = load_reference(DEV / e["files"]["score"])
        y, sr = load_audio(DEV / e["files"]["audio"])
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            if args.ground_truth:
                comparison = compare_notes(reference, align_reference(y, sr, reference, warn=False),
                                           read_maps(DEV / e["files"]["notes"]),
                                           judge_durations=e["instrument_program"] >= 8)
            else:
                comparison, result, _ = compare_take(y, sr, reference, instrument=e["instrument_program"])
                if args.onsets:
                    f = note_scores(read_maps(DEV / e["files"]["notes"]), result.notes, with_offsets=False).f_measure
                    print(f"{e['name']:30s} informed draft onset F {f:.3f}")
        # findings linked to a hesitation or a restart are part of that one event (the teacher reads one)
        found = [f for f in comparison.to_json()["findings"] if f.get("linked_to") is None]
        injected = json.loads((DEV / e["files"]["deviations"]).read_text())
        hits = match(found, injected)
        for i, j in hits:
            per_kind[injected[i]["kind"]][0] += 1
        for f in found:
            per_kind[f["kind"]][1] += 1
        for d in injected:
            per_kind[d["kind"]][2] += 1
        if not injected:
            false_per_minute.append(len(found) / (len(y) / sr / 60))
        extra = [f"{f['kind']}@{f['time']:.2f}" for j, f in enumerate(found) if j not in {h[1] for h in hits}]
        missing = [f"{d['kind']}@{d['time']:.2f}" for i, d in enumerate(injected) if i not in {h[0] for h in hits}]
        print(f"{e['name']:30s} injected {len(injected):2d} found {len(found):2d} hits {len(hits):2d}"
              f"  unmatched findings: {' '.join(extra) or '-'}  not found: {' '.join(missing) or '-'}")
    total = [sum(v[k] for v in per_kind.values()) for k in range(3)]
    print("\nkind          precision recall  F")
    for kind, (h, f, i) in sorted(per_kind.items()):
        p = h / f if f else 1.0
        r = h / i if i else 1.0
        print(f"{kind:12s} {p:9.3f} {r:6.3f} {2 * p * r / (p + r) if p + r else 0:6.3f}   ({h} hits, {f} found, {i} injected)")
    p, r = total[0] / max(total[1], 1), total[0] / max(total[2], 1)
    print(f"overall      {p:9.3f} {r:6.3f} {2 * p * r / (p + r) if p + r else 0:6.3f}")
    print(f"false findings per minute on correct takes: {', '.join(f'{x:.1f}' for x in false_per_minute)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
