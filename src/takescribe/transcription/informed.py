"""Score-informed transcription: the aligned reference part as a prior on the activations.

Method
------
1. The reference is aligned with the take (:func:`takescribe.align.align_reference`).
   The *whole* warping path is used, abandoned attempts included, so the notes of a
   restarted phrase are expected at both places the student played them.
2. :func:`score_mask` turns the aligned part into a mask ``M`` (n_pitches, n_frames):
   1 where the part has the pitch sounding at the score position heard in that frame
   (± ``tolerance`` seconds for alignment error), ``floor`` elsewhere.
3. The factorization (:func:`takescribe.nmf.decompose`) starts from ``H`` multiplied by
   ``M`` and adds the weighted L1 prior ``mask_penalty · Σ (1 − M) ⊙ H``: unexpected
   pitches are discouraged, not forbidden, so a wrong or extra note with enough energy
   still gets its activation. Templates are semi-learned on the take as in blind mode.
4. Notes are tracked with a dual threshold (after Benetos, Klapuri and Dixon,
   "Score-informed transcription for automatic piano tutoring", EUSIPCO 2012):
   ``expected_factor`` times the usual onset threshold where the part expects a
   pitch (recovering quiet written notes), ``unexpected_factor`` times it elsewhere.
   Tuning showed that any stricter threshold for unwritten pitches (factor > 1) hid
   real wrong and extra notes, so the default keeps the blind threshold there.
5. Where the part starts a pitch again right after a note of that pitch
   (:func:`score_mask` with ``repeats_only``), melodic tracking also splits a sounding
   note at a valley of its activation between two swells (a bow change or breath
   between legato repeats): a valley as deep as any re-onset's dip, or a shallower one
   (``repeat_dip``) that the next swell climbs out of at full strength or that is narrow
   (``notch_width``, a tongued repeat's gap). The slower, wider sag of a note held
   through the written repeat keeps it one note
   (:func:`takescribe.tracking.activations_to_notes`).

The score is a prior, never a cage: nothing in this module removes a detected note
because the part does not have it.
"""

from __future__ import annotations

import dataclasses
from typing import Callable

import numpy as np
import scipy.ndimage

from ..alignment.align import Alignment, align_reference
from ..transcription.dictionary import Dictionary
from ..transcription.instruments import Instrument, resolve_instrument
from ..notes import Note, sort_notes
from ..reference.part import Reference, validate_reference
from ..features.spectrogram import compute_spectrogram
from ..transcription.tracking import activations_to_notes, pitch_novelty
from ..transcription.blind import Transcription, TranscriptionSettings, normalize_spectrogram, settings_for, transcribe

__all__ = ["score_mask", "informed_transcription", "faint_notes", "INFORMED_DEFAULTS"]

# tuned on the deviation takes of the cello ballad, flute and piano march (see DEVELOPERS.md);
# confirmed on the piano waltz and violin minuet.
# ghost_ratio: an unwritten note on the 2nd-4th partial of a note starting with it is kept only
# when at least 1.2 times as loud (written notes are exempt: the dual threshold of Benetos,
# Klapuri and Dixon 2012 applied to overtone ghosts). Tuned on the tuning split of the large
# corpus (build_corpus.py --large): 0.8 -> 1.0 -> 1.2 -> 1.6 raised informed onset F 0.978 ->
# 0.982 (reverberant Alberti bass 0.902 -> 0.987, no piece lower), 1.6-2.5 the same; 1.2 keeps
# more room for a real wrong note an octave above another. Confirmed on held-out (committed:
# sustained bass 0.987 -> 1.000, chorale 0.980 -> 0.990, guitar jig 0.985 -> 1.000, mixed
# guitar 0.936 -> 0.957; large: 6 pieces up, none down) with the practice-report findings
# unchanged (wrong notes an octave off are still found).
INFORMED_DEFAULTS = {"tolerance": 0.1, "floor": 0.3, "mask_penalty": 0.1, "unexpected_factor": 1.0,
                     "expected_factor": 0.5, "ghost_ratio": 1.2}
_GRID = 0.01  # seconds per cell of the score piano roll


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
    pitches = np.asarray(pitches, dtype=int)
    frame_times = np.asarray(frame_times, dtype=float)
    row_of = {int(p): k for k, p in enumerate(pitches)}
    end = max((n.offset for n in reference.notes), default=0.0) + 2 * tolerance + 1.0
    n_cells = int(np.ceil(end / _GRID)) + 1
    roll = np.zeros((len(pitches), n_cells), dtype=bool)
    pad = int(round(tolerance / _GRID))
    if repeat_gap < 0:
        raise ValueError(f"repeat_gap must be >= 0 seconds, got {repeat_gap}")
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


def informed_transcription(
    y: np.ndarray,
    sr: int,
    reference: Reference,
    *,
    alignment: Alignment | None = None,
    instrument: "str | int | Instrument | None" = None,
    dictionary: Dictionary | None = None,
    settings: TranscriptionSettings | None = None,
    tolerance: float = INFORMED_DEFAULTS["tolerance"],
    floor: float = INFORMED_DEFAULTS["floor"],
    mask_penalty: float = INFORMED_DEFAULTS["mask_penalty"],
    unexpected_factor: float = INFORMED_DEFAULTS["unexpected_factor"],
    expected_factor: float = INFORMED_DEFAULTS["expected_factor"],
    ghost_ratio: float = INFORMED_DEFAULTS["ghost_ratio"],
    progress: Callable[[str], None] | None = None,
) -> Transcription:
    """Transcribe a take guided by its reference part (see the module docstring).

    Parameters
    ----------
    y, sr : the take (mono) and its sample rate.
    reference : Reference
    alignment : Alignment, optional
        Computed with :func:`takescribe.align.align_reference` when not given.
    instrument : str, int or Instrument, optional
        Defaults to the part's MIDI program, else piano.
    dictionary : Dictionary, optional
        A calibrated dictionary.
    settings : TranscriptionSettings, optional
    tolerance, floor : see :func:`score_mask`.
    mask_penalty : float
        Weight of the L1 prior on unexpected activations.
    unexpected_factor : float
        Onset threshold multiplier where the part does not expect the pitch (>= 1).
    expected_factor : float
        Onset threshold multiplier where the part expects the pitch (<= 1).
    ghost_ratio : float
        Notes on the 2nd–4th partial of a note starting with them are dropped when quieter
        than this multiple of it (:func:`takescribe.tracking.suppress_harmonic_ghosts`; above 1
        a ghost must be louder than the note it sits on), unless the part starts that pitch there.

    Returns
    -------
    Transcription
    """
    validate_reference(reference)
    if unexpected_factor < 1:
        raise ValueError(f"unexpected_factor must be >= 1, got {unexpected_factor}")
    if not 0 < expected_factor <= 1:
        raise ValueError(f"expected_factor must be in range (0, 1], got {expected_factor}")
    if instrument is None:
        instrument = reference.midi_program if reference.midi_program is not None else "piano"
    preset = resolve_instrument(instrument)
    settings = settings or settings_for(preset)
    if alignment is None:
        alignment = align_reference(y, sr, reference)
    spectrogram = compute_spectrogram(y, sr)
    # template pitches: the preset's (or calibrated dictionary's) range plus any piano-range
    # pitch the part has beyond it; mask rows follow this list
    part_pitches = np.array(sorted({int(n.pitch) for n in reference.notes}), dtype=int)
    base_pitches = preset.pitches if dictionary is None else dictionary.pitches
    mask_pitches = np.union1d(base_pitches, part_pitches[(part_pitches >= 21) & (part_pitches <= 108)])
    mask = score_mask(reference, alignment, mask_pitches, spectrogram.frame_times, tolerance=tolerance, floor=floor)
    thresholds = np.where(mask >= 1.0, settings.onset_threshold * expected_factor,
                          settings.onset_threshold * unexpected_factor)
    return transcribe(
        y, sr, instrument=preset, dictionary=dictionary, mask=mask, mask_penalty=mask_penalty,
        onset_thresholds=thresholds, spectrogram=spectrogram, progress=progress, pitches=mask_pitches,
        ghost_exempt=score_mask(reference, alignment, mask_pitches, spectrogram.frame_times, tolerance=tolerance,
                                floor=0.0, onsets_only=True) >= 1.0, settings=dataclasses.replace(settings, ghost_ratio=ghost_ratio),
        repeat_onsets=score_mask(reference, alignment, mask_pitches, spectrogram.frame_times, tolerance=tolerance,
                                 floor=0.0, repeats_only=True) >= 1.0,
    )


def faint_notes(
    transcription: Transcription,
    reference: Reference,
    alignment: Alignment | None,
    *,
    factor: float = 0.3,
    tolerance: float = INFORMED_DEFAULTS["tolerance"],
    restrike_level: float = 0.2,
    restrike_contrast: float = 4.0,
) -> list:
    """Notes the part expects that the activations show only faintly.

    Tracks ``transcription.H`` again with onset thresholds ``factor`` times the usual ones,
    only where the part starts a pitch (± ``tolerance``). These notes never enter the draft;
    the comparison uses them to avoid telling a player that a note they played quietly (or
    that the factorization explained with another note's partials) was missed
    (:func:`takescribe.compare.compare_notes`, ``faint_notes``).

    Parameters
    ----------
    transcription : Transcription
        A (score-informed) transcription with its spectrogram and activations.
    reference, alignment : the part and its alignment with the take.
    factor : float
        Threshold multiplier (0 < factor <= 1).
    restrike_level, restrike_contrast : float
        Struck and plucked instruments only: a key struck again while its previous sound
        still rings adds little to the activation (the draft keeps one note), but its
        partials gain energy at once. A peak of the pitch's onset novelty
        (:func:`takescribe.tracking.pitch_novelty`, scaled to its 99.5th percentile) of at
        least ``restrike_level`` and ``restrike_contrast`` times the median novelty over the
        draft note, 0.1 s or more after the note's start, is returned as a faint note too.
        Other notes' attacks that share partials leave such peaks as well, so this is only
        evidence against calling a written repeat missed, never a note of the draft.
    """
    if not 0 < factor <= 1:
        raise ValueError(f"factor must be in range (0, 1], got {factor}")
    if transcription.H is None or transcription.spectrogram is None:
        return []
    settings = settings_for(transcription.instrument)
    times = transcription.spectrogram.frame_times
    expected = score_mask(reference, alignment, transcription.dictionary.pitches, times, tolerance=tolerance,
                          floor=0.0, onsets_only=True) >= 1.0
    thresholds = np.where(expected, settings.onset_threshold * factor, np.inf)
    faint = activations_to_notes(
        transcription.H, transcription.dictionary.pitches, times, onset_threshold=thresholds,
        offset_threshold=settings.offset_threshold * factor, release_ratio=settings.release_ratio,
        reonset_rise=settings.reonset_rise * factor, reonset_dip=0.9, min_duration=0.03,
        polyphonic=transcription.instrument.polyphonic, local_floor=settings.local_floor,
    )
    if transcription.instrument.decaying:
        faint += _restrikes(transcription, level=restrike_level, contrast=restrike_contrast)
    return sort_notes(faint)


def _restrikes(transcription: Transcription, *, level: float, contrast: float) -> list[Note]:
    """Onset-novelty peaks of a pitch inside its own draft notes (see :func:`faint_notes`)."""
    V, _ = normalize_spectrogram(transcription.spectrogram.V)
    novelty = pitch_novelty(V, transcription.dictionary.W)
    times = transcription.spectrogram.frame_times
    rows = {int(p): k for k, p in enumerate(transcription.dictionary.pitches)}
    found = []
    for note in transcription.notes:
        k = rows.get(note.pitch)
        if k is None:
            continue
        frames = np.nonzero((times >= note.onset + 0.1) & (times < note.offset))[0]
        if len(frames) < 3:
            continue
        seg = novelty[k, frames]
        floor = max(level, contrast * float(np.median(seg)))
        peaks = np.nonzero((seg[1:-1] >= seg[:-2]) & (seg[1:-1] > seg[2:]) & (seg[1:-1] >= floor))[0] + 1
        found += [Note(float(times[frames[i]]), note.offset, note.pitch, note.velocity) for i in peaks]
    return found
