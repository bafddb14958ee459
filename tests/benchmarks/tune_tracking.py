"""Tune the transcription settings on the *tuning* split of the fixture corpus; confirm on *held-out*.

Usage::

    python tests/benchmarks/tune_tracking.py [--split tuning|heldout] [--factorization JSON] [--grid JSON]

The factorization runs once per piece (its settings from ``--factorization``, a JSON object of
``TranscriptionSettings`` fields); the note-tracking grid (``--grid``, a JSON object of lists of
``TrackingSettings`` fields, or ``ghost_ratio``) is then swept on the cached activations with the
draft's own tracking (:func:`takescribe.transcription.blind.track_notes`). Prints the onset F-measure (mir_eval conventions,
through takescribe.evaluation.metrics) per category and setting, best first. Never tune on held-out.
"""

from __future__ import annotations

import argparse
import dataclasses
import itertools
import json
import sys
from pathlib import Path

import numpy as np

from takescribe.audio.load import load_audio
from takescribe.evaluation.metrics import note_scores
from takescribe.transcription.instruments import resolve_instrument
from takescribe.export.noteio import read_maps
from takescribe.transcription.blind import normalize_spectrogram, settings_for, track_notes, transcribe
from takescribe.transcription.settings import TrackingSettings
from takescribe.transcription.tracking import pitch_novelty

ROOT = Path(__file__).resolve().parents[2]
CORPUS = ROOT / "fixtures" / "corpus"
TRACKING_FIELDS = {f.name for f in dataclasses.fields(TrackingSettings)}


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--split", default="tuning", choices=("tuning", "heldout"))
    parser.add_argument("--factorization", default="{}")
    parser.add_argument("--grid", default='{"onset_threshold": [0.15, 0.2, 0.25]}')
    parser.add_argument("--category", default=None)
    parser.add_argument("--offsets", action="store_true", help="score onset+offset F-measure instead of onset only")
    args = parser.parse_args(argv)
    index = json.loads((CORPUS / "index.json").read_text())
    entries = [e for e in index if e["split"] == args.split and (args.category in (None, e["category"]))]
    fkw = json.loads(args.factorization)
    grid = json.loads(args.grid)
    cache = []
    for e in entries:
        y, sr = load_audio(CORPUS / e["files"]["audio"])
        preset = resolve_instrument(e["instrument_program"])
        settings = dataclasses.replace(settings_for(preset), **fkw)
        tr = transcribe(y, sr, instrument=preset, settings=settings)
        ref = read_maps(CORPUS / e["files"]["notes"])
        V, _ = normalize_spectrogram(tr.spectrogram.V)
        cache.append((e, tr, settings, ref, preset, pitch_novelty(V, tr.dictionary.W)))
        print(f"factorized {e['name']}", file=sys.stderr)
    rows = []
    for values in itertools.product(*grid.values()):
        kw = dict(zip(grid, values))
        per = {}
        for e, tr, settings, ref, preset, nov in cache:
            tracking_kw = {k: v for k, v in kw.items() if k in TRACKING_FIELDS}
            s = dataclasses.replace(settings.with_tracking(**tracking_kw),
                                    **{k: v for k, v in kw.items() if k not in TRACKING_FIELDS})
            notes = track_notes(tr.H, tr.dictionary.pitches, tr.spectrogram.frame_times, settings=s,
                                polyphonic=preset.polyphonic, novelty=nov if s.use_novelty else None)
            import warnings
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                per[e["name"]] = (e["category"], note_scores(ref, notes, with_offsets=args.offsets).f_measure)
        cats = {}
        for cat, f in per.values():
            cats.setdefault(cat, []).append(f)
        rows.append((kw, {c: float(np.mean(v)) for c, v in cats.items()}, per))
    rows.sort(key=lambda r: -np.mean(list(r[1].values())))
    for kw, cats, per in rows[:10]:
        print(json.dumps(kw), " ".join(f"{c}={v:.3f}" for c, v in sorted(cats.items())))
    kw, cats, per = rows[0]
    print("best, per piece:")
    for name, (cat, f) in per.items():
        print(f"  {cat:8s} {name:34s} {f:.3f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
