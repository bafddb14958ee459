"""Cheaper analysis settings against quality: blind transcription of a corpus split per variant.

Usage::

    python tests/benchmarks/bench_settings.py [--split tuning|heldout|all] [--json out.json] [--force]

Each variant changes the spectrogram (bins per semitone, hop) and/or the iterations of
each factorization pass; the spectrogram is computed here and handed to
:func:`takescribe.transcription.blind.transcribe`, so the package defaults stay untouched.
Printed per variant: mean onset and onset+offset F-measure (mir_eval conventions via
:func:`takescribe.evaluation.metrics.evaluate_notes`), and the CPU seconds of the transcription
per audio second (CPU rather than wall time, so other load on the machine matters less).
Only blind mode: score-informed transcription computes its own spectrogram.
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import sys
import time
import warnings
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
CORPUS = ROOT / "fixtures" / "corpus"

# (label, bins per semitone, hop length, iterations per pass)
VARIANTS = [
    ("default 3 bins/st, hop 256, 60 it", 3, 256, None),
    ("60 -> 30 iterations", 3, 256, 30),
    ("2 bins/semitone", 2, 256, None),
    ("hop 512", 3, 512, None),
    ("2 bins/st, 30 it", 2, 256, 30),
    ("hop 512, 30 it", 3, 512, 30),
]


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--split", choices=("tuning", "heldout", "all"), default="tuning")
    parser.add_argument("--json")
    parser.add_argument("--force", action="store_true")
    args = parser.parse_args(argv)

    from takescribe.evaluation.metrics import evaluate_notes
    from takescribe.export.noteio import read_maps
    from takescribe.jobs.pipeline import load_take
    from takescribe.features.spectrogram import compute_spectrogram, estimate_tuning
    from takescribe.transcription.blind import settings_for, transcribe

    entries = json.loads((CORPUS / "index.json").read_text())
    if args.split != "all":
        entries = [e for e in entries if e["split"] == args.split]
    takes = []
    for e in entries:
        y, sr = load_take(CORPUS / e["files"]["audio"])
        takes.append((e, y, sr, read_maps(CORPUS / e["files"]["notes"]), estimate_tuning(y, sr)))
    # warm-up (imports, compilation)
    transcribe(takes[0][1][: 2 * takes[0][2]], takes[0][2], instrument=0)

    results = []
    print(f"{'variant':36s} {'onset F':>8s} {'on+off F':>9s} {'CPU s / audio s':>16s}  per category (onset F)")
    for label, bins, hop, n_iter in VARIANTS:
        scores, cpu, audio, per_cat = [], 0.0, 0.0, {}
        for e, y, sr, truth, tuning in takes:
            settings = settings_for(e["instrument_program"])
            if n_iter is not None:
                settings = dataclasses.replace(settings, n_iter=n_iter)
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                c0 = time.process_time()
                spec = compute_spectrogram(y, sr, bins_per_semitone=bins, hop_length=hop, tuning=tuning)
                result = transcribe(y, sr, instrument=e["instrument_program"], settings=settings, spectrogram=spec)
                cpu += time.process_time() - c0
            audio += len(y) / sr
            s = evaluate_notes(truth, result.notes)
            scores.append((s["onset.f_measure"], s["onset_offset.f_measure"]))
            per_cat.setdefault(e["category"], []).append(s["onset.f_measure"])
        mean = np.mean(scores, axis=0)
        cats = {c: float(np.mean(v)) for c, v in per_cat.items()}
        results.append({"variant": label, "bins_per_semitone": bins, "hop_length": hop, "n_iter": n_iter,
                        "onset_f": float(mean[0]), "onset_offset_f": float(mean[1]), "cpu_rtf": cpu / audio,
                        "categories": cats})
        print(f"{label:36s} {mean[0]:8.3f} {mean[1]:9.3f} {cpu / audio:16.3f}  "
              + " ".join(f"{c} {v:.3f}" for c, v in cats.items()), flush=True)
    if args.json:
        from takescribe.safeio import write_text

        write_text(args.json, json.dumps({"split": args.split, "variants": results}, indent=1) + "\n",
                   force=args.force)
    return 0


if __name__ == "__main__":
    sys.exit(main())
