"""Reading takes: decoding, resampling, long takes spilled to a temporary file; the recording check."""

# `takescribe.audio` was a module before 0.2; its public names stay importable here.
from .load import (  # noqa: F401
    MIN_DURATION,
    SILENCE_PEAK_DBFS,
    CLIPPING_FRACTION,
    DC_OFFSET_LIMIT,
    TakescribeWarning,
    AudioInfo,
    max_resolvable_pitch,
    validate_audio,
    audio_info,
    load_audio,
    frames_segment,
    release_samples,
)
from .check import (  # noqa: F401
    CheckSettings,
    CHECK_SETTINGS,
    Limit,
    RecordingCheck,
    check_recording,
)

__all__ = ['MIN_DURATION', 'SILENCE_PEAK_DBFS', 'CLIPPING_FRACTION', 'DC_OFFSET_LIMIT', 'TakescribeWarning', 'AudioInfo', 'max_resolvable_pitch', 'validate_audio', 'audio_info', 'load_audio', 'frames_segment', 'release_samples',
           'CheckSettings', 'CHECK_SETTINGS', 'Limit', 'RecordingCheck', 'check_recording']
