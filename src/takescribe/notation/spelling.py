"""Key and pitch spelling: key signature estimate, spelling per key and melodic direction.

References
----------
Krumhansl, C. L. (1990). *Cognitive Foundations of Musical Pitch*. Oxford University
Press (key profiles, used through music21's ``KrumhanslSchmuckler``).
"""

from __future__ import annotations

from fractions import Fraction
from typing import Sequence

from ..errors import InputError
from ..notes import Note
from .model import QuantizedNote

__all__ = ["spell_pitch", "spell_voice", "estimate_key", "tonic_name", "transpose_key"]

_LETTERS = "CDEFGAB"
_LETTER_PC = (0, 2, 4, 5, 7, 9, 11)
# chromatic degrees relative to the tonic: (scale degree 0..6, alteration from the natural
# degree of the major / natural minor scale) -- common practice, no source: raised 1, 4, 5,
# lowered 3 and 7 in major; lowered 2, raised 3 (picardy third), 4, 6 and 7 in minor
_MAJOR_SPELL = {0: (0, 0), 1: (0, 1), 2: (1, 0), 3: (2, -1), 4: (2, 0), 5: (3, 0), 6: (3, 1),
                7: (4, 0), 8: (4, 1), 9: (5, 0), 10: (6, -1), 11: (6, 0)}
_MINOR_SPELL = {0: (0, 0), 1: (1, -1), 2: (1, 0), 3: (2, 0), 4: (2, 1), 5: (3, 0), 6: (3, 1),
                7: (4, 0), 8: (5, 0), 9: (5, 1), 10: (6, 0), 11: (6, 1)}


# relative pitch classes whose spelling does not depend on the melody: the scale, and in
# minor the raised sixth and seventh
_MAJOR_PLAIN = frozenset({0, 2, 4, 5, 7, 9, 11})
_MINOR_PLAIN = frozenset({0, 2, 3, 5, 7, 8, 9, 10, 11})


def _tonic_of(fifths: int, mode: str) -> tuple[int, int]:
    """(letter index, pitch class) of the tonic of a key signature."""
    # major tonic walks the circle of fifths from C; minor is a third below
    letter = (fifths * 4) % 7
    pc = (fifths * 7) % 12
    if mode == "minor":
        letter = (letter + 5) % 7
        pc = (pc + 9) % 12
    return letter, pc


def spell_pitch(midi: int, *, key_fifths: int = 0, mode: str = "major",
                next_midi: int | None = None) -> tuple[str, int, int]:
    """Spell a MIDI pitch for a key: ``(step letter, alter in semitones, octave)``.

    Diatonic pitches take the key's spelling; chromatic ones follow the direction of the
    melody when ``next_midi`` is a semitone away (sharp when it rises, flat when it falls:
    an altered note leans towards its resolution; common practice, no source), else the
    choices in ``_MAJOR_SPELL`` / ``_MINOR_SPELL`` (raised leading tone in minor, etc.).

    Examples
    --------
    >>> spell_pitch(68, key_fifths=0, mode="minor")   # G sharp 4 in A minor
    ('G', 1, 4)
    >>> spell_pitch(70, key_fifths=-1)                # B flat 4 in F major
    ('B', -1, 4)
    """
    if mode not in ("major", "minor"):
        raise InputError(f"mode must be 'major' or 'minor', got {mode!r}")
    if not -7 <= int(key_fifths) <= 7:
        raise InputError(f"key_fifths must be in range -7..7, got {key_fifths}")
    t_letter, t_pc = _tonic_of(int(key_fifths), mode)
    rel = (int(midi) - t_pc) % 12
    degree, _ = (_MAJOR_SPELL if mode == "major" else _MINOR_SPELL)[rel]
    if rel not in (_MAJOR_PLAIN if mode == "major" else _MINOR_PLAIN) and next_midi is not None:
        step = int(next_midi) - int(midi)
        flat_degree = (_MAJOR_SPELL if mode == "major" else _MINOR_SPELL)[(rel + 1) % 12][0]
        sharp_degree = (_MAJOR_SPELL if mode == "major" else _MINOR_SPELL)[(rel - 1) % 12][0]
        if step == 1:
            degree = sharp_degree
        elif step == -1:
            degree = flat_degree
    letter = (t_letter + degree) % 7
    natural = _LETTER_PC[letter]
    alter = ((int(midi) - natural + 6) % 12) - 6
    octave = (int(midi) - natural - alter) // 12 - 1
    return _LETTERS[letter], int(alter), int(octave)


def spell_voice(voice: Sequence[QuantizedNote], *, key_fifths: int, mode: str) -> list[QuantizedNote]:
    """Spell the notes of one voice for a key, looking at each note's melodic successor.

    The successor of a note is the nearest pitch of the next onset in the voice (chords
    included); see :func:`spell_pitch`.
    """
    from dataclasses import replace

    onsets = sorted({n.onset_quarters for n in voice})
    by_onset: dict[Fraction, list[int]] = {}
    for n in voice:
        by_onset.setdefault(n.onset_quarters, []).append(n.pitch)
    following = {a: b for a, b in zip(onsets, onsets[1:])}
    out = []
    for n in voice:
        nxt = following.get(n.onset_quarters)
        next_midi = min(by_onset[nxt], key=lambda p: abs(p - n.pitch)) if nxt is not None else None
        out.append(replace(n, spelling=spell_pitch(n.pitch, key_fifths=key_fifths, mode=mode, next_midi=next_midi)))
    return out


def estimate_key(notes: Sequence[Note] | Sequence[QuantizedNote], *, key_fifths: int | None = None) -> tuple[int, str]:
    """Key signature and mode of some notes: ``(fifths, "major"|"minor")``.

    Uses music21's Krumhansl–Schmuckler key finder on duration-weighted pitch classes
    (Krumhansl 1990). With ``key_fifths`` given (from a reference part) only the mode is
    chosen, between the major key and its relative minor.
    """
    from music21 import analysis, note, stream

    s = stream.Stream()
    for n in notes:
        dur = float(n.duration_quarters) if isinstance(n, QuantizedNote) else float(n.duration) * 2
        m = note.Note(int(n.pitch))
        m.quarterLength = max(min(dur, 8.0), 0.125)
        s.append(m)
    if len(s) == 0:
        return (int(key_fifths) if key_fifths is not None else 0), "major"
    ks = analysis.discrete.KrumhanslSchmuckler()
    solutions = ks.getSolution(s).alternateInterpretations + [ks.getSolution(s)]
    best = max(solutions, key=lambda k: k.correlationCoefficient)
    if key_fifths is None:
        fifths = int(best.sharps)
        if fifths > 6:
            fifths -= 12
        if fifths < -6:
            fifths += 12
        return fifths, str(best.mode)
    cands = [k for k in solutions if int(k.sharps) == int(key_fifths) and k.mode in ("major", "minor")]
    if not cands:
        return int(key_fifths), "major"
    return int(key_fifths), str(max(cands, key=lambda k: k.correlationCoefficient).mode)



def tonic_name(fifths: int, mode: str) -> str:
    """music21 key name of a key signature: ``"E-"`` for 3 flats major, ``"c"`` for 3 flats minor."""
    letter, pc = _tonic_of(fifths, mode)
    natural = _LETTER_PC[letter]
    alter = ((pc - natural + 6) % 12) - 6
    name = _LETTERS[letter] + ("#" * alter if alter > 0 else "-" * (-alter))
    return name if mode == "major" else name.lower()


def transpose_key(fifths: int, semitones: int) -> int:
    """Key signature after transposing by ``semitones`` (7 semitones = one fifth up), kept
    within -7..7 by the enharmonic choice with fewer accidentals (common practice, no source)."""
    moved = int(fifths) + (int(semitones) * 7) % 12
    candidates = [moved - 12 * k for k in range(-2, 3) if -7 <= moved - 12 * k <= 7]
    return min(candidates, key=abs)
