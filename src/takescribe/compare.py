"""Moved to :mod:`takescribe.comparison.compare` in 0.2; this module re-exports its public names for one release."""

from .comparison.compare import (  # noqa: F401
    KINDS,
    pitch_name,
    Finding,
    Comparison,
    findings_json,
    validate_comparison_options,
    compare_notes,
)

__all__ = ['KINDS', 'pitch_name', 'Finding', 'Comparison', 'findings_json', 'validate_comparison_options', 'compare_notes']
