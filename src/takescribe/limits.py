"""Limits by cost: what a part or a note list may ask of the computer, refused before it is spent.

A small file can describe a huge job: a MIDI delta time of hours, two notes ten hours apart,
a MusicXML part of 50,000 measures. Each reader checks its input against :data:`LIMITS`
before it allocates anything that grows with it, and the refusal names the limit.

Conventions
-----------
- Spans are seconds from 0 to the last offset; counts are notes or ``<measure>`` elements.
- The frame metrics of ``evaluate`` sample both note lists on a 10 ms grid as a
  ``(128, n_frames)`` roll per side (:func:`takescribe.evaluation.metrics.frame_scores`):
  about :data:`FRAME_BYTES_PER_FRAME` bytes per frame for both sides together (an int64
  count, its int64 running sum and the boolean roll for each of 128 pitches, twice).
"""

from __future__ import annotations

from dataclasses import dataclass

from .errors import InputError

__all__ = ["SizeLimits", "LIMITS", "FRAME_BYTES_PER_FRAME", "check_span", "check_note_count",
           "check_frame_cost"]

FRAME_BYTES_PER_FRAME = 2 * 128 * (8 + 8 + 1)


@dataclass(frozen=True)
class SizeLimits:
    """The documented limits (README, "Limits")."""

    #: music21's MusicXML reader slows with the square of a part's measures (2,000 load in about 10 s)
    max_part_measures: int = 2_000
    #: music21 reads every part of the file, so all parts together are bounded too
    max_score_measures: int = 8_000
    #: ten times the notes of a 2-hour take of dense piano (the 2-hour benchmark: about 17,000)
    max_notes: int = 200_000
    #: longer than any part or take analysed here (a 2-hour take must pass)
    max_span_seconds: float = 3 * 3600.0
    #: evaluate's frame metrics on the 10 ms grid (about 1.1 GB per hour of span)
    max_frame_bytes: int = 2 * 1024**3
    #: a longer take is spilled to a temporary file and dereverberated and transcribed in blocks,
    #: so memory does not grow with the take
    long_take_seconds: float = 150.0


LIMITS = SizeLimits()


def check_span(span_seconds: float, source, *, what: str = "the notes", error: type = InputError) -> None:
    """Refuse a span over :attr:`SizeLimits.max_span_seconds` (``source`` names the file)."""
    if not span_seconds <= LIMITS.max_span_seconds:
        raise error(
            f"{source}: {what} last {span_seconds / 3600:.1f} hours (up to {span_seconds:.0f} s); at most"
            f" {LIMITS.max_span_seconds / 3600:.0f} hours are read (a damaged file, or a huge gap between notes?)")


def check_note_count(n_notes: int, source, *, error: type = InputError) -> None:
    """Refuse more than :attr:`SizeLimits.max_notes` notes."""
    if n_notes > LIMITS.max_notes:
        raise error(f"{source}: {n_notes} notes; at most {LIMITS.max_notes} are read; split the file")


def check_frame_cost(span_seconds: float, source, *, hop: float = 0.01) -> None:
    """Refuse a frame evaluation whose rolls would exceed :attr:`SizeLimits.max_frame_bytes`."""
    need = (span_seconds / hop + 1) * FRAME_BYTES_PER_FRAME
    if need > LIMITS.max_frame_bytes:
        raise InputError(
            f"{source}: frame metrics over {span_seconds:.0f} s would need {need / 1024**3:.1f} GiB; the limit is"
            f" {LIMITS.max_frame_bytes / 1024**3:.0f} GiB (about {LIMITS.max_frame_bytes / FRAME_BYTES_PER_FRAME * hop / 60:.0f}"
            " minutes of notes); evaluate a shorter excerpt")
