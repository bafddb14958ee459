"""A take's spectrogram to notes: instruments, harmonic dictionary, NMF, tracking, blind and score-informed chains, long takes in blocks."""

# `takescribe.transcription` was a module before 0.2; its public names stay importable here.
from .blind import (  # noqa: F401
    TranscriptionSettings,
    DEFAULT_SETTINGS,
    POLYPHONIC_SETTINGS,
    MELODIC_SETTINGS,
    onset_exemption,
    settings_for,
    Transcription,
    noise_templates,
    normalize_spectrogram,
    transcribe,
)

__all__ = ['TranscriptionSettings', 'DEFAULT_SETTINGS', 'POLYPHONIC_SETTINGS', 'MELODIC_SETTINGS', 'onset_exemption', 'settings_for', 'Transcription', 'noise_templates', 'normalize_spectrogram', 'transcribe']
