"""Moved to :mod:`takescribe.reference.part` in 0.2; this module re-exports its public names for one release."""

from .reference.part import (  # noqa: F401
    DEFAULT_BPM,
    GRACE_QUARTERS,
    MAX_XML_BYTES,
    MAX_MIDI_BYTES,
    MAX_BARS,
    MUSICXML_SUFFIXES,
    MIDI_SUFFIXES,
    ScoreWarning,
    ScoreNote,
    Reference,
    validate_reference,
    list_parts,
    load_reference,
)

__all__ = ['DEFAULT_BPM', 'GRACE_QUARTERS', 'MAX_XML_BYTES', 'MAX_MIDI_BYTES', 'MAX_BARS', 'MUSICXML_SUFFIXES', 'MIDI_SUFFIXES', 'ScoreWarning', 'ScoreNote', 'Reference', 'validate_reference', 'list_parts', 'load_reference']
