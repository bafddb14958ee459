"""Sub-harmonic check of one-line drafts (takescribe.transcription.octaves, issue #20).

Outside references: the harmonic series (partial k of a note at f0 lies at k·f0, i.e.
12·log2(k) semitones above it; acoustics textbooks, from memory) and mir_eval's onset
F-measure (50 ms window) on two held-out takes of the world corpus (fixtures/world_heldout,
copied from fixtures/build_world.py's held-out split; never used for tuning).
"""

from __future__ import annotations

import json
import warnings
from pathlib import Path

import numpy as np
import pytest

from takescribe.audio.load import load_audio
from takescribe.evaluation.metrics import evaluate_notes
from takescribe.export.noteio import read_maps
from takescribe.features.spectrogram import ANALYSIS_SR, compute_spectrogram
from takescribe.notes import Note
from takescribe.transcription.blind import transcribe
from takescribe.transcription.octaves import correct_subharmonics, subharmonic_scores

WORLD_HELDOUT = Path(__file__).resolve().parent.parent / "fixtures" / "world_heldout"


def _tone(pitch: int, partials: dict[int, float], seconds: float = 1.0) -> np.ndarray:
    """A steady harmonic tone: amplitude of partial k (harmonic series) from ``partials``."""
    t = np.arange(int(seconds * ANALYSIS_SR)) / ANALYSIS_SR
    f0 = 440.0 * 2 ** ((pitch - 69) / 12)
    return sum(a * np.sin(2 * np.pi * k * f0 * t) for k, a in partials.items()).astype(np.float32) * 0.1


@pytest.mark.parametrize("divisor", [2, 3])
def test_weak_fundamental_note_moves_down_to_its_fundamental(divisor):
    # a note at q = 45 with its fundamental almost gone: its 2nd (or 3rd) partial dominates,
    # and its other partials lie where no partial of q + 12*log2(divisor) lies
    q = 45
    partials = {1: 0.02, 2: 1.0, 3: 1.0, 4: 0.6, 5: 0.6, 6: 0.4, 7: 0.3, 8: 0.2}
    spec = compute_spectrogram(_tone(q, partials), ANALYSIS_SR)
    p = q + int(round(12 * np.log2(divisor)))
    draft = [Note(0.1, 0.9, p, 80)]
    moved = correct_subharmonics(draft, spec.V, spec.frequencies, spec.frame_times, lowest=34, ratio=0.2,
                                 contrast=3.0)
    assert moved[0].pitch == q


def test_plain_harmonic_note_stays():
    # a note with its own full harmonic series: nothing sounds on a lower note's other partials
    p = 60
    spec = compute_spectrogram(_tone(p, {k: 1.0 / k for k in range(1, 9)}), ANALYSIS_SR)
    scores = subharmonic_scores(np.median(spec.V, axis=1), p,
                                69 + 12 * np.log2(spec.frequencies / 440.0), lowest=34)
    assert max(scores.values()) < 0.2
    draft = [Note(0.1, 0.9, p, 80)]
    assert correct_subharmonics(draft, spec.V, spec.frequencies, spec.frame_times, lowest=34, ratio=0.2,
                                contrast=3.0) == draft


def test_below_the_instrument_is_no_candidate():
    q, p = 45, 57
    spec = compute_spectrogram(_tone(q, {1: 0.02, 2: 1.0, 3: 1.0, 4: 0.6, 5: 0.6}), ANALYSIS_SR)
    draft = [Note(0.1, 0.9, p, 80)]
    assert correct_subharmonics(draft, spec.V, spec.frequencies, spec.frame_times, lowest=50, ratio=0.2,
                                contrast=3.0)[0].pitch >= 50


# measured on these held-out takes (onset F, mir_eval 50 ms): bassoon 0.674 (0.372 without the check), oboe
# 0.769 (0.410 without); floors about 0.05 below
FLOORS = {"line_bwv124_6_bass_t0": 0.62, "line_bwv122_6_soprano_t1": 0.72}


@pytest.mark.parametrize("take_id", sorted(FLOORS))
def test_double_reed_held_out_takes_keep_their_octave(take_id):
    take = json.loads((WORLD_HELDOUT / f"{take_id}.take.json").read_text())
    y, sr = load_audio(WORLD_HELDOUT / take["files"]["audio"])
    truth = read_maps(WORLD_HELDOUT / take["files"]["played"])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        notes = transcribe(y, sr, instrument=take["program"]).notes
    scores = evaluate_notes(truth, notes)  # mir_eval conventions
    assert scores["onset.f_measure"] >= FLOORS[take_id]
