"""Notation benchmark: drafts compared with their parts, nothing engraved (issue #16).

For each correct take of the world corpus (``/work/cache/world/manifest.json``; built by
``fixtures/build_world.py``) the ``transcribe`` job writes a MusicXML draft with the part
and one without it. Each draft is read back through the project's part reader (the same
code that reads a user's part: ties merged, transposition undone) and compared with the
part, note by note, in quarter notes:

- with the part: share of the part's notes with a draft note of the same pitch at the
  same position (``place``), share of those with the same written length (``value``),
  share of bars with a triplet or a rest the part's bar lacks (``extra_bars``), the
  part's title and bar count kept;
- without the part (melodies and two-hand piano pieces): the same ``place`` and
  ``value`` after the best shift by whole bars (the meter and downbeat are estimated).

Usage::

    nice python tests/benchmarks/bench_notation.py --split heldout [--json out.json] [--limit N]

Targets (issue #16): place >= 0.97, value >= 0.90, extra_bars <= 0.02 with the part;
place >= 0.85, value >= 0.75 without it.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
import warnings
from collections import defaultdict
from fractions import Fraction
from pathlib import Path

WORLD = Path("/work/cache/world")
OUT = Path("/work/cache/notation_bench")


def _notes(reference) -> list[tuple[Fraction, int, Fraction]]:
    return [(Fraction(n.onset_quarters).limit_denominator(48), int(n.pitch),
             Fraction(n.duration_quarters).limit_denominator(48)) for n in reference.notes if not n.is_grace]


def compare_notes(part: list, draft: list, *, shift: Fraction = Fraction(0)) -> tuple[int, int]:
    """``(placed, valued)``: part notes with a draft note of the same pitch at the same
    position (after ``shift``), and those of them with the same length."""
    by_key = defaultdict(list)
    for on, p, d in draft:
        by_key[(on + shift, p)].append(d)
    placed = valued = 0
    for on, p, d in part:
        lengths = by_key.get((on, p))
        if lengths:
            placed += 1
            valued += int(d in lengths)
            lengths.remove(d) if d in lengths else lengths.pop()
    return placed, valued


def bar_marks(path: Path, *, hidden_rests: bool = False) -> list[tuple[bool, bool]]:
    """Per bar of the first part: (has a tuplet, has a rest), from music21's reading.

    ``hidden_rests``: a rest written with ``print-object="no"`` counts too (the world corpus'
    parts fill a phrase's breath with such rests: the part is silent there, so a draft's rest
    in that bar is not one the part lacks)."""
    from music21 import converter, note, stream

    score = converter.parse(str(path))
    out: dict[int, list[bool]] = {}
    for part in score.parts:
        for i, m in enumerate(part.getElementsByClass(stream.Measure)):
            flags = out.setdefault(i, [False, False])
            for el in m.recurse().notesAndRests:
                if el.duration.tuplets:
                    flags[0] = True
                if isinstance(el, note.Rest) and (hidden_rests or not el.style.hideObjectOnPrint):
                    flags[1] = True
    return [tuple(out[i]) for i in sorted(out)]


def extra_bars(part_path: Path, draft_path: Path) -> tuple[int, int]:
    """Bars of the draft with a tuplet or a rest that the part's bar lacks, and the bar count."""
    part, draft = bar_marks(part_path, hidden_rests=True), bar_marks(draft_path)
    bad = 0
    for i, (tup, rest) in enumerate(draft):
        ptup, prest = part[i] if i < len(part) else (False, False)
        bad += int((tup and not ptup) or (rest and not prest))
    return bad, len(draft)


def run_take(take: dict, *, with_part: bool) -> dict:
    from takescribe.jobs.pipeline import transcribe_file
    from takescribe.reference.part import load_reference

    part_path = WORLD / take["files"]["part"]
    draft_path = OUT / f"{take['id']}_{'part' if with_part else 'blind'}.musicxml"
    started = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        transcribe_file(WORLD / take["files"]["audio"], musicxml_path=draft_path, instrument=take["instrument"],
                        score_path=part_path if with_part else None, force=True)
        part = load_reference(part_path)
        draft = load_reference(draft_path)
    truth, got = _notes(part), _notes(draft)
    if with_part:
        placed, valued = compare_notes(truth, got)
    else:
        bar = Fraction(4 * part.time_signatures[0][1], part.time_signatures[0][2])
        placed, valued = max(compare_notes(truth, got, shift=k * bar) for k in range(-4, 5))
    bad, n_bars = extra_bars(part_path, draft_path)
    return {
        "id": take["id"], "family": take["family"], "instrument": take["instrument"], "with_part": with_part,
        "notes": len(truth), "placed": placed, "valued": valued, "extra_bars": bad, "bars": n_bars,
        "part_bars": len(part.measure_starts) - 1, "title_kept": draft.title == part.title and bool(part.title),
        "seconds": round(time.perf_counter() - started, 1),
    }


def summarize(rows: list[dict]) -> dict:
    groups = defaultdict(list)
    for r in rows:
        mode = "with_part" if r["with_part"] else "blind"
        groups[(mode, "all")].append(r)
        groups[(mode, r["family"])].append(r)
        groups[(mode, r["instrument"])].append(r)
    out = {}
    for (mode, name), rs in sorted(groups.items()):
        notes = sum(r["notes"] for r in rs)
        placed = sum(r["placed"] for r in rs)
        out[f"{mode}/{name}"] = {
            "takes": len(rs), "place": round(placed / max(notes, 1), 3),
            "value": round(sum(r["valued"] for r in rs) / max(placed, 1), 3),
            "extra_bars": round(sum(r["extra_bars"] for r in rs) / max(sum(r["bars"] for r in rs), 1), 3),
            "titles_kept": sum(r["title_kept"] for r in rs), "bar_count_kept": sum(r["bars"] == r["part_bars"] for r in rs),
        }
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--split", choices=("tuning", "heldout"), default="tuning")
    ap.add_argument("--json", type=Path)
    ap.add_argument("--limit", type=int, default=0, help="at most this many takes (0: all)")
    ap.add_argument("--blind-only", action="store_true")
    ap.add_argument("--part-only", action="store_true")
    ap.add_argument("--out", type=Path, help="folder of the drafts (default /work/cache/notation_bench)")
    args = ap.parse_args(argv)
    global OUT
    OUT = args.out or OUT
    manifest = json.loads((WORLD / "manifest.json").read_text())
    takes = [t for t in manifest["takes"] if t["correct"] and t["split"] == args.split]
    if args.limit:
        takes = takes[:args.limit]
    OUT.mkdir(parents=True, exist_ok=True)
    rows = []
    for take in takes:
        modes = []
        if not args.blind_only:
            modes.append(True)
        if not args.part_only and take["family"] in ("melody", "piano_two_hand"):
            modes.append(False)
        for with_part in modes:
            try:
                row = run_take(take, with_part=with_part)
            except Exception as exc:  # a failing take is reported, the run goes on
                print(f"{take['id']}: {type(exc).__name__}: {exc}", file=sys.stderr)
                continue
            rows.append(row)
            print(json.dumps(row), flush=True)
    summary = summarize(rows)
    for name, s in summary.items():
        print(f"{name:32s} {s}")
    if args.json:
        args.json.write_text(json.dumps({"split": args.split, "rows": rows, "summary": summary}, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
