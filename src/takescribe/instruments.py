"""Moved to :mod:`takescribe.transcription.instruments` in 0.2; this module re-exports its public names for one release."""

from .transcription.instruments import (  # noqa: F401
    GM_PROGRAM_NAMES,
    GM_FAMILIES,
    Instrument,
    PRESETS,
    normalize_name,
    known_instrument_names,
    resolve_instrument,
)

__all__ = ['GM_PROGRAM_NAMES', 'GM_FAMILIES', 'Instrument', 'PRESETS', 'normalize_name', 'known_instrument_names', 'resolve_instrument']
