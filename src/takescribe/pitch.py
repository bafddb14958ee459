"""Pitch facts shared by every stage: names, ranges, frequencies, the partials that collide.

Conventions
-----------
Pitches are MIDI note numbers (60 = middle C = C4, 69 = A4). Frequencies follow equal
temperament on A4 = 440 Hz, the standard tuning frequency of ISO 16:1975. Octave numbers
follow scientific pitch notation (C4 = 60), as music21 and mido write them.
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "A4_HZ",
    "A4_PITCH",
    "PIANO_LOWEST",
    "PIANO_HIGHEST",
    "PIANO_RANGE",
    "PARTIAL_STEPS",
    "SHARP_NAMES",
    "NAMES",
    "midi_to_hz",
    "hz_to_midi",
    "pitch_name",
]

#: ISO 16:1975 standard tuning frequency, the pitch it names.
A4_HZ = 440.0
A4_PITCH = 69
#: The 88 keys of the modern piano, A0 to C8 (common practice, no source).
PIANO_LOWEST, PIANO_HIGHEST = 21, 108
PIANO_RANGE = (PIANO_LOWEST, PIANO_HIGHEST)
#: Semitones from a fundamental to its 2nd, 3rd and 4th harmonics (12, 19.02, 24 in equal
#: temperament, rounded): where a note's overtones sit on other keys.
PARTIAL_STEPS = (12, 19, 24)
#: Pitch-class names with sharps (MIDI numbers modulo 12).
SHARP_NAMES = ("C", "C#", "D", "D#", "E", "F", "F#", "G", "G#", "A", "A#", "B")
#: Pitch-class names as teachers usually say them out of context: sharps for C#, F#, G#, flats
#: for Eb and Bb (common practice, no source).
NAMES = ("C", "C#", "D", "Eb", "E", "F", "F#", "G", "G#", "A", "Bb", "B")


def midi_to_hz(pitch, *, a4_hz: float = A4_HZ):
    """Frequency in Hz of MIDI pitch ``pitch`` (scalar or array) in equal temperament."""
    return a4_hz * 2.0 ** ((np.asarray(pitch, dtype=float) - A4_PITCH) / 12.0)


def hz_to_midi(hz, *, a4_hz: float = A4_HZ):
    """Fractional MIDI pitch of ``hz`` (scalar or array, > 0)."""
    return A4_PITCH + 12.0 * np.log2(np.asarray(hz, dtype=float) / a4_hz)


def pitch_name(pitch: int, *, names=NAMES) -> str:
    """Name with octave number in scientific pitch notation, e.g. 60 -> ``"C4"``, 70 -> ``"Bb4"``."""
    pitch = int(pitch)
    return f"{names[pitch % 12]}{pitch // 12 - 1}"
