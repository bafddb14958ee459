"""Moved to :mod:`takescribe.export.midi` in 0.2; this module re-exports its public names for one release."""

from .export.midi import (  # noqa: F401
    PERCUSSION_CHANNEL,
    MidiTrack,
    midi_bytes,
    write_midi,
    read_midi_tempo_map,
    read_midi_time_signatures,
    read_midi_notes,
)

__all__ = ['PERCUSSION_CHANNEL', 'MidiTrack', 'midi_bytes', 'write_midi', 'read_midi_tempo_map', 'read_midi_time_signatures', 'read_midi_notes']
