"""The jobs glued from the stages (takescribe.jobs.pipeline), checked end to end on held-out pieces.

Outside references: mido's reading of the Standard MIDI File (note times in seconds from the
tempo map, SMF 1.0 semantics), mir_eval's transcription metrics (Raffel et al., ISMIR 2014) and
the corpus's ground truth (fixtures/README.md).
"""

from __future__ import annotations

import json
import warnings

import mido
import mir_eval
import numpy as np
import pytest

from takescribe.alignment.align import AlignmentWarning
from takescribe.audio.load import load_audio
from takescribe.export.noteio import read_maps, write_maps
from takescribe.jobs.pipeline import evaluate_files, transcribe_file, transcribe_take
from takescribe.reference.part import load_reference

from conftest import FIXTURES

CORPUS = FIXTURES / "corpus"
INDEX = {e["name"]: e for e in json.loads((CORPUS / "index.json").read_text(encoding="utf-8"))}
# held-out pieces only (fixtures/README.md: no piece is in both splits); floors are the onset F
# measured on 2026-12-05 minus 0.05 (clarinet 0.952, chorale 0.860)
FLOORS = {"melody_clarinet_tune": 0.90, "piano_chorale_bwv269": 0.81}


def _mir_eval_onset_f(ref, est) -> float:
    ri = np.array([[n.onset, n.offset] for n in ref])
    ei = np.array([[n.onset, n.offset] for n in est]).reshape(-1, 2)
    rp = mir_eval.util.midi_to_hz(np.array([n.pitch for n in ref], dtype=float))
    ep = mir_eval.util.midi_to_hz(np.array([n.pitch for n in est], dtype=float))
    return mir_eval.transcription.precision_recall_f1_overlap(ri, rp, ei, ep, offset_ratio=None)[2]


def _mido_notes(path):
    """(onset, offset, pitch) in seconds as mido plays the file (tempo map applied by mido)."""
    now, sounding, out = 0.0, {}, []
    for msg in mido.MidiFile(str(path)):
        now += msg.time
        if msg.type == "note_on" and msg.velocity > 0:
            sounding.setdefault((msg.channel, msg.note), []).append(now)
        elif msg.type in ("note_off", "note_on"):  # SMF: note-on with velocity 0 is a note-off
            starts = sounding.get((msg.channel, msg.note))
            if starts:
                out.append((starts.pop(0), now, msg.note))
    return sorted(out)


@pytest.mark.parametrize("name", sorted(FLOORS))
def test_transcribe_file_writes_the_draft_it_computed(tmp_path, name):
    entry = INDEX[name]
    assert entry["split"] == "heldout"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        out = transcribe_file(CORPUS / entry["files"]["audio"], midi_path=tmp_path / "draft.mid",
                              notes_path=tmp_path / "draft.txt", instrument=entry["instrument_program"])
    notes = out.transcription.notes
    assert _mir_eval_onset_f(read_maps(CORPUS / entry["files"]["notes"]), notes) >= FLOORS[name]
    # the MIDI file holds the performed timing: mido's reading gives the draft's notes back
    # (within one tick at the file's resolution)
    read = _mido_notes(tmp_path / "draft.mid")
    assert len(read) == len(notes)
    ticks = mido.MidiFile(str(tmp_path / "draft.mid")).ticks_per_beat
    for (onset, offset, pitch), note in zip(read, sorted((n.onset, n.offset, n.pitch) for n in notes)):
        assert pitch == note[2]
        assert onset == pytest.approx(note[0], abs=60 / 30 / ticks + 1e-3)
    # the note list is the MAPS text of the same notes (MAPS text keeps onset, offset and pitch,
    # to the microsecond; velocities are not part of the format)
    listed = read_maps(tmp_path / "draft.txt")
    expected = sorted(notes, key=lambda n: (n.onset, n.pitch))
    assert [n.pitch for n in listed] == [n.pitch for n in expected]
    np.testing.assert_allclose([[n.onset, n.offset] for n in listed], [[n.onset, n.offset] for n in expected],
                               atol=1e-6)


def test_evaluate_files_equals_mir_eval(tmp_path):
    entry = INDEX["piano_chorale_bwv269"]
    ref = read_maps(CORPUS / entry["files"]["notes"])
    rng = np.random.default_rng(5)
    est = [n.__class__(max(0.0, n.onset + float(rng.normal(0, 0.04))), n.offset + 0.1, n.pitch)
           for n in ref if rng.random() > 0.15]
    write_maps(est, tmp_path / "est.txt")
    scores = evaluate_files(tmp_path / "est.txt", CORPUS / entry["files"]["notes"])
    # reference: mir_eval.transcription.precision_recall_f1_overlap, onsets only, 50 ms / 50 cents
    assert scores["onset.f_measure"] == pytest.approx(_mir_eval_onset_f(ref, read_maps(tmp_path / "est.txt")),
                                                         abs=1e-9)


def test_a_part_of_another_piece_is_not_used_as_a_prior():
    # a clarinet tune given the part of a piano chorale: the alignment says they do not belong
    # together, so the job warns and transcribes blind (a wrong prior would invent notes)
    tune = INDEX["melody_clarinet_tune"]
    y, sr = load_audio(CORPUS / tune["files"]["audio"], sr=22050)
    other = load_reference(CORPUS / INDEX["piano_chorale_bwv269"]["files"]["score"])
    with pytest.warns(AlignmentWarning, match="does not seem to match"):
        result, alignment = transcribe_take(y, sr, instrument=tune["instrument_program"], reference=other)
    blind, _ = transcribe_take(y, sr, instrument=tune["instrument_program"])
    assert alignment is not None and [n.pitch for n in result.notes] == [n.pitch for n in blind.notes]
