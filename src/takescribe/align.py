"""Moved to :mod:`takescribe.alignment.align` in 0.2; this module re-exports its public names for one release."""

from .alignment.align import (  # noqa: F401
    MISMATCH_CONFIDENCE,
    MIN_PAUSE_SECONDS,
    PAUSE_COST,
    JUMP_SECONDS,
    UNALIGNED_COST,
    SKIP_COST,
    AlignmentWarning,
    AlignmentSegment,
    Alignment,
    take_features,
    reference_features,
    align_reference,
)

__all__ = ['MISMATCH_CONFIDENCE', 'MIN_PAUSE_SECONDS', 'PAUSE_COST', 'JUMP_SECONDS', 'UNALIGNED_COST', 'SKIP_COST', 'AlignmentWarning', 'AlignmentSegment', 'Alignment', 'take_features', 'reference_features', 'align_reference']
