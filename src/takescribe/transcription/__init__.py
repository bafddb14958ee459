"""A take's spectrogram to notes: instruments, harmonic dictionary, NMF, tracking, blind and score-informed chains, long takes in blocks."""

# `takescribe.transcription` was a module before 0.2; its public names stay importable here.
from .blind import (  # noqa: F401
    Transcription,
    noise_templates,
    normalize_spectrogram,
    onset_exemption,
    track_notes,
    transcribe,
)
from .settings import (  # noqa: F401
    DEFAULT_SETTINGS,
    FAINT_SETTINGS,
    MELODIC_SETTINGS,
    POLYPHONIC_SETTINGS,
    SCORE_PRIOR,
    FaintSettings,
    ScorePrior,
    TrackingSettings,
    TranscriptionSettings,
    settings_for,
)

__all__ = ["TranscriptionSettings", "TrackingSettings", "ScorePrior", "FaintSettings", "DEFAULT_SETTINGS",
           "POLYPHONIC_SETTINGS", "MELODIC_SETTINGS", "SCORE_PRIOR", "FAINT_SETTINGS", "onset_exemption",
           "settings_for", "Transcription", "noise_templates", "normalize_spectrogram", "track_notes", "transcribe"]
