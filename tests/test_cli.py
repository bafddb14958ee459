"""The command line's main jobs end to end on committed fixtures (the bad-input contract is in
test_bad_input_cli.py)."""

from __future__ import annotations

import hashlib
import json

import mido
import pretty_midi
import pytest
from lxml import etree

from takescribe.cli import main
from takescribe.export.noteio import read_maps

from conftest import FIXTURES

CORPUS = FIXTURES / "corpus"
MELODY = CORPUS / "heldout" / "melody_clarinet_tune"
SCALES = CORPUS / "tuning" / "piano_scales"


def _sha(path):
    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_transcribe_writes_midi_notes_and_musicxml(tmp_path, capsys, musicxml_schema):
    take = MELODY.with_suffix(".flac")
    before = _sha(take)
    code = main(["transcribe", str(take), "-o", str(tmp_path / "draft.mid"), "--notes", str(tmp_path / "draft.txt"),
                 "--musicxml", str(tmp_path / "draft.musicxml"), "--instrument", "clarinet", "--quiet"])
    assert code == 0
    assert _sha(take) == before  # inputs are never modified
    notes = read_maps(tmp_path / "draft.txt")
    assert len(notes) >= 15
    # the MIDI file read back by mido and by pretty_midi (a second, independent reader) gives the same notes
    mid = mido.MidiFile(tmp_path / "draft.mid")
    assert mid.type == 1
    pm = pretty_midi.PrettyMIDI(str(tmp_path / "draft.mid"))
    theirs = sorted((round(n.start, 3), n.pitch) for i in pm.instruments for n in i.notes)
    ours = sorted((round(n.onset, 3), n.pitch) for n in notes)
    assert [p for _, p in theirs] == [p for _, p in ours]
    assert all(abs(a[0] - b[0]) <= 0.002 for a, b in zip(theirs, ours))
    assert pm.instruments[0].program == 71  # GM Clarinet (GM Level 1: program 72, 0-based 71)
    # the MusicXML validates against the official MusicXML 4.0 schema
    musicxml_schema.assertValid(etree.parse(str(tmp_path / "draft.musicxml")))
    assert "wrote" in capsys.readouterr().out


def test_transcribe_with_score_and_evaluate(tmp_path, capsys):
    take = MELODY.with_suffix(".flac")
    assert main(["transcribe", str(take), "--score", str(MELODY.with_suffix(".musicxml")),
                 "--notes", str(tmp_path / "draft.txt"), "--quiet"]) == 0
    assert main(["evaluate", str(tmp_path / "draft.txt"), str(MELODY.with_suffix(".txt")),
                 "--json", str(tmp_path / "scores.json")]) == 0
    printed = capsys.readouterr().out
    assert "onset only" in printed and "F-measure" in printed
    scores = json.loads((tmp_path / "scores.json").read_text())
    assert scores["onset.f_measure"] >= 0.9
    assert {"onset_offset.f_measure", "frame.accuracy", "onset.average_overlap_ratio"} <= set(scores)


def test_dictionary_learn_and_use(tmp_path):
    # learn templates from a recording of a known passage (a scale study) and use them
    out = tmp_path / "my-piano.npz"
    assert main(["dictionary", "learn", str(SCALES.with_suffix(".flac")), "--score", str(SCALES.with_suffix(".musicxml")),
                 "-o", str(out), "--quiet"]) == 0
    assert out.exists()
    assert main(["dictionary", "learn", str(SCALES.with_suffix(".flac")), "--score", str(SCALES.with_suffix(".musicxml")),
                 "-o", str(out), "--quiet"]) == 4  # exists: refused without --force
    assert main(["transcribe", str(SCALES.with_suffix(".flac")), "--dictionary", str(out),
                 "--notes", str(tmp_path / "d.txt"), "--quiet"]) == 0
    assert len(read_maps(tmp_path / "d.txt")) >= 40


def test_usage_errors_exit_2(capsys):
    assert main(["transcribe"]) == 2
    assert main(["frobnicate"]) == 2
    assert main(["--version"]) == 0


@pytest.mark.parametrize("value", ["violin", "40", "alto sax", "acoustic_guitar_nylon"])
def test_instrument_names_are_accepted(tmp_path, value):
    assert main(["transcribe", str(MELODY.with_suffix(".flac")), "--instrument", value,
                 "--notes", str(tmp_path / "n.txt"), "--quiet"]) == 0


def test_unknown_instrument_lists_known_ones(tmp_path, capsys):
    assert main(["transcribe", str(MELODY.with_suffix(".flac")), "--instrument", "kazoo",
                 "--notes", str(tmp_path / "n.txt")]) == 1
    err = capsys.readouterr().err
    assert "unknown instrument 'kazoo'" in err and "violin" in err
    assert not (tmp_path / "n.txt").exists()


def test_evaluate_refuses_a_huge_gap_at_once(tmp_path, capsys):
    # issue #17: a 98-byte MIDI with two notes 10 hours apart made evaluate use 4.4 GB; the span
    # limit (takescribe.limits) refuses it before the frame rolls are allocated
    import mido

    midi = mido.MidiFile(type=0, ticks_per_beat=480)
    track = mido.MidiTrack()
    midi.tracks.append(track)
    track += [mido.Message("note_on", note=60, velocity=80, time=0), mido.Message("note_off", note=60, time=480),
              mido.Message("note_on", note=64, velocity=80, time=10 * 3600 * 2 * 480),  # 120 bpm: 960 ticks a second
              mido.Message("note_off", note=64, time=480)]
    path = tmp_path / "gap.mid"
    midi.save(path)
    assert main(["evaluate", str(path), str(path)]) == 1
    assert "gap.mid: its events last 10.0 hours" in capsys.readouterr().err


def test_evaluate_into_a_closed_pipe_exits_quietly(tmp_path):
    # `takescribe evaluate ... | head -0`: the reader is gone; no traceback, no "internal error"
    import subprocess
    import sys

    notes = tmp_path / "n.txt"
    notes.write_text("OnsetTime\tOffsetTime\tMidiPitch\n0.0\t0.5\t60\n")
    proc = subprocess.Popen([sys.executable, "-m", "takescribe.cli", "evaluate", str(notes), str(notes)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    try:
        proc.stdout.close()  # as `head` exiting before the table is printed
        err = proc.stderr.read().decode()
        proc.wait(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(10)
    assert err == "" and proc.returncode == 141  # 128 + SIGPIPE, the code of a program ended by SIGPIPE
