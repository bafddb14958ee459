"""Moved to :mod:`takescribe.jobs.pipeline` in 0.2; this module re-exports its public names for one release."""

from .jobs.pipeline import (  # noqa: F401
    TranscribeOutputs,
    load_take,
    transcribe_take,
    transcribe_file,
    draft_midi_tracks,
    write_draft_midi,
    evaluate_files,
    learn_dictionary_file,
    REPORT_FILES,
    CompareOutputs,
    compare_take,
    compare_file,
    format_scores,
    format_comparison_summary,
)

__all__ = ['TranscribeOutputs', 'load_take', 'transcribe_take', 'transcribe_file', 'draft_midi_tracks', 'write_draft_midi', 'evaluate_files', 'learn_dictionary_file', 'REPORT_FILES', 'CompareOutputs', 'compare_take', 'compare_file', 'format_scores', 'format_comparison_summary']
