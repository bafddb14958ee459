"""Moved to :mod:`takescribe.transcription.blocks` in 0.2; this module re-exports its public names for one release."""

from .transcription.blocks import (  # noqa: F401
    LONG_TAKE_SECONDS,
    validate_block_options,
    block_layout,
    transcribe_long,
)

__all__ = ['LONG_TAKE_SECONDS', 'validate_block_options', 'block_layout', 'transcribe_long']
