""""To check by ear": written notes the activations show only faintly.

Method
------
The activations are tracked again with onset levels ``factor`` times the draft's, only
where the part starts a pitch (± the prior's tolerance). For struck and plucked
instruments, a key struck again while its previous sound still rings adds little to the
activation (the draft keeps one note) but its partials gain energy at once: a peak of the
pitch's onset novelty (:func:`takescribe.transcription.tracking.pitch_novelty`, scaled to
its 99.5th percentile) inside its own draft note, at least ``restrike_level`` and
``restrike_contrast`` times the note's median novelty, ``restrike_delay`` or more after the
note's start, is evidence too. Other notes' attacks that share partials leave such peaks as
well, so these notes never enter the draft: the comparison uses them only to avoid telling a
player that a note they played quietly was missed
(:func:`takescribe.comparison.compare.compare_notes`, ``faint_notes``).

A one-pass transcription keeps its activations, and :func:`faint_notes` works on them. A
long take does not (memory would grow with it): :func:`takescribe.transcription.blocks.transcribe_long`
calls :func:`faint_evidence` on each block's activations while it has them, and keeps the
notes in ``Transcription.faint``.
"""

from __future__ import annotations

import numpy as np

from ..alignment.align import Alignment
from ..notes import Note, sort_notes
from ..reference.part import Reference
from .blind import Transcription, normalize_spectrogram
from .instruments import Instrument
from .prior import score_mask
from .settings import FAINT_SETTINGS, SCORE_PRIOR, FaintSettings, ScorePrior, TrackingSettings, settings_for
from .tracking import activations_to_notes, pitch_novelty

__all__ = ["faint_notes", "faint_evidence", "faint_tracking", "restrikes"]


def faint_tracking(settings: TrackingSettings, faint: FaintSettings = FAINT_SETTINGS) -> TrackingSettings:
    """Tracking settings for faint notes: the draft's levels scaled by ``faint.factor``, no latency shift."""
    return TrackingSettings(offset_threshold=settings.offset_threshold * faint.factor,
                            release_ratio=settings.release_ratio, reonset_rise=settings.reonset_rise * faint.factor,
                            reonset_dip=faint.reonset_dip, min_duration=faint.min_duration,
                            local_floor=settings.local_floor, min_fall=None)


def restrikes(novelty: np.ndarray, pitches: np.ndarray, frame_times: np.ndarray, draft, *,
              settings: FaintSettings = FAINT_SETTINGS) -> list[Note]:
    """Onset-novelty peaks of a pitch inside its own draft notes (see the module docstring).

    ``novelty`` (n_pitches, n_frames) is scaled to its 99.5th percentile; ``draft`` are the
    draft notes lying on these frames.
    """
    rows = {int(p): k for k, p in enumerate(pitches)}
    found = []
    for note in draft:
        k = rows.get(note.pitch)
        if k is None:
            continue
        frames = np.nonzero((frame_times >= note.onset + settings.restrike_delay) & (frame_times < note.offset))[0]
        if len(frames) < 3:
            continue
        seg = novelty[k, frames]
        floor = max(settings.restrike_level, settings.restrike_contrast * float(np.median(seg)))
        peaks = np.nonzero((seg[1:-1] >= seg[:-2]) & (seg[1:-1] > seg[2:]) & (seg[1:-1] >= floor))[0] + 1
        found += [Note(float(frame_times[frames[i]]), note.offset, note.pitch, note.velocity) for i in peaks]
    return found


def faint_evidence(H: np.ndarray, pitches: np.ndarray, frame_times: np.ndarray, starts: np.ndarray, *,
                   instrument: Instrument, reference: float | None = None, novelty: np.ndarray | None = None,
                   draft=(), settings: FaintSettings = FAINT_SETTINGS) -> list[Note]:
    """Faint notes on some frames of a take.

    Parameters
    ----------
    H : np.ndarray (n_pitches, n_frames)
        Activations of the draft's final pass.
    pitches, frame_times :
        MIDI pitch of each row; seconds of each frame.
    starts : np.ndarray of bool (n_pitches, n_frames)
        Where the part starts each pitch (± tolerance).
    instrument : Instrument
    reference : float, optional
        The take's reference activation level (default ``H.max()``).
    novelty : np.ndarray (n_pitches, n_frames), optional
        Scaled onset novelty; needed for the restrikes of struck and plucked instruments.
    draft : sequence of Note
        The draft notes on these frames.
    settings : FaintSettings
    """
    blind = settings_for(instrument).tracking
    thresholds = np.where(starts, blind.onset_threshold * settings.factor, np.inf)
    faint = activations_to_notes(H, pitches, frame_times, settings=faint_tracking(blind, settings),
                                 polyphonic=instrument.polyphonic, onset_thresholds=thresholds, reference=reference)
    if instrument.decaying and novelty is not None:
        faint += restrikes(novelty, pitches, frame_times, draft, settings=settings)
    return sort_notes(faint)


def faint_notes(transcription: Transcription, reference: Reference, alignment: Alignment | None, *,
                prior: ScorePrior = SCORE_PRIOR, settings: FaintSettings = FAINT_SETTINGS) -> list[Note]:
    """Notes the part expects that the activations show only faintly (see the module docstring).

    Parameters
    ----------
    transcription : Transcription
        A score-informed transcription: with its spectrogram and activations (one pass), or
        with the faint notes its blocks kept (a long take, ``H`` None).
    reference, alignment : the part and its alignment with the take.
    prior : ScorePrior
        Its ``tolerance`` widens the part's starts.
    settings : FaintSettings

    Raises
    ------
    ValueError
        For a long take, when ``prior`` or ``settings`` differ from the defaults its blocks used.
    """
    if transcription.H is None or transcription.spectrogram is None:
        if transcription.faint is not None and (prior != SCORE_PRIOR or settings != FAINT_SETTINGS):
            raise ValueError("this long take's faint notes were found block by block with the default prior and "
                             "faint settings; transcribe it again with transcribe_long to change them")
        return list(transcription.faint or ())
    times = transcription.spectrogram.frame_times
    pitches = transcription.dictionary.pitches
    starts = score_mask(reference, alignment, pitches, times, tolerance=prior.tolerance, floor=0.0,
                        onsets_only=True) >= 1.0
    novelty = None
    if transcription.instrument.decaying:
        V, _ = normalize_spectrogram(transcription.spectrogram.V)
        novelty = pitch_novelty(V, transcription.dictionary.W)
    return faint_evidence(transcription.H, pitches, times, starts, instrument=transcription.instrument,
                          novelty=novelty, draft=transcription.notes, settings=settings)
