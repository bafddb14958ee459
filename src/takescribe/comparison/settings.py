"""Tuned numbers of the comparison, as one frozen value.

The keyword options of :func:`takescribe.comparison.compare.compare_notes` (timing and
duration tolerances, windows) are the user's; the numbers here are the method's own. Each
field says in one line why it has its value; the tuning history lives in the commit messages
and in the logs of ``tests/benchmarks/bench_findings.py``.
"""

from __future__ import annotations

from dataclasses import dataclass

from ..pitch import PARTIAL_STEPS  # noqa: F401 - re-exported: where the partials sit above a note

__all__ = ["ComparisonTuning", "TUNING", "PARTIAL_STEPS"]


@dataclass(frozen=True, slots=True)
class ComparisonTuning:
    """The comparison's own numbers (seconds unless said otherwise)."""

    # votes for one time shift agree within this: the spread of onsets in a steady take
    vote_tolerance: float = 0.15
    # a repeat closer than this to its first attempt is a repeated note, not a restart
    min_restart_shift: float = 0.5
    # at most this many times min_restart_notes part notes are walked back for a restart's head
    restart_walk_back: int = 4
    # how far after the last repeated note the note the player stopped on may lie
    stopped_note_reach: float = 4.0
    # share of a run or stretch that must vote for one shift (a majority)
    majority: float = 0.5
    # a local tempo line steeper or flatter than this many times the overall pace is no tempo
    slope_limit: float = 4.0
    # fewer distinct onset groups than this take the overall pace for the slope
    min_line_points: int = 4
    # a hesitation delays its group by more than this share of the gap the line expects
    hesitation_gap_share: float = 0.5
    # and the next group keeps at least this share of the delay (the music resumed shifted)
    hesitation_persist: float = 0.5
    # the closer tempo line counts only where its groups lie within this share of the tolerance
    close_fit_share: float = 0.5
    # onsets this far around a pause are searched for where the music resumed
    resume_search: float = 1.0
    # a later onset within this of a note's own onset is a chord partner, not the next note
    chord_spread: float = 0.05
    # a faint note this close to where a part note should sound is evidence it was played
    faint_window: float = 0.15
    # onsets on each side used to read the part's seconds per quarter note
    rate_reach: int = 4


TUNING = ComparisonTuning()
