"""Moved to :mod:`takescribe.evaluation.metrics` in 0.2; this module re-exports its public names for one release."""

from .evaluation.metrics import (  # noqa: F401
    N_DECIMALS,
    NoteScores,
    FrameScores,
    validate_note_arrays,
    candidate_matrix,
    maximum_matching,
    match_notes,
    note_scores,
    notes_to_frames,
    frame_scores,
    evaluate_notes,
)

__all__ = ['N_DECIMALS', 'NoteScores', 'FrameScores', 'validate_note_arrays', 'candidate_matrix', 'maximum_matching', 'match_notes', 'note_scores', 'notes_to_frames', 'frame_scores', 'evaluate_notes']
