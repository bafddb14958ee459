"""Activations → note events: normalise, smooth, find onsets, hysteresis, minimum duration.

Method
------
1. ``H`` is divided by one global reference level (its largest value); the
   thresholds are then fractions of a *local* reference, the loudest activation
   within a few seconds (floored at a fraction of the global one), so a quiet
   passage is judged against its surroundings. Per-pitch normalisation would
   promote noise on pitches that are never played.
2. A running median over ``smoothing`` frames removes single-frame spikes.
3. *Melodic* instruments (one note at a time) first pass through a Viterbi
   decoding over the states {silence, pitch 1…K} (``librosa.sequence.viterbi``)
   whose emission is the normalised activation and whose transitions favour
   staying; only the decoded pitch keeps its activation in each frame.
4. For each pitch, regions above ``offset_threshold`` that reach
   ``onset_threshold`` are note candidates (hysteresis). Inside a region, a new
   onset is detected where the activation rises by at least ``reonset_rise`` (a
   fraction of the reference) over ``reonset_frames`` frames after having fallen:
   this splits repeated notes of one pitch. Where the score-informed mode says the
   part repeats the pitch (``part_repeats``), a valley between two swells also
   splits the region: bowed and blown legato repeats rise too slowly for the rise test.
   For melodic instruments a deeper valley (``valley_dip``) splits it anywhere.
5. A note's onset is placed where its rise crosses ``attack_fraction`` of its
   peak (or at a novelty peak of its pitch just before, or, where the part starts
   the pitch, inside that zone: ``part_starts``); it ends where the region ends, at the
   next onset of the same pitch, or where the activation falls below ``release_ratio`` of
   the note's own peak, whichever comes first. Notes shorter than ``min_duration`` are
   dropped, and so are struck or plucked notes without an attack (``max_rise``: slower than
   that from onset to ``attack_reach`` of the peak). A melodic note ends at the latest where
   the next starts. The splitting steps live in :mod:`takescribe.transcription.onsets`.
6. Velocity is ``round(127 · sqrt(peak / reference))`` clipped to 1..127: a
   loudness-like compression of the activation peak (our own mapping, no source).

Every level and window is a field of one :class:`TrackingSettings` value; ``onset_thresholds``
(n_pitches, n_frames) replaces its onset level for score-informed tracking's dual threshold.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import librosa
import numpy as np
import scipy.ndimage

from ..errors import InputError
from ..notes import Note, sort_notes
from ..pitch import PARTIAL_STEPS
from .onsets import merge_attack_stages, region_onsets
from .settings import TrackingSettings

__all__ = ["activations_to_notes", "monophonic_activations", "pitch_novelty", "suppress_harmonic_ghosts",
           "validate_activations", "TrackingSettings"]


def validate_activations(H: np.ndarray, pitches: np.ndarray, frame_times: np.ndarray) -> None:
    """Check shapes and values of the tracking inputs."""
    if not isinstance(H, np.ndarray) or H.ndim != 2:
        raise InputError(f"H must be a 2-D array (n_pitches, n_frames), got {getattr(H, 'shape', None)}")
    if len(pitches) != H.shape[0]:
        raise InputError(f"pitches has {len(pitches)} entries but H has {H.shape[0]} rows")
    if len(frame_times) != H.shape[1]:
        raise InputError(f"frame_times has {len(frame_times)} entries but H has {H.shape[1]} frames")
    if not np.all(np.isfinite(H)) or np.any(H < 0):
        raise InputError("H must be finite and non-negative")
    p = np.asarray(pitches)
    if np.any((p < 0) | (p > 127)):
        raise InputError("pitches look wrong: they must be MIDI numbers 0..127 (this function takes MIDI, not Hz)")


def monophonic_activations(Hn: np.ndarray, *, silence_level: float = 0.1, stay_probability: float = 0.96) -> np.ndarray:
    """Keep one pitch per frame chosen by Viterbi decoding over {silence, pitches}.

    Parameters
    ----------
    Hn : np.ndarray (n_pitches, n_frames)
        Normalised activations (reference level 1).
    silence_level : float
        Emission score of the silence state (an activation below it loses to silence).
    stay_probability : float
        Probability of keeping the same state from one frame to the next.
    """
    K, T = Hn.shape
    if T == 0 or K == 0:
        return Hn.copy()
    scores = np.vstack([np.full((1, T), silence_level, dtype=np.float64), Hn.astype(np.float64)])
    prob = scores / np.maximum(scores.sum(axis=0, keepdims=True), 1e-12)
    n_states = K + 1
    switch = (1.0 - stay_probability) / (n_states - 1)
    transition = np.full((n_states, n_states), switch)
    np.fill_diagonal(transition, stay_probability)
    path = librosa.sequence.viterbi(prob, transition)
    out = np.zeros_like(Hn)
    frames = np.nonzero(path > 0)[0]
    out[path[frames] - 1, frames] = Hn[path[frames] - 1, frames]
    return out


def pitch_novelty(V: np.ndarray, W: np.ndarray, *, compression: float = 100.0, peak: float | None = None,
                  scale: float | None = None) -> np.ndarray:
    """Per-pitch onset novelty: log-compressed spectral flux weighted by each template.

    ``N = Wᵀ · max(0, Δ_t log(1 + compression·V/max V))``: large where the partials of a
    pitch gain energy, i.e. at its attacks, even when the activation itself hardly moves
    (a repeated note in a reverberant room, a new bow stroke on the same pitch).

    Parameters
    ----------
    V : np.ndarray (n_bins, n_frames)
    W : np.ndarray (n_bins, n_pitches)
        Templates (columns sum to 1).

    peak : float, optional
        Level that ``compression`` is relative to; default ``V.max()`` (a block of a long
        take passes the whole take's).
    scale : float, optional
        Divisor of the result; default its own 99.5th percentile (1.0 returns it unscaled).

    Returns
    -------
    np.ndarray (n_pitches, n_frames), scaled so its 99.5th percentile is 1 by default.
    """
    V = np.asarray(V, dtype=np.float32)
    if peak is None:
        peak = float(V.max()) if V.size else 0.0
    if peak <= 0 or V.shape[1] < 2:
        return np.zeros((W.shape[1], V.shape[1]), np.float32)
    L = np.log1p(V * np.float32(compression / peak))
    D = np.zeros_like(L)
    np.subtract(L[:, 1:], L[:, :-1], out=D[:, 1:])
    np.maximum(D, 0.0, out=D)
    N = np.asarray(W, dtype=np.float32).T @ D
    if scale is None:
        scale = float(np.percentile(N, 99.5))
    return N / scale if scale > 0 else N



@dataclass(frozen=True)
class _Frames:
    """What every pitch's tracking shares: the settings, the frame grid and the part's hints."""

    settings: TrackingSettings
    times: np.ndarray
    hop: float
    end_time: float
    thresholds: np.ndarray
    rise: np.ndarray
    snap_frames: int
    repeat_frames: int
    notch_frames: int
    polyphonic: bool
    novelty: np.ndarray | None
    relaxed: np.ndarray | None
    repeats: np.ndarray | None
    attack_zones: np.ndarray | None


def _normalised(H: np.ndarray, s: TrackingSettings, reference: float | None, hop: float, polyphonic: bool):
    """``(Hn, Hl, Hsel)``: H over the reference level, smoothed; over the local level; decoded (melodic)."""
    ref = float(H.max()) if reference is None else float(reference)
    if ref <= 0:
        return None
    Hn = H.astype(np.float64) / ref
    if s.smoothing > 1:
        Hn = scipy.ndimage.median_filter(Hn, size=(1, int(s.smoothing)), mode="nearest")
    # local reference: the loudest activation within +-local_window seconds, floored
    if s.local_window > 0:
        width = max(int(round(2 * s.local_window / hop)) | 1, 1)
        local = scipy.ndimage.maximum_filter1d(Hn.max(axis=0), size=width, mode="nearest")
        local = np.maximum(local, s.local_floor)
    else:
        local = np.ones(H.shape[1])
    Hl = Hn / local[None, :]  # locally normalised activations, at most 1
    if polyphonic:
        return Hn, Hl, Hl
    return Hn, Hl, monophonic_activations(Hl, silence_level=s.silence_factor * s.offset_threshold,
                                          stay_probability=s.stay_probability)


def _frames(H, frame_times, s, *, polyphonic, onset_thresholds, novelty, part_starts, part_repeats) -> _Frames:
    """The shared per-call values (and a check of the hint arrays' shapes)."""
    T = H.shape[1]
    hop = float(np.median(np.diff(frame_times))) if T > 1 else 0.01
    for name, zones in (("part_starts", part_starts), ("part_repeats", part_repeats)):
        if zones is not None and np.shape(zones) != H.shape:
            raise InputError(f"{name} must have the shape of H {H.shape}, got {np.shape(zones)}")
    level = s.onset_threshold if onset_thresholds is None else onset_thresholds
    return _Frames(
        settings=s, times=frame_times, hop=hop, end_time=frame_times[-1] + hop,
        thresholds=np.broadcast_to(np.asarray(level, dtype=float), H.shape), rise=np.full(T, s.reonset_rise),
        snap_frames=max(int(round(s.snap_window / hop)), 1), repeat_frames=max(int(round(s.repeat_window / hop)), 1),
        notch_frames=int(round(s.notch_width / hop)) if s.notch_width > 0 else 0, polyphonic=polyphonic,
        novelty=novelty,
        # relaxed re-onsets serve repeated chords of struck instruments; on bowed and blown notes
        # a slow attack would look like several onsets
        relaxed=part_starts if polyphonic else None,
        # and conversely: a struck note decays, so a valley before a repeated strike is no second
        # onset, while a bowed or blown repeat may rise too slowly for the rise test
        repeats=None if polyphonic else part_repeats,
        attack_zones=None if polyphonic else part_starts)


def _attack_frame(k: int, on: int, peak_i: int, peak: float, first: int, full: np.ndarray, placed: bool,
                  ctx: _Frames) -> int:
    """Frame where a note that starts rising at ``on`` (and peaks ``peak_i`` later) begins."""
    s = ctx.settings
    # where the rise towards the peak crosses `attack_fraction` of it, looked for on the
    # undecoded activation from `first` (melodic decoding may hide the start of the rise)
    rising = full[first: on + peak_i + 1]
    below = np.nonzero(rising < s.attack_fraction * peak)[0]
    onset_frame = first + (int(below[-1]) + 1 if len(below) else 0)
    if placed:
        return on  # a repeat valley: the onset is where the old stroke fades
    if ctx.novelty is None:
        return onset_frame
    # snap to the strongest attack of this pitch shortly before or at the rise
    lo = max(onset_frame - ctx.snap_frames, first)
    window = ctx.novelty[k, lo: onset_frame + 2]
    if len(window) and window.max() >= s.novelty_snap:
        return lo + int(np.argmax(window))
    if ctx.attack_zones is not None:
        # where the part starts this pitch, a slow swell may cross the attack level long after
        # its start: a weaker attack of its partials inside the zone and before the rise marks it
        window = ctx.novelty[k, first: onset_frame + 2] * ctx.attack_zones[k, first: onset_frame + 2]
        if len(window) and window.max() >= s.zone_snap:
            return first + int(np.argmax(window))
    return onset_frame


def _region_notes(k: int, pitch: int, a, full, loud, start: int, stop: int, previous_end: int,
                  ctx: _Frames) -> tuple[list[Note], int]:
    """The notes of one sounding region of pitch row ``k``; returns them and the last note's end frame."""
    s = ctx.settings
    onsets, placed = region_onsets(
        a, start, stop, ctx.rise, s, novelty=None if ctx.novelty is None else ctx.novelty[k],
        relaxed=None if ctx.relaxed is None else ctx.relaxed[k],
        repeats=None if ctx.repeats is None else ctx.repeats[k],
        repeat_frames=ctx.repeat_frames, melodic=not ctx.polyphonic, notch_frames=ctx.notch_frames)
    if s.stage_window > 0 and not ctx.polyphonic:
        onsets = merge_attack_stages(a, onsets, placed, stop, ctx.times, s)
    notes = []
    for i, on in enumerate(onsets):
        part = a[on: onsets[i + 1] if i + 1 < len(onsets) else stop]
        if len(part) == 0:
            continue
        peak_i = int(np.argmax(part))
        peak = float(part[peak_i])
        if peak < float(ctx.thresholds[k, on + peak_i]):
            continue
        # never look back past the previous note of this pitch
        first = max(on - (ctx.snap_frames if i == 0 else 0), previous_end)
        onset_frame = _attack_frame(k, on, peak_i, peak, first, full, on in placed, ctx)
        if s.max_rise is not None and on not in placed:
            # a stroke reaches most of its peak at once; a slow swell is no stroke
            reached = int(np.argmax(part[: peak_i + 1] >= s.attack_reach * peak))
            if ctx.times[on + reached] - ctx.times[min(onset_frame, on + reached)] > s.max_rise:
                continue
        # release: first frame after the peak below release_ratio * peak
        low = np.nonzero(part[peak_i:] < s.release_ratio * peak)[0]
        end_frame = on + peak_i + (int(low[0]) if len(low) else len(part) - peak_i)
        previous_end = end_frame
        onset = ctx.times[onset_frame] + s.onset_shift
        offset = (ctx.times[end_frame] if end_frame < len(ctx.times) else ctx.end_time) + s.onset_shift
        if offset - onset < s.min_duration:
            continue
        velocity = int(np.clip(round(127 * np.sqrt(min(float(loud[on + peak_i]), 1.0))), 1, 127))
        notes.append(Note(max(onset, 0.0), max(offset, onset + 1e-3), pitch, velocity))
    return notes, previous_end


def _one_at_a_time(notes: list[Note], min_duration: float) -> list[Note]:
    """Melodic drafts: a note ends where the next one starts (an onset placed on the attack of
    the next note can fall before the decoded end of this one)."""
    for i in range(len(notes) - 1):
        nxt = notes[i + 1].onset
        if notes[i].onset < nxt < notes[i].offset:
            notes[i] = dataclasses.replace(notes[i], offset=max(nxt, notes[i].onset + min_duration))
    return notes


def activations_to_notes(
    H: np.ndarray,
    pitches: np.ndarray,
    frame_times: np.ndarray,
    *,
    settings: TrackingSettings = TrackingSettings(),
    polyphonic: bool = True,
    onset_thresholds: np.ndarray | None = None,
    reference: float | None = None,
    novelty: np.ndarray | None = None,
    part_starts: np.ndarray | None = None,
    part_repeats: np.ndarray | None = None,
) -> list[Note]:
    """Turn activations into note events (see the module docstring for the method).

    Parameters
    ----------
    H : np.ndarray (n_pitches, n_frames)
    pitches : np.ndarray (n_pitches,)
        MIDI pitch of each row.
    frame_times : np.ndarray (n_frames,)
        Seconds.
    settings : TrackingSettings
        Every level and window of the method.
    polyphonic : bool
        False applies the melodic Viterbi decoding first (one note at a time).
    onset_thresholds : np.ndarray (n_pitches, n_frames), optional
        Per-pitch, per-frame onset levels replacing ``settings.onset_threshold`` (dual threshold).
    reference : float, optional
        Normalisation level; defaults to ``H.max()`` (a block of a long take passes the take's).
    novelty : np.ndarray (n_pitches, n_frames), optional
        Per-pitch onset novelty (:func:`pitch_novelty`): its peaks split and place onsets.
    part_starts : np.ndarray of bool (n_pitches, n_frames), optional
        Where the part starts each pitch (score-informed). Polyphonic: a re-onset there needs
        less evidence (repeated chords). Melodic: a weaker novelty peak inside the zone places a
        slow swell's onset (``zone_snap``); only the placement of detected notes changes.
    part_repeats : np.ndarray of bool (n_pitches, n_frames), optional
        Where the part starts a pitch again right after a note of it (melodic only): a valley
        between two swells there is a new bow stroke or breath. The score is a prior, not a cage.

    Returns
    -------
    list of Note
        Sorted by onset, then pitch.
    """
    H = np.asarray(H)
    pitches = np.asarray(pitches)
    frame_times = np.asarray(frame_times, dtype=float)
    validate_activations(H, pitches, frame_times)
    K, T = H.shape
    if T < 2 or K == 0:
        return []
    ctx = _frames(H, frame_times, settings, polyphonic=polyphonic, onset_thresholds=onset_thresholds,
                  novelty=novelty, part_starts=part_starts, part_repeats=part_repeats)
    levels = _normalised(H, settings, reference, ctx.hop, polyphonic)
    if levels is None:
        return []
    Hn, Hl, Hsel = levels
    notes: list[Note] = []
    for k in range(K):
        above = Hsel[k] > settings.offset_threshold
        if not above.any():
            continue
        labels, _ = scipy.ndimage.label(above)
        previous_end = 0
        for sl in scipy.ndimage.find_objects(labels):
            found, previous_end = _region_notes(k, int(pitches[k]), Hsel[k], Hl[k], Hn[k], sl[0].start, sl[0].stop,
                                                previous_end, ctx)
            notes += found
    notes = sort_notes(notes)
    return notes if polyphonic else _one_at_a_time(notes, settings.min_duration)


def suppress_harmonic_ghosts(
    notes: list[Note],
    *,
    ratio: float = 0.8,
    window: float = 0.06,
    intervals: tuple[int, ...] = PARTIAL_STEPS,
    exempt=None,
) -> list[Note]:
    """Drop weak notes that sit on a partial of a stronger note starting with them.

    A harmonic dictionary explains the 2nd, 3rd and 4th partials of a note (an octave,
    an octave and a fifth, two octaves up) partly with the templates of those pitches,
    so a loud bass note leaves quieter "ghost" notes above it. A note at pitch *p* is
    dropped when a note at *p − 12*, *p − 19* or *p − 24* starts within ``window``
    seconds of it and the candidate's velocity is below ``ratio`` times that note's.
    Real octave doublings played as loudly survive.

    Parameters
    ----------
    notes : list of Note
    ratio : float
        0 disables the filter.
    window : float
        Seconds between the two onsets.
    intervals : tuple of int
        Semitones above the lower note that count as its partials.
    exempt : callable (Note) -> bool, optional
        Notes for which it returns True are kept (e.g. notes the score expects).
    """
    if ratio <= 0 or len(notes) < 2:
        return list(notes)
    ordered = sort_notes(notes)
    onsets = np.array([n.onset for n in ordered])
    keep = []
    for i, n in enumerate(ordered):
        lo, hi = np.searchsorted(onsets, [n.onset - window, n.onset + window + 1e-9])
        ghost = any(
            ordered[j].pitch in {n.pitch - d for d in intervals} and n.velocity < ratio * ordered[j].velocity
            for j in range(lo, hi) if j != i
        )
        if ghost and not (exempt is not None and exempt(n)):
            continue
        keep.append(n)
    return keep
