"""Tuned numbers of the alignment, as one frozen value.

Each field says in one line why it has its value; the tuning history lives in the commit
messages and the benchmark logs.
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["AlignmentSettings", "SETTINGS"]


@dataclass(frozen=True, slots=True)
class AlignmentSettings:
    """The alignment's own numbers (seconds unless said otherwise)."""

    # below this confidence the take may be another piece or part (transposed parts score about 0)
    mismatch_confidence: float = 0.3
    # a standstill of the score shorter than this is tempo, not a pause
    min_pause_seconds: float = 0.5
    # cost per take frame of a (0, 1) step: a pause must be paid for, or rubato would become pauses
    pause_cost: float = 0.1
    # a jump back costs this many seconds of mismatch: only a real restart pays for itself
    jump_seconds: float = 0.5
    # cost per sounding take frame left outside the path (silence costs nothing)
    unaligned_cost: float = 1.5
    # cost per score frame skipped at either end (a take of only part of the piece)
    skip_cost: float = 0.25
    # frames this far (dB) below the loud ones are rests
    silence_db: float = -40.0
    # log compression factor of the pitch energy (log(1 + c x)), as in chroma practice
    compression: float = 100.0
    # decaying tail of the onset chroma (DLNCO, Ewert et al. 2009 use about this)
    onset_decay_seconds: float = 0.2
    # onset features are normalised by their maximum over this many seconds either side
    local_norm_seconds: float = 1.0
    # decay time of a rendered note's envelope while held (a sustained instrument's slow fade)
    envelope_seconds: float = 1.5
    # decay time of a rendered note after its written end (a damped release)
    release_seconds: float = 0.1
    # partials rendered per part note
    rendered_partials: int = 8
    # a jump back that lands this soon after a note takes that note into the new pass
    landing_seconds: float = 0.1
    # frames less than this power ratio (6 dB) above the room's noise floor are silence
    noise_margin: float = 4.0
    # the noise floor is trusted only this far (dB) below the loud frames
    noise_floor_db: float = -15.0
    # onset norm floor, relative to the 99th percentile (quiet passages are not blown up)
    onset_floor: float = 0.05
    # the path must span this share of the sounding frames for full confidence
    coverage_full: float = 0.75
    # the full-matrix coarse pass stays under this many cells (memory)
    max_coarse_cells: int = 16_000_000
    # the transposed-part passes run on at most this many take frames (speed)
    confidence_frames: int = 1000
    # scales the gain over the best transposition so a clear match saturates at 1
    confidence_gain: float = 2.0
    # score gaps on each side read for the local tempo when looking for pauses
    pause_neighbours: int = 4


SETTINGS = AlignmentSettings()
