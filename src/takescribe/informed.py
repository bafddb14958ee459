"""Moved to :mod:`takescribe.transcription.informed` in 0.2; this module re-exports its public names for one release."""

from .transcription.informed import (  # noqa: F401
    INFORMED_DEFAULTS,
    score_mask,
    informed_transcription,
    faint_notes,
)

__all__ = ['INFORMED_DEFAULTS', 'score_mask', 'informed_transcription', 'faint_notes']
