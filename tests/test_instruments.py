"""Instrument presets and General MIDI names (GM Level 1 Sound Set)."""

from __future__ import annotations

import pretty_midi
import pytest

from takescribe.errors import InputError
from takescribe.transcription.instruments import GM_PROGRAM_NAMES, normalize_name, resolve_instrument


# pretty_midi spells two GM Level 1 names differently (from memory, the GM 1 Sound Set lists
# program 8 as "Clavi" and 55 as "Synth Voice"); both spellings resolve to the same program.
PRETTY_MIDI_VARIANTS = {7: "Clavinet", 54: "Synth Choir"}


def test_gm_names_agree_with_pretty_midi():
    # pretty_midi ships the GM Level 1 program names: a second, independent copy of the standard
    assert len(GM_PROGRAM_NAMES) == 128
    for program, name in enumerate(GM_PROGRAM_NAMES):
        theirs = pretty_midi.program_to_instrument_name(program)
        if program in PRETTY_MIDI_VARIANTS:
            assert theirs == PRETTY_MIDI_VARIANTS[program]
            assert resolve_instrument(theirs).program == program
        else:
            assert normalize_name(name) == normalize_name(theirs)


@pytest.mark.parametrize(
    "value, preset, program",
    [(40, "violin", 40), ("40", "violin", 40), ("violin", "violin", 40), ("alto sax", "saxophone", 65),
     ("Alto-Sax", "saxophone", 65), ("acoustic_guitar_nylon", "guitar", 24), ("Flute", "flute", 73),
     ("cello", "cello", 42), ("clarinet", "clarinet", 71), ("piano", "piano", 0),
     ("Sitar", "guitar", 104), (67, "tenor saxophone", 67)],
)
def test_resolve(value, preset, program):
    inst = resolve_instrument(value)
    assert inst.name == preset and inst.program == program


def test_unknown_name_lists_known_ones():
    with pytest.raises(InputError, match="unknown instrument 'kazoo'.*violin"):
        resolve_instrument("kazoo")


def test_program_out_of_range():
    with pytest.raises(InputError, match="0..127"):
        resolve_instrument(128)


def test_ranges_are_sane():
    # common practice, no source: the piano has 88 keys A0..C8 (MIDI 21..108)
    assert resolve_instrument("piano").midi_range == (21, 108)
    for name in ("violin", "flute", "clarinet", "cello", "saxophone", "guitar"):
        low, high = resolve_instrument(name).midi_range
        assert 21 <= low < high <= 108
