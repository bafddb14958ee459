"""Moved to :mod:`takescribe.transcription.tracking` in 0.2; this module re-exports its public names for one release."""

from .transcription.tracking import (  # noqa: F401
    validate_activations,
    monophonic_activations,
    pitch_novelty,
    activations_to_notes,
    suppress_harmonic_ghosts,
)

__all__ = ['validate_activations', 'monophonic_activations', 'pitch_novelty', 'activations_to_notes', 'suppress_harmonic_ghosts']
