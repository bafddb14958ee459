"""Moved to :mod:`takescribe.jobs.batch` in 0.2; this module re-exports its public names for one release."""

from .jobs.batch import (  # noqa: F401
    AUDIO_SUFFIXES,
    SCORE_SUFFIXES,
    DRAFT_FILES,
    TakeJob,
    TakeResult,
    BatchSummary,
    validate_batch_folders,
    find_takes,
    process_take,
    run_batch,
)

__all__ = ['AUDIO_SUFFIXES', 'SCORE_SUFFIXES', 'DRAFT_FILES', 'TakeJob', 'TakeResult', 'BatchSummary', 'validate_batch_folders', 'find_takes', 'process_take', 'run_batch']
