"""Moved to :mod:`takescribe.features.spectrogram` in 0.2; this module re-exports its public names for one release."""

from .features.spectrogram import (  # noqa: F401
    ANALYSIS_SR,
    HOP_LENGTH,
    BINS_PER_SEMITONE,
    MIDI_LOW,
    MIDI_HIGH,
    Spectrogram,
    estimate_tuning,
    compute_spectrogram,
)

__all__ = ['ANALYSIS_SR', 'HOP_LENGTH', 'BINS_PER_SEMITONE', 'MIDI_LOW', 'MIDI_HIGH', 'Spectrogram', 'estimate_tuning', 'compute_spectrogram']
