"""Notes to notation: meter, quantization, key and spelling, staves, MusicXML 4.0."""

# `takescribe.notation` was a module before 0.2; its public names stay importable here.
from .notate import (  # noqa: F401
    LAMBDA,
    GRID_NAMES,
    NotationWarning,
    BeatGrid,
    QuantizedNote,
    Notation,
    parse_time_signature,
    validate_grid,
    onset_envelope,
    estimate_meter,
    grid_from_reference,
    quantize,
    spell_pitch,
    spell_voice,
    estimate_key,
    split_hands,
    assign_voices,
    notate,
    to_music21,
    musicxml_string,
    write_musicxml,
)

__all__ = ['LAMBDA', 'GRID_NAMES', 'NotationWarning', 'BeatGrid', 'QuantizedNote', 'Notation', 'parse_time_signature', 'validate_grid', 'onset_envelope', 'estimate_meter', 'grid_from_reference', 'quantize', 'spell_pitch', 'spell_voice', 'estimate_key', 'split_hands', 'assign_voices', 'notate', 'to_music21', 'musicxml_string', 'write_musicxml']
