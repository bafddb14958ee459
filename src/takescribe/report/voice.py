""""Hear the part": the written notes as the page's script will sound them.

The sound comes from the model the analysis uses, nothing downloaded and no sound bank:
each pitch is the sum of the partials of its harmonic template
(:mod:`takescribe.transcription.dictionary`), at f_n = n·f0·√(1 + B·n²) with the template's
partial amplitudes (adapted to the take when the transcription learned them), tuned as the
take was. The notes are placed where the comparison expects them in the take, that is at
the player's own pace around each place; the page plays them with the Web Audio API.

Conventions
-----------
- Frequencies in Hz, amplitudes relative (the strongest partial of a pitch is 1), times
  in seconds of the take, pitches MIDI numbers (A4 = 69 = 440 Hz, ISO 16).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

__all__ = ["VoiceSettings", "part_voice"]


@dataclass(frozen=True)
class VoiceSettings:
    """How many partials the page synthesizes per note.

    Attributes
    ----------
    max_partials : int
        A dozen partials already give each instrument family its colour; more only cost
        oscillators in the browser.
    min_amplitude : float
        Partials weaker than this fraction of the strongest are left out (inaudible beside it).
    max_frequency : float
        Hz; partials above are left out (every browser's output rate holds them).
    """

    max_partials: int = 12
    min_amplitude: float = 0.02
    max_frequency: float = 10000.0


def part_voice(reference: Any, comparison: Any, *, instrument: Any, dictionary: Any = None, tuning: float = 0.0,
               settings: VoiceSettings | None = None) -> dict:
    """JSON-ready description of the part's sound for the page's script.

    Parameters
    ----------
    reference : Reference
    comparison : Comparison
        Its ``expected_onsets``/``expected_offsets`` place the part at the player's pace.
    instrument : str, int or Instrument
        The preset (inharmonicity, partial roll-off, whether notes die away by themselves).
    dictionary : Dictionary, optional
        The dictionary of the transcription; its partial amplitudes are used for the pitches
        it holds, the preset's own roll-off elsewhere.
    tuning : float
        Semitones the take is tuned away from A4 = 440 Hz.

    Returns
    -------
    dict
        ``{"decaying": bool, "partials": {pitch: [[Hz, amplitude], ...]}, "notes": [[onset, offset, pitch], ...]}``.
    """
    from ..transcription.instruments import resolve_instrument

    settings = settings or VoiceSettings()
    preset = resolve_instrument(instrument)
    onsets = np.asarray(comparison.expected_onsets, dtype=float)
    offsets = np.asarray(comparison.expected_offsets, dtype=float)
    notes = [[round(float(onsets[k]), 3), round(float(max(offsets[k], onsets[k] + 0.05)), 3), int(n.pitch)]
             for k, n in enumerate(reference.notes) if k < len(onsets) and np.isfinite(onsets[k])]
    pitches = sorted({p for _, _, p in notes})
    return {"decaying": bool(preset.decaying),
            "partials": {str(p): _partials(p, preset, dictionary, tuning, settings) for p in pitches},
            "notes": notes}


def _partials(pitch: int, preset: Any, dictionary: Any, tuning: float, settings: VoiceSettings) -> list:
    n = np.arange(1, preset.n_partials + 1, dtype=float)
    amps = None
    if dictionary is not None:
        where = np.flatnonzero(np.asarray(dictionary.pitches) == pitch)
        if len(where):
            amps = np.asarray(dictionary.partial_amplitudes[where[0]], dtype=float)[: len(n)]
    if amps is None or not np.any(amps > 0):
        # the preset's own template shape, as harmonic_dictionary builds it
        amps = n ** (-preset.rolloff) * np.where(n % 2 == 1, preset.odd_weight, preset.even_weight)
    n = n[: len(amps)]
    f0 = 440.0 * 2.0 ** ((pitch + tuning - 69.0) / 12.0)
    B = float(np.asarray(preset.inharmonicity_for(np.array([pitch])))[0])
    freqs = n * f0 * np.sqrt(1.0 + B * n * n)
    amps = amps / max(float(amps.max()), 1e-12)
    keep = (amps >= settings.min_amplitude) & (freqs <= settings.max_frequency)
    order = np.argsort(-amps[keep])[: settings.max_partials]
    chosen = sorted(zip(freqs[keep][order], amps[keep][order]))
    if not chosen:
        chosen = [(f0, 1.0)]
    return [[round(float(f), 2), round(float(a), 4)] for f, a in chosen]
