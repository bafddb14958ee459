"""General MIDI programs and the instrument presets the harmonic dictionary is built from.

Conventions
-----------
- Program numbers are 0-based (0..127) as in the Standard MIDI File program-change
  message; the GM Level 1 Sound Set lists them 1-based (1 = Acoustic Grand Piano).
  ``resolve_instrument`` accepts the 0-based number.
- Names are matched ignoring case, spaces, hyphens, underscores and parentheses,
  so ``"alto sax"``, ``"Alto-Sax"`` and ``"altosax"`` are the same; a preset's short
  name (``"violin"``) or any GM name (``"acoustic_guitar_nylon"``) works.
- Ranges are sounding (concert) pitch in MIDI numbers. They are the usual orchestration
  ranges (common practice, no source; values from memory), slightly widened so a
  take that goes a little beyond them is still transcribed.
- Spectral envelopes are coarse: partial *n* has amplitude ``n**-rolloff``, odd
  partials scaled by ``odd_weight`` relative to even ones' ``even_weight``. They are a
  starting point that the semi-learned adaptation refines on the take itself.
- Piano inharmonicity ``B`` follows ``log10 B = -4.2 + 0.024·(p − 21)`` for MIDI
  pitch *p* (about 6e-5 at A0 rising to about 8e-3 at C8). This is a rough
  straight-line fit of the bass-to-treble trend measured on grand pianos (values from
  memory; the published curves are not straight in the bass). Other presets use B=0
  except guitar, which uses a small constant.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np

from ..errors import InputError
from ..pitch import PIANO_RANGE

__all__ = [
    "GM_PROGRAM_NAMES",
    "GM_FAMILIES",
    "Instrument",
    "PRESETS",
    "resolve_instrument",
    "normalize_name",
    "known_instrument_names",
]

# General MIDI Level 1 Sound Set, program numbers 1..128 (listed here 0-based).
GM_PROGRAM_NAMES: tuple[str, ...] = (
    "Acoustic Grand Piano", "Bright Acoustic Piano", "Electric Grand Piano", "Honky-tonk Piano",
    "Electric Piano 1", "Electric Piano 2", "Harpsichord", "Clavi",
    "Celesta", "Glockenspiel", "Music Box", "Vibraphone", "Marimba", "Xylophone", "Tubular Bells", "Dulcimer",
    "Drawbar Organ", "Percussive Organ", "Rock Organ", "Church Organ", "Reed Organ", "Accordion", "Harmonica",
    "Tango Accordion",
    "Acoustic Guitar (nylon)", "Acoustic Guitar (steel)", "Electric Guitar (jazz)", "Electric Guitar (clean)",
    "Electric Guitar (muted)", "Overdriven Guitar", "Distortion Guitar", "Guitar harmonics",
    "Acoustic Bass", "Electric Bass (finger)", "Electric Bass (pick)", "Fretless Bass", "Slap Bass 1",
    "Slap Bass 2", "Synth Bass 1", "Synth Bass 2",
    "Violin", "Viola", "Cello", "Contrabass", "Tremolo Strings", "Pizzicato Strings", "Orchestral Harp",
    "Timpani",
    "String Ensemble 1", "String Ensemble 2", "SynthStrings 1", "SynthStrings 2", "Choir Aahs", "Voice Oohs",
    "Synth Voice", "Orchestra Hit",
    "Trumpet", "Trombone", "Tuba", "Muted Trumpet", "French Horn", "Brass Section", "SynthBrass 1",
    "SynthBrass 2",
    "Soprano Sax", "Alto Sax", "Tenor Sax", "Baritone Sax", "Oboe", "English Horn", "Bassoon", "Clarinet",
    "Piccolo", "Flute", "Recorder", "Pan Flute", "Blown Bottle", "Shakuhachi", "Whistle", "Ocarina",
    "Lead 1 (square)", "Lead 2 (sawtooth)", "Lead 3 (calliope)", "Lead 4 (chiff)", "Lead 5 (charang)",
    "Lead 6 (voice)", "Lead 7 (fifths)", "Lead 8 (bass + lead)",
    "Pad 1 (new age)", "Pad 2 (warm)", "Pad 3 (polysynth)", "Pad 4 (choir)", "Pad 5 (bowed)",
    "Pad 6 (metallic)", "Pad 7 (halo)", "Pad 8 (sweep)",
    "FX 1 (rain)", "FX 2 (soundtrack)", "FX 3 (crystal)", "FX 4 (atmosphere)", "FX 5 (brightness)",
    "FX 6 (goblins)", "FX 7 (echoes)", "FX 8 (sci-fi)",
    "Sitar", "Banjo", "Shamisen", "Koto", "Kalimba", "Bag pipe", "Fiddle", "Shanai",
    "Tinkle Bell", "Agogo", "Steel Drums", "Woodblock", "Taiko Drum", "Melodic Tom", "Synth Drum",
    "Reverse Cymbal",
    "Guitar Fret Noise", "Breath Noise", "Seashore", "Bird Tweet", "Telephone Ring", "Helicopter",
    "Applause", "Gunshot",
)

# The sixteen GM families of eight programs each (GM Level 1 Sound Set).
GM_FAMILIES: tuple[str, ...] = (
    "piano", "chromatic percussion", "organ", "guitar", "bass", "strings", "ensemble", "brass",
    "reed", "pipe", "synth lead", "synth pad", "synth effects", "ethnic", "percussive", "sound effects",
)


@dataclass(frozen=True)
class Instrument:
    """An instrument preset for the harmonic dictionary.

    Attributes
    ----------
    name : str
        Preset name (lower case, e.g. ``"violin"``).
    program : int
        General MIDI program, 0..127, written into exported MIDI.
    midi_range : tuple[int, int]
        Lowest and highest sounding pitch (MIDI), inclusive.
    polyphonic : bool
        Whether several notes sound at once (piano, guitar) or the instrument is
        treated as melodic (one note at a time).
    rolloff : float
        Partial amplitude decays as ``n**-rolloff``.
    odd_weight, even_weight : float
        Relative weights of odd and even partials (clarinet-like bores favour odd ones).
    inharmonicity : str or float
        ``"piano"`` for the keyboard-dependent curve, else a constant B.
    n_partials : int
        Maximum number of partials per template.
    """

    name: str
    program: int
    midi_range: tuple[int, int]
    polyphonic: bool
    rolloff: float = 1.0
    odd_weight: float = 1.0
    even_weight: float = 1.0
    inharmonicity: str | float = 0.0
    n_partials: int = 20

    @property
    def gm_name(self) -> str:
        return GM_PROGRAM_NAMES[self.program]

    @property
    def family(self) -> str:
        return GM_FAMILIES[self.program // 8]

    @property
    def decaying(self) -> bool:
        """Whether a note's sound dies away on its own (struck or plucked: piano, guitar, harp,
        mallets, pizzicato), so the end of its sound does not show when it was released."""
        return self.family in ("piano", "chromatic percussion", "guitar", "bass") or self.program in (45, 46, 47) \
            or self.name in ("piano", "guitar", "mallets")

    @property
    def pitches(self) -> np.ndarray:
        return np.arange(self.midi_range[0], self.midi_range[1] + 1)

    def inharmonicity_for(self, pitches: np.ndarray) -> np.ndarray:
        """Inharmonicity coefficient B for each MIDI pitch."""
        pitches = np.asarray(pitches, dtype=float)
        if self.inharmonicity == "piano":
            return 10.0 ** (-4.2 + 0.024 * (pitches - 21.0))
        return np.full(pitches.shape, float(self.inharmonicity))


PRESETS: dict[str, Instrument] = {
    p.name: p
    for p in (
        Instrument("piano", 0, PIANO_RANGE, True, rolloff=1.1, inharmonicity="piano", n_partials=24),
        Instrument("guitar", 24, (40, 88), True, rolloff=1.2, inharmonicity=1.0e-4),
        Instrument("bass", 32, (28, 67), False, rolloff=1.3, inharmonicity=2.0e-4),
        Instrument("organ", 19, (36, 96), True, rolloff=0.9),
        Instrument("mallets", 12, (45, 108), True, rolloff=2.0, n_partials=6),
        Instrument("violin", 40, (55, 103), False, rolloff=0.9),
        Instrument("viola", 41, (48, 91), False, rolloff=0.9),
        Instrument("cello", 42, (36, 84), False, rolloff=0.9),
        Instrument("contrabass", 43, (28, 67), False, rolloff=1.0),
        Instrument("strings", 48, (36, 100), True, rolloff=1.0),
        Instrument("voice", 52, (40, 84), False, rolloff=1.3),
        Instrument("trumpet", 56, (52, 86), False, rolloff=0.8),
        Instrument("trombone", 57, (40, 77), False, rolloff=0.8),
        Instrument("horn", 60, (34, 77), False, rolloff=1.2),
        Instrument("tuba", 58, (26, 65), False, rolloff=1.1),
        Instrument("saxophone", 65, (49, 81), False, rolloff=0.9),
        Instrument("tenor saxophone", 66, (44, 76), False, rolloff=0.9),
        Instrument("oboe", 68, (58, 93), False, rolloff=0.8),
        Instrument("bassoon", 70, (34, 75), False, rolloff=0.9),
        Instrument("clarinet", 71, (50, 94), False, rolloff=1.0, odd_weight=1.0, even_weight=0.35),
        Instrument("piccolo", 72, (74, 108), False, rolloff=2.0, n_partials=8),
        Instrument("flute", 73, (59, 98), False, rolloff=1.8, n_partials=12),
        Instrument("recorder", 74, (60, 98), False, rolloff=2.0, n_partials=10),
        Instrument("synth lead", 80, (36, 96), False, rolloff=1.0),
    )
}

# program -> preset name, for programs with a preset of their own
_PROGRAM_PRESET: dict[int, str] = {
    **{p: "piano" for p in range(0, 8)},
    **{p: "mallets" for p in range(8, 16)},
    **{p: "organ" for p in range(16, 24)},
    **{p: "guitar" for p in range(24, 32)},
    **{p: "bass" for p in range(32, 40)},
    40: "violin", 41: "viola", 42: "cello", 43: "contrabass", 44: "strings", 45: "strings", 46: "guitar",
    47: "contrabass",
    **{p: "strings" for p in range(48, 52)},
    52: "voice", 53: "voice", 54: "voice", 55: "strings",
    56: "trumpet", 57: "trombone", 58: "tuba", 59: "trumpet", 60: "horn", 61: "trumpet", 62: "trumpet",
    63: "trumpet",
    64: "saxophone", 65: "saxophone", 66: "tenor saxophone", 67: "tenor saxophone", 68: "oboe", 69: "oboe",
    70: "bassoon", 71: "clarinet",
    72: "piccolo", 73: "flute", 74: "recorder", 75: "flute", 76: "flute", 77: "flute", 78: "flute", 79: "flute",
}
# families without their own presets fall back to a family default
_FAMILY_PRESET: dict[str, str] = {
    "synth lead": "synth lead", "synth pad": "strings", "synth effects": "strings", "ethnic": "guitar",
    "percussive": "mallets", "sound effects": "synth lead",
}
_ALIASES: dict[str, str] = {
    "sax": "saxophone", "altosax": "saxophone", "altosaxophone": "saxophone", "tenorsax": "tenor saxophone",
    "grandpiano": "piano", "clavinet": "clavi", "synthchoir": "synth voice", "doublebass": "contrabass", "acousticguitar": "guitar", "frenchhorn": "horn",
}


def normalize_name(name: str) -> str:
    """Lower-case ``name`` and drop spaces, hyphens, underscores and parentheses."""
    return re.sub(r"[\s\-_()]+", "", name.strip().lower())


def _by_program(program: int) -> Instrument:
    preset_name = _PROGRAM_PRESET.get(program) or _FAMILY_PRESET[GM_FAMILIES[program // 8]]
    preset = PRESETS[preset_name]
    # keep the requested GM program for export even when the template preset is shared
    return Instrument(**{**preset.__dict__, "program": program})


def known_instrument_names() -> list[str]:
    """Preset names (the short list shown in error messages)."""
    return sorted(PRESETS)


def resolve_instrument(value: "str | int | Instrument") -> Instrument:
    """Find the preset for a GM program number or a preset / GM name.

    Parameters
    ----------
    value : str, int or Instrument
        ``40``, ``"40"``, ``"violin"``, ``"Alto Sax"``, ``"acoustic_guitar_nylon"``…

    Raises
    ------
    InputError
        For an unknown name (the message lists the known ones) or a program
        outside 0..127.
    """
    if isinstance(value, Instrument):
        return value
    if isinstance(value, (int, np.integer)) and not isinstance(value, bool):
        program = int(value)
    elif isinstance(value, str) and value.strip().isdigit():
        program = int(value.strip())
    elif isinstance(value, str):
        key = normalize_name(value)
        key = normalize_name(_ALIASES.get(key, key))
        for preset in PRESETS.values():
            if normalize_name(preset.name) == key:
                return preset
        for program, gm_name in enumerate(GM_PROGRAM_NAMES):
            if normalize_name(gm_name) == key:
                return _by_program(program)
        raise InputError(
            f"unknown instrument {value!r}; use a General MIDI program number 0..127 or one of: "
            + ", ".join(known_instrument_names())
        )
    else:
        raise TypeError(f"instrument must be a name or a GM program number, got {type(value).__name__}")
    if not 0 <= program <= 127:
        raise InputError(f"General MIDI program must be in range 0..127, got {program}")
    return _by_program(program)
