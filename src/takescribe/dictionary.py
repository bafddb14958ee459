"""Moved to :mod:`takescribe.transcription.dictionary` in 0.2; this module re-exports its public names for one release."""

from .transcription.dictionary import (  # noqa: F401
    Dictionary,
    harmonic_dictionary,
    adapt_dictionary,
    validate_dictionary,
    save_dictionary,
    load_dictionary,
)

__all__ = ['Dictionary', 'harmonic_dictionary', 'adapt_dictionary', 'validate_dictionary', 'save_dictionary', 'load_dictionary']
