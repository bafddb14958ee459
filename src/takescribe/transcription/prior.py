"""The aligned part as a prior on the activations: one prior for one-pass and long takes.

Method
------
:func:`score_mask` turns the aligned part into a mask ``M`` (n_pitches, n_frames): 1 where
the part has the pitch sounding at the score position heard in that frame (± ``tolerance``
seconds for alignment error), ``floor`` elsewhere. The *whole* warping path is used,
abandoned attempts included, so the notes of a restarted phrase are expected at both places
the student played them. :func:`part_prior` derives from it everything the transcription
uses: the mask on H (:func:`takescribe.transcription.nmf.decompose`), the dual onset
threshold, where the part starts each pitch and where it repeats one. One-pass
(:func:`takescribe.transcription.informed.informed_transcription`) and long-take
(:func:`takescribe.transcription.blocks.transcribe_long`) transcription both call it, for
the frames at hand.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.ndimage

from ..alignment.align import Alignment
from ..pitch import PIANO_RANGE
from ..reference.part import Reference, validate_reference
from .settings import SCORE_PRIOR, ScorePrior

__all__ = ["score_mask", "PartPrior", "part_prior", "prior_pitches"]

#: Seconds per cell of the score piano roll.
_GRID = 0.01
#: The piano range (MIDI 21..108, A0..C8): a part's pitch beyond the preset's range gets a template.
_PIANO_RANGE = PIANO_RANGE


def score_mask(
    reference: Reference,
    alignment: Alignment | None,
    pitches: np.ndarray,
    frame_times: np.ndarray,
    *,
    tolerance: float = 0.1,
    floor: float = 0.1,
    onsets_only: bool = False,
    repeats_only: bool = False,
    repeat_gap: float = 0.25,
) -> np.ndarray:
    """Where the aligned part expects each pitch in each take frame.

    Parameters
    ----------
    reference : Reference
    alignment : Alignment or None
        Take ↔ score map; None means the take follows the written tempo from 0 s.
    pitches : np.ndarray (n_pitches,)
        MIDI pitch of each dictionary row.
    frame_times : np.ndarray (n_frames,)
        Take time of each spectrogram frame, seconds.
    tolerance : float
        Seconds of slack on each side (alignment error, attack and release).
    floor : float
        Mask value where the part does not expect the pitch (0 forbids, 1 ignores the score).
    onsets_only : bool
        Mark only where the part *starts* the pitch (± ``tolerance``), not where it sounds.
    repeats_only : bool
        Mark only where the part starts the pitch *again*: a note beginning at most
        ``repeat_gap`` seconds (score time) after the end of a note of the same pitch
        (± ``tolerance``). Implies ``onsets_only``.
    repeat_gap : float
        Seconds of rest between two notes of one pitch that still count as a repeat.

    Returns
    -------
    np.ndarray (n_pitches, n_frames) float32 in [floor, 1]
    """
    validate_reference(reference)
    if not 0.0 <= floor <= 1.0:
        raise ValueError(f"floor must be in range 0..1, got {floor}")
    if tolerance < 0:
        raise ValueError(f"tolerance must be >= 0 seconds, got {tolerance}")
    if repeat_gap < 0:
        raise ValueError(f"repeat_gap must be >= 0 seconds, got {repeat_gap}")
    pitches = np.asarray(pitches, dtype=int)
    frame_times = np.asarray(frame_times, dtype=float)
    row_of = {int(p): k for k, p in enumerate(pitches)}
    end = max((n.offset for n in reference.notes), default=0.0) + 2 * tolerance + 1.0
    n_cells = int(np.ceil(end / _GRID)) + 1
    roll = np.zeros((len(pitches), n_cells), dtype=bool)
    pad = int(round(tolerance / _GRID))
    last_offset: dict[int, float] = {}
    for note in sorted(reference.notes, key=lambda n: (n.onset, n.pitch)):
        k = row_of.get(int(note.pitch))
        previous = last_offset.get(int(note.pitch))
        last_offset[int(note.pitch)] = max(note.offset, previous if previous is not None else note.offset)
        if k is None:
            continue
        if repeats_only and (previous is None or note.onset - previous > repeat_gap):
            continue
        a = max(int(np.floor(note.onset / _GRID)) - pad, 0)
        end = note.onset if onsets_only or repeats_only else note.offset
        b = min(int(np.ceil(end / _GRID)) + pad + 1, n_cells)
        roll[k, a:b] = True
    score_times = frame_times if alignment is None else np.asarray(alignment.take_to_score(frame_times), float)
    cells = np.clip(np.round(score_times / _GRID).astype(int), 0, n_cells - 1)
    expected = roll[:, cells]
    # before the first aligned frame and after the last the part expects nothing
    if alignment is not None:
        outside = (frame_times < alignment.take_times[0] - tolerance) | (frame_times > alignment.take_times[-1] + tolerance)
        expected[:, outside] = False
    if len(frame_times) > 1 and tolerance > 0:
        hop = float(np.median(np.diff(frame_times)))
        width = 2 * int(round(tolerance / hop)) + 1
        expected = scipy.ndimage.maximum_filter1d(expected.astype(np.uint8), size=width, axis=1).astype(bool)
    return np.where(expected, 1.0, floor).astype(np.float32)


@dataclass(frozen=True, eq=False)  # holds arrays: compared by identity
class PartPrior:
    """What the aligned part tells the transcription about some frames.

    Attributes
    ----------
    mask : np.ndarray (n_pitches, n_frames) float32
        The prior on H (:func:`score_mask` with the prior's ``floor``).
    thresholds : np.ndarray (n_pitches, n_frames)
        Onset levels: ``expected_factor`` times the blind one where the part expects the
        pitch, ``unexpected_factor`` times it elsewhere (dual threshold).
    starts : np.ndarray of bool (n_pitches, n_frames) or None
        Where the part starts each pitch (± tolerance).
    repeats : np.ndarray of bool (n_pitches, n_frames) or None
        Where it starts a pitch again right after a note of that pitch.
    """

    mask: np.ndarray
    thresholds: np.ndarray
    starts: np.ndarray | None = None
    repeats: np.ndarray | None = None

    def rows(self, index: np.ndarray) -> "PartPrior":
        """The prior of some pitch rows only (in the order of ``index``)."""
        return PartPrior(self.mask[index], self.thresholds[index],
                         None if self.starts is None else self.starts[index],
                         None if self.repeats is None else self.repeats[index])


def prior_pitches(reference: Reference, base_pitches: np.ndarray) -> np.ndarray:
    """Template pitches under a part: ``base_pitches`` and any piano-range pitch the part has beyond them."""
    part = np.array(sorted({int(n.pitch) for n in reference.notes}), dtype=int)
    return np.union1d(base_pitches, part[(part >= _PIANO_RANGE[0]) & (part <= _PIANO_RANGE[1])])


def part_prior(reference: Reference, alignment: Alignment | None, pitches: np.ndarray, frame_times: np.ndarray, *,
               onset_threshold: float, prior: ScorePrior = SCORE_PRIOR, hints: bool = True) -> PartPrior:
    """The part's prior for these frames (see :class:`PartPrior`).

    Parameters
    ----------
    reference, alignment : the part and its alignment with the take.
    pitches : np.ndarray (n_pitches,)
        MIDI pitch of each row.
    frame_times : np.ndarray (n_frames,)
        Take seconds.
    onset_threshold : float
        The blind onset level the dual threshold scales.
    prior : ScorePrior
    hints : bool
        Also compute ``starts`` and ``repeats`` (tracking needs them; the factorization does not).
    """
    mask = score_mask(reference, alignment, pitches, frame_times, tolerance=prior.tolerance, floor=prior.floor)
    thresholds = np.where(mask >= 1.0, onset_threshold * prior.expected_factor,
                          onset_threshold * prior.unexpected_factor)
    if not hints:
        return PartPrior(mask, thresholds)
    starts = score_mask(reference, alignment, pitches, frame_times, tolerance=prior.tolerance, floor=0.0,
                        onsets_only=True) >= 1.0
    repeats = score_mask(reference, alignment, pitches, frame_times, tolerance=prior.tolerance, floor=0.0,
                         repeats_only=True, repeat_gap=prior.repeat_gap) >= 1.0
    return PartPrior(mask, thresholds, starts, repeats)
