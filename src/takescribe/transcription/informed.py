"""Score-informed transcription: the aligned reference part as a prior on the activations.

Method
------
1. The reference is aligned with the take (:func:`takescribe.alignment.align.align_reference`).
   The *whole* warping path is used, abandoned attempts included, so the notes of a
   restarted phrase are expected at both places the student played them.
2. :func:`takescribe.transcription.prior.part_prior` turns the aligned part into a mask
   ``M`` (n_pitches, n_frames): 1 where the part has the pitch sounding at the score
   position heard in that frame (± ``tolerance`` seconds for alignment error), ``floor``
   elsewhere, and into the hints below.
3. The factorization (:func:`takescribe.transcription.nmf.decompose`) starts from ``H``
   multiplied by ``M`` and adds the weighted L1 prior ``mask_penalty · Σ (1 − M) ⊙ H``:
   unexpected pitches are discouraged, not forbidden, so a wrong or extra note with enough
   energy still gets its activation. Templates are semi-learned on the take as in blind mode.
4. Notes are tracked with a dual threshold (after Benetos, Klapuri and Dixon,
   "Score-informed transcription for automatic piano tutoring", EUSIPCO 2012):
   ``expected_factor`` times the usual onset threshold where the part expects a
   pitch (recovering quiet written notes), ``unexpected_factor`` times it elsewhere.
   A stricter threshold for unwritten pitches (factor > 1) hid real wrong and extra
   notes, so the default keeps the blind threshold there.
5. Where the part starts a pitch again right after a note of that pitch, melodic
   tracking also splits a sounding note at a valley of its activation between two swells
   (a bow change or breath between legato repeats): a valley as deep as any re-onset's dip,
   or a shallower one (``repeat_dip``) that the next swell climbs out of at full strength
   or that is narrow (``notch_width``, a tongued repeat's gap). The slower, wider sag of a
   note held through the written repeat keeps it one note
   (:func:`takescribe.transcription.tracking.activations_to_notes`).

The score is a prior, never a cage: nothing in this module removes a detected note
because the part does not have it. The same prior serves long takes
(:func:`takescribe.transcription.blocks.transcribe_long`), block by block.
"""

from __future__ import annotations

import dataclasses
from typing import Callable

import numpy as np

from ..alignment.align import Alignment, align_reference
from ..features.spectrogram import compute_spectrogram
from ..reference.part import Reference, validate_reference
from .blind import Transcription, transcribe
from .dictionary import Dictionary
from .evidence import faint_notes
from .instruments import Instrument, resolve_instrument
from .prior import part_prior, prior_pitches, score_mask
from .settings import INFORMED_DEFAULTS, SCORE_PRIOR, ScorePrior, TranscriptionSettings, settings_for

__all__ = ["score_mask", "informed_transcription", "faint_notes", "INFORMED_DEFAULTS", "ScorePrior", "SCORE_PRIOR"]


def informed_transcription(
    y: np.ndarray,
    sr: int,
    reference: Reference,
    *,
    alignment: Alignment | None = None,
    instrument: "str | int | Instrument | None" = None,
    dictionary: Dictionary | None = None,
    settings: TranscriptionSettings | None = None,
    prior: ScorePrior = SCORE_PRIOR,
    progress: Callable[[str], None] | None = None,
) -> Transcription:
    """Transcribe a take guided by its reference part (see the module docstring).

    Parameters
    ----------
    y, sr : the take (mono) and its sample rate.
    reference : Reference
    alignment : Alignment, optional
        Computed with :func:`takescribe.alignment.align.align_reference` when not given.
    instrument : str, int or Instrument, optional
        Defaults to the part's MIDI program, else piano.
    dictionary : Dictionary, optional
        A calibrated dictionary.
    settings : TranscriptionSettings, optional
        Defaults to :func:`takescribe.transcription.settings.settings_for` the instrument;
        its ``ghost_ratio`` is replaced by the prior's (written notes are exempt).
    prior : ScorePrior
        Tolerance, mask floor and penalty, dual-threshold factors, ghost ratio.

    Returns
    -------
    Transcription
    """
    validate_reference(reference)
    if instrument is None:
        instrument = reference.midi_program if reference.midi_program is not None else "piano"
    preset = resolve_instrument(instrument)
    settings = settings or settings_for(preset)
    if alignment is None:
        alignment = align_reference(y, sr, reference)
    spectrogram = compute_spectrogram(y, sr)
    # template pitches: the preset's (or calibrated dictionary's) range plus any piano-range
    # pitch the part has beyond it; the prior's rows follow this list
    pitches = prior_pitches(reference, preset.pitches if dictionary is None else dictionary.pitches)
    part = part_prior(reference, alignment, pitches, spectrogram.frame_times,
                      onset_threshold=settings.tracking.onset_threshold, prior=prior)
    return transcribe(y, sr, instrument=preset, dictionary=dictionary, part=part, mask_penalty=prior.mask_penalty,
                      spectrogram=spectrogram, progress=progress, pitches=pitches,
                      settings=dataclasses.replace(settings, ghost_ratio=prior.ghost_ratio))
