"""Moved to :mod:`takescribe.export.noteio` in 0.2; this module re-exports its public names for one release."""

from .export.noteio import (  # noqa: F401
    MAPS_HEADER,
    MAPS_SUFFIXES,
    MIDI_SUFFIXES,
    SCORE_SUFFIXES,
    parse_maps,
    read_maps,
    format_maps,
    write_maps,
    read_notes,
)

__all__ = ['MAPS_HEADER', 'MAPS_SUFFIXES', 'MIDI_SUFFIXES', 'SCORE_SUFFIXES', 'parse_maps', 'read_maps', 'format_maps', 'write_maps', 'read_notes']
