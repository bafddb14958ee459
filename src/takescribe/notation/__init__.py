"""Notes to notation: beat grid, meter, quantization, key and spelling, staves, MusicXML 4.0.

The modules, in the order a draft passes through them: :mod:`.grid`, :mod:`.meter`,
:mod:`.from_part`, :mod:`.quantize`, :mod:`.spelling`, :mod:`.staves`, :mod:`.notate`
(which runs them), :mod:`.musicxml`; :mod:`.model` holds the values, :mod:`.settings`
the tuned numbers.
"""

# `takescribe.notation` was one module before 0.2; its public names stay importable here.
from ..features.onsets import OnsetStrength, onset_envelope, onset_strength
from .grid import GRID_NAMES, BeatGrid, grid_from_reference, parse_time_signature, validate_grid
from .meter import estimate_meter
from .model import Notation, NotationWarning, QuantizedNote
from .musicxml import musicxml_string, to_music21, write_musicxml
from .notate import notate
from .quantize import LAMBDA, quantize, written_values
from .spelling import estimate_key, spell_pitch, spell_voice
from .staves import assign_voices, split_hands

__all__ = ['LAMBDA', 'GRID_NAMES', 'NotationWarning', 'BeatGrid', 'QuantizedNote', 'Notation',
           'parse_time_signature', 'validate_grid', 'onset_envelope', 'onset_strength', 'OnsetStrength',
           'estimate_meter', 'grid_from_reference', 'quantize', 'written_values', 'spell_pitch', 'spell_voice',
           'estimate_key', 'split_hands', 'assign_voices', 'notate', 'to_music21', 'musicxml_string',
           'write_musicxml']
