"""Pitch facts (takescribe.pitch) against librosa and music21, and ISO 16's A4 = 440 Hz."""

import librosa
import music21
import numpy as np
import pytest

from takescribe.pitch import PARTIAL_STEPS, PIANO_RANGE, SHARP_NAMES, hz_to_midi, midi_to_hz, pitch_name


def test_frequencies_match_librosa():
    pitches = np.arange(0, 128)
    # reference: librosa.midi_to_hz (equal temperament, A4 = 440 Hz as ISO 16:1975)
    np.testing.assert_allclose(midi_to_hz(pitches), librosa.midi_to_hz(pitches), rtol=1e-12)
    np.testing.assert_allclose(hz_to_midi(librosa.midi_to_hz(pitches)), pitches, atol=1e-9)
    assert midi_to_hz(69) == pytest.approx(440.0)


@pytest.mark.parametrize("pitch", [21, 60, 61, 69, 70, 108])
def test_names_match_music21(pitch):
    # reference: music21.pitch.Pitch(midi=...).nameWithOctave, whose default spelling out of
    # context is the same (C#, Eb, F#, G#, Bb); music21 writes flats as "-"
    assert pitch_name(pitch) == music21.pitch.Pitch(midi=pitch).nameWithOctave.replace("-", "b")
    assert music21.pitch.Pitch(pitch_name(pitch, names=SHARP_NAMES)).midi == pitch


def test_piano_range_and_partials():
    # reference: music21's piano instrument range (A0 to C8)
    piano = music21.instrument.Piano()
    assert PIANO_RANGE == (piano.lowestNote.midi, piano.highestNote.midi)
    # 2nd, 3rd, 4th harmonics of any fundamental land these many semitones above it
    assert PARTIAL_STEPS == tuple(int(round(12 * np.log2(k))) for k in (2, 3, 4))
