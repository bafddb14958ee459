"""Moved to :mod:`takescribe.transcription.nmf` in 0.2; this module re-exports its public names for one release."""

from .transcription.nmf import (  # noqa: F401
    Factorization,
    beta_divergence,
    penalty_costs,
    validate_factorization_inputs,
    MIN_TILED_SAVING,
    MIN_FRAMES_PER_THREAD,
    decompose,
)

__all__ = ['Factorization', 'beta_divergence', 'penalty_costs', 'validate_factorization_inputs', 'MIN_TILED_SAVING', 'MIN_FRAMES_PER_THREAD', 'decompose']
