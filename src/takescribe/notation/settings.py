"""Tuned numbers of the notation stage, one frozen value per step.

Each field carries one line saying why it has its value. Unless a line says otherwise the
values were set by reasoning on musical cases or while looking at the round-trip pieces of
``tests/test_notation.py`` (so figures measured on those are in-sample); the tuning
history is in the commit messages and ``tests/benchmarks/bench_notation.py``'s log.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from fractions import Fraction

__all__ = ["MeterSettings", "QuantizeSettings", "HandSettings", "PartDraftSettings",
           "METER", "QUANTIZE", "HANDS", "PART_DRAFT"]


@dataclass(frozen=True)
class MeterSettings:
    """Beat tracking refinements and the meter / downbeat choice (:mod:`.meter`)."""

    # librosa's beat tracker prior when no tempo is known (its own default)
    start_bpm: float = 120.0
    # a period to fall back on when fewer than two beats are found: 120 per minute
    default_period: float = 0.5
    # beats move to a note onset within this share of a period (envelopes lag note starts)
    snap_window: float = 0.12
    # onsets within this share of a period measure the envelope's constant lag
    lag_reach: float = 0.25
    # an onset within this share of a period is on the beat (hit rate of a grid)
    hit_tolerance: float = 0.1
    # an onset within this share of a beat is on a plain (1/4) or triplet (1/3) grid point
    grid_tolerance: float = 0.05
    # onsets this close (in beats) to a grid point anchor the least-squares refinement
    refine_tolerance: float = 0.08
    # listeners tap most readily near 0.55 s a beat (van Noorden & Moelants 1999, from memory)
    preferred_period: float = 0.55
    # weight of that preference per octave squared: a weak pull, onsets decide first
    preference_weight: float = 0.5
    # another beat level must explain the onsets better by this much to replace the tracked one
    tempo_margin: float = 0.1
    # beat periods considered, seconds (37..240 beats per minute)
    period_range: tuple = (0.25, 1.6)
    # beats this share of a period beyond the first/last note are added or dropped
    tail_margin: float = 0.3
    # a note starts on a beat when within this share of a period (accents)
    accent_reach: float = 0.2
    # accent weights of the longest note, a bass onset, loudness and note count
    accent_weights: tuple = (1.0, 0.7, 0.5, 0.3)
    # long notes rarely cross bar lines unless syncopated: weight of the crossing share
    crossing_penalty: float = 2.0
    # pieces start on a downbeat, or after a one-beat upbeat
    downbeat_bonus: float = 0.3
    upbeat_bonus: float = 0.15
    # 2 and 4 beats both fit; the common one is kept unless the other leads by this
    even_margin: float = 0.25
    # duple bars are more common: triple must win by a fifth of an accent deviation
    triple_margin: float = 0.2
    # compound meter: at least this many onsets on beat thirds, and twice the halves
    compound_min_thirds: int = 4
    compound_tolerance: float = 0.06
    # compound beats are dotted quarters, rarely faster than this period
    compound_min_period: float = 0.35


@dataclass(frozen=True)
class QuantizeSettings:
    """The choice of subdivision per beat and the written values (:mod:`.quantize`)."""

    # λ in beats: a finer level must move the beat's events by more than 1/20 beat per level
    complexity_weight: float = 0.05
    # levels of subdivision a reader parses; triplets cost as much as the next plain level
    complexity: dict = field(default_factory=lambda: {1: 0.0, 2: 1.0, 3: 2.0, 4: 2.0, 6: 3.0, 8: 3.0, 12: 4.0})
    # offsets are less precise than onsets (decays, releases): half weight
    offset_weight: float = 0.5
    # the shortest written value, a 32nd note, in quarters
    shortest: Fraction = Fraction(1, 8)
    # a triplet reading needs this many onsets of its beat off the plain grid
    triplet_min_onsets: int = 2
    # an onset this close (in beats) to a tuplet point sits on it
    tuplet_tolerance: float = 0.06
    # and must beat the best plain reading by this much (beats): the simple reading wins
    triplet_margin: float = 0.08
    # a silence of at least this many beats before the next onset is written as a rest
    rest_beats: float = 0.5
    # a decaying sound (piano, guitar) fades before its key is released: a longer silence
    rest_beats_decaying: float = 1.5
    # ... and only when the sound stopped before this share of the way (else legato)
    rest_share: float = 0.6
    # a note sounding this many beats past a later onset is held through it
    overlap_beats: float = 0.25


@dataclass(frozen=True)
class HandSettings:
    """The split of piano notes between the hands (:mod:`.staves`)."""

    # a major tenth: about the widest comfortable hand span (common practice, no source)
    hand_span: int = 16
    # cost per semitone beyond that span: a stretch is rarely written
    span_penalty: float = 20.0
    # at most five fingers a hand; cost per extra note
    max_notes: int = 5
    crowd_penalty: float = 50.0
    # weak pull of the right hand above E4 and the left hand below G3, per semitone
    middle_pull: float = 0.5
    right_floor: int = 55
    left_ceiling: int = 64
    # a hand crossing the other's held notes
    crossing_penalty: float = 10.0
    # hand centres follow the notes given to them at this rate
    centre_follow: float = 0.4
    # the hand centres stay at least this many semitones apart
    min_centre_gap: float = 7.0


@dataclass(frozen=True)
class PartDraftSettings:
    """How played notes take the values of the part (:mod:`.from_part`)."""

    # a played note belongs to a part note starting within this many seconds (after alignment)
    match_window: float = 0.25
    # a wrong note played in the place of a part note takes its place and length (within
    # half the window: a wrong note is rarely also late)
    wrong_notes_take_place: bool = True
    # a played note much shorter than written (fraction of the written length) is a
    # shortened note: only for sustaining instruments, which are heard to stop
    held_short_share: float = 0.5
    # a part note the transcription did not find, where the part sounds on, lengthens the
    # played note before it rather than leaving a rest the part lacks (correct takes of the
    # world corpus' tuning split: such rests were most bars with a rest the part lacks)
    bridge_unheard: bool = True


METER = MeterSettings()
QUANTIZE = QuantizeSettings()
HANDS = HandSettings()
PART_DRAFT = PartDraftSettings()
