"""Tests for takescribe.informed with real alignments from takescribe.align.

Outside references: mir_eval's note matching (precision / recall / F-measure with its
default 50 ms onset tolerance, offsets ignored); the ground truth is the MIDI we render
with fluidsynth (FluidR3_GM), so every played note's pitch and onset is known.
"""

from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

import mir_eval
import numpy as np
import pretty_midi
import pytest
import soundfile as sf
from music21 import corpus

from takescribe.align import Alignment, align_reference
from takescribe.informed import informed_transcription, score_mask
from takescribe.score import Reference, ScoreNote, load_reference
from takescribe.transcription import transcribe

SR = 22050
SOUNDFONT = Path("/usr/share/sounds/sf2/FluidR3_GM.sf2")


def _melody() -> Reference:
    """An invented four-note part: C4, E4, G4, C5, half a second each."""
    notes = tuple(
        ScoreNote(pitch=p, onset_quarters=k, duration_quarters=1.0, onset=0.5 * k, offset=0.5 * (k + 1),
                  measure=1, measure_label="1", beat=1.0 + k, index=k)
        for k, p in enumerate((60, 64, 67, 72))
    )
    return Reference(notes=notes, tempo_map=((0.0, 120.0),), time_signatures=((0.0, 4, 4),),
                     measure_starts=(0.0, 4.0), part_name="Melody", source="invented")


def test_score_mask_follows_the_alignment():
    ref = _melody()
    # the take plays at half speed, one second late: take = 1 + 2 * score
    alignment = Alignment(score_times=np.array([0.0, 2.0]), take_times=np.array([1.0, 5.0]), confidence=1.0)
    pitches = np.arange(55, 80)
    hop = 0.01
    frame_times = np.arange(0, 6.0, hop)
    tolerance, floor = 0.1, 0.1
    mask = score_mask(ref, alignment, pitches, frame_times, tolerance=tolerance, floor=floor)
    assert mask.shape == (pitches.size, frame_times.size) and mask.dtype == np.float32
    for note in ref.notes:
        row = int(np.flatnonzero(pitches == note.pitch)[0])
        start, stop = 1 + 2 * note.onset, 1 + 2 * note.offset
        inside = (frame_times >= start) & (frame_times <= stop)
        assert np.all(mask[row, inside] == 1.0)
        # well away from the note (slack: tolerance in score seconds, doubled by the tempo,
        # plus tolerance in take seconds and a frame) the pitch is not expected
        slack = 2 * tolerance * 2 + tolerance + 2 * hop
        far = (frame_times < start - slack) | (frame_times > stop + slack)
        assert np.all(mask[row, far] == floor)
    not_in_part = ~np.isin(pitches, [n.pitch for n in ref.notes])
    assert np.all(mask[not_in_part] == floor)


@pytest.mark.slow
@pytest.mark.skipif(shutil.which("fluidsynth") is None or not SOUNDFONT.exists(),
                    reason="fluidsynth or the FluidR3_GM sound font is not installed")
def test_informed_keeps_wrong_notes_and_is_at_least_as_precise_as_blind(tmp_path):
    ref = load_reference(corpus.getWork("bach/bwv66.6"), part="Soprano")
    onsets = np.array([n.onset for n in ref.notes]) + 1.0
    offsets = np.array([n.offset for n in ref.notes]) + 1.0
    played = np.array([n.pitch for n in ref.notes])
    wrong = [10, 20]
    played[wrong[0]] += 1
    played[wrong[1]] -= 2
    pm = pretty_midi.PrettyMIDI()
    inst = pretty_midi.Instrument(program=0)
    for a, b, p in zip(onsets, offsets, played):
        inst.notes.append(pretty_midi.Note(velocity=80, pitch=int(p), start=float(a), end=float(b)))
    pm.instruments.append(inst)
    pm.write(str(tmp_path / "take.mid"))
    subprocess.run(["fluidsynth", "-ni", "-q", "-F", str(tmp_path / "take.wav"), "-r", str(SR), str(SOUNDFONT),
                    str(tmp_path / "take.mid")], check=True, capture_output=True, timeout=120)
    y, _ = sf.read(tmp_path / "take.wav", dtype="float32")
    y = y.mean(axis=1) if y.ndim > 1 else y

    alignment = align_reference(y, SR, ref)
    informed = informed_transcription(y, SR, ref, alignment=alignment, instrument="piano")
    blind = transcribe(y, SR, instrument="piano")

    ref_intervals = np.c_[onsets, offsets]
    ref_hz = 440.0 * 2 ** ((played - 69) / 12)  # ISO 16: A4 = 440 Hz

    def scores(result):
        est_intervals = np.array([[n.onset, n.offset] for n in result.notes]).reshape(-1, 2)
        est_hz = 440.0 * 2 ** ((np.array([n.pitch for n in result.notes]) - 69) / 12)
        p, r, f, _ = mir_eval.transcription.precision_recall_f1_overlap(
            ref_intervals, ref_hz, est_intervals, est_hz, offset_ratio=None)
        matched = mir_eval.transcription.match_notes(ref_intervals, ref_hz, est_intervals, est_hz, offset_ratio=None)
        return p, f, {i for i, _ in matched}

    p_informed, f_informed, matched_informed = scores(informed)
    p_blind, f_blind, _ = scores(blind)
    assert p_informed >= p_blind
    assert f_informed >= f_blind - 0.02
    # the score is a prior, not a cage: the two wrong notes are transcribed as played
    assert set(wrong) <= matched_informed
