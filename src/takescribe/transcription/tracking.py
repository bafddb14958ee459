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
   part repeats the pitch (``expected_repeats``), a valley between two swells also
   splits the region: bowed and blown legato repeats rise too slowly for the rise test.
   For melodic instruments a deeper valley (``valley_dip``) splits it anywhere.
5. A note's onset is placed where its rise crosses ``attack_fraction`` of its
   peak (or at a novelty peak of its pitch just before, or, where the part starts
   the pitch, inside that zone: ``attack_zones``); it ends where the region ends, at the next onset of the same pitch, or
   where the activation falls below ``release_ratio`` of the note's own peak,
   whichever comes first. Notes shorter than ``min_duration`` are dropped, and so are
   struck or plucked notes without an attack (``max_rise``: slower than that from
   onset to 80 % of the peak). A melodic note ends at the latest where the next starts.
6. Velocity is ``round(127 · sqrt(peak / reference))`` clipped to 1..127: a
   loudness-like compression of the activation peak (our own mapping, no source).

``thresholds`` may be an array (n_pitches, n_frames) of onset thresholds instead of
one number: score-informed tracking uses it for its dual threshold.
"""

from __future__ import annotations

import dataclasses

import librosa
import numpy as np
import scipy.ndimage

from ..errors import InputError
from ..notes import Note, sort_notes

__all__ = ["activations_to_notes", "monophonic_activations", "pitch_novelty", "suppress_harmonic_ghosts",
           "validate_activations"]


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


def _repeat_valleys(seg: np.ndarray, zone: np.ndarray, rise: np.ndarray, dip: "float | np.ndarray",
                    width: int, reattack_dip: "float | np.ndarray | None" = None, notch_frames: int = 0) -> list[int]:
    """Valleys of ``seg`` inside ``zone`` between two swells: the bow change of a repeated note.

    A frame qualifies when it is a local minimum lying in ``zone``, at most ``dip`` times
    the highest activation within ``width`` frames before it *and* within ``width`` frames
    after it, and the swell after it rises by at least ``rise``. A shallower valley, down to
    ``reattack_dip`` only, qualifies when the swell after it is at least as high as the one
    before it (a new stroke or breath comes back at full strength; the slow modulation of a
    held note sags and comes back lower), or when it is that deep on both sides and at most
    ``notch_frames`` wide at half its depth (the short gap of a tongued repeat; vibrato and
    bow-pressure swells are wider). Of valleys closer than
    ``width`` frames only the deepest is kept. Returns, for each valley, the new note's
    start: half-way between the frame where the fall into it is half-way down and its floor.
    """
    n = len(seg)
    if n < 3 or width < 1 or not zone[1:-1].any():
        return []
    padded = np.concatenate([np.full(width, -np.inf), seg, np.full(width, -np.inf)])
    windows = np.lib.stride_tricks.sliding_window_view(padded, width)
    before = windows[:n].max(axis=1)            # seg[i - width: i]
    after = windows[width + 1: width + 1 + n].max(axis=1)  # seg[i + 1: i + 1 + width]
    minimum = np.zeros(n, dtype=bool)
    minimum[1:-1] = (seg[1:-1] < seg[:-2]) & (seg[1:-1] <= seg[2:])
    ok = minimum & zone & (seg <= dip * before) & (seg <= dip * after) & (after - seg >= rise)
    if reattack_dip is not None:
        with np.errstate(invalid="ignore"):  # 0 (outside the repeats) times -inf (at an edge): False
            deep_before, deep_after = seg <= reattack_dip * before, seg <= reattack_dip * after
        shallow = minimum & zone & deep_before & (after - seg >= rise) & ~ok
        # the swell after it comes back at full strength ...
        ok |= shallow & (after >= before)
        # ... or the valley is that deep on both sides, and narrow: the short gap of a tongued repeat
        for c in np.nonzero(shallow & deep_after & ~ok)[0] if notch_frames > 0 else ():
            left_level, right_level = 0.5 * (seg[c] + before[c]), 0.5 * (seg[c] + after[c])
            left = right = 0
            while c - left - 1 >= 0 and seg[c - left - 1] < left_level:
                left += 1
            while c + right + 1 < n and seg[c + right + 1] < right_level:
                right += 1
            ok[c] = left + right + 1 <= notch_frames
    valleys: list[int] = []
    for c in np.nonzero(ok)[0]:
        if valleys and c - valleys[-1] < width:
            if seg[c] < seg[valleys[-1]]:
                valleys[-1] = int(c)
            continue
        valleys.append(int(c))
    # the new note starts between the old one's fading and the valley's floor: a bowed
    # stroke builds up while the old one fades (its start lies early in the fall), a blown or
    # tongued repeat starts at the floor after a short gap. Place it half-way between the
    # frame where the fall is half-way down from the swell before and the floor (on the
    # tuning split: the floor alone put slow bow changes 60 ms late, the fall alone put
    # tongued repeats 60 ms early)
    starts = []
    for c in valleys:
        half = 0.5 * (seg[c] + before[c])
        high = np.nonzero(seg[max(c - width, 0): c] > half)[0]
        fall = max(c - width, 0) + int(high[-1]) + 1 if len(high) else c
        starts.append((fall + c + 1) // 2)
    return starts


def _split_onsets(a: np.ndarray, start: int, stop: int, rise: np.ndarray, frames: int, dip: float,
                  novelty: np.ndarray | None = None, novelty_threshold: float = 1.0,
                  relaxed: np.ndarray | None = None, repeats: np.ndarray | None = None,
                  repeat_frames: int = 0, valley_dip: float | None = None,
                  repeat_dip: float | None = None, min_fall: float | None = None,
                  notch_frames: int = 0) -> tuple[list[int], set[int]]:
    """Onset frames inside region [start, stop) of one pitch's activation ``a``.

    Also returns the onsets found at repeat valleys: their time is already placed.
    """
    if stop - start <= 2 * frames:
        return [start], set()
    onsets = _rise_onsets(a, start, stop, rise, frames, dip, novelty, novelty_threshold, relaxed, min_fall)
    if (repeats is None and valley_dip is None) or repeat_frames < 1:
        return onsets, set()
    # where the part repeats this pitch, a swell-valley-swell is a new bow stroke or breath
    # even when the rise after it is too slow for the rise test above; elsewhere (and
    # without a part) only a deeper valley, down to ``valley_dip``, counts
    reattack = None
    if valley_dip is None:
        zone, depth = repeats[start:stop], dip
    else:
        zone = np.ones(stop - start, dtype=bool)
        depth = np.full(stop - start, valley_dip) if repeats is None else np.where(repeats[start:stop], dip, valley_dip)
    if repeat_dip is not None and repeats is not None:
        # where the part repeats the pitch, a shallower valley that the next swell climbs out
        # of at full strength, or a narrow one, is a re-attack too
        reattack = np.where(repeats[start:stop], repeat_dip, 0.0)
    extra = [start + v for v in _repeat_valleys(a[start:stop], zone, rise[start:stop], depth, repeat_frames,
                                                reattack, notch_frames)]
    extra = [v for v in extra if v - start >= 2 * frames
             and not any(-2 * frames <= o - v <= repeat_frames for o in onsets)]
    return sorted(onsets + extra), set(extra)


def _merge_attack_stages(a: np.ndarray, onsets: list[int], placed: set[int], stop: int, frame_times: np.ndarray,
                         window: float, ratio: float) -> list[int]:
    """Drop a rise onset that follows the previous onset within ``window`` seconds when the
    swell before it peaked below ``ratio`` times its own peak: that swell was the first stage
    of one attack (bow or breath noise, then the tone), not a note of its own."""
    kept = onsets[:1]
    for j, o in enumerate(onsets[1:], start=1):
        following = onsets[j + 1] if j + 1 < len(onsets) else stop
        if (o not in placed and frame_times[o] - frame_times[kept[-1]] < window
                and a[kept[-1]:o].max() < ratio * a[o:following].max()):
            continue
        kept.append(o)
    return kept


def _rise_onsets(a: np.ndarray, start: int, stop: int, rise: np.ndarray, frames: int, dip: float,
                 novelty: np.ndarray | None, novelty_threshold: float, relaxed: np.ndarray | None,
                 min_fall: float | None = None) -> list[int]:
    """Region start and the rise-after-dip (and novelty) re-onsets inside it."""
    onsets = [start]
    seg = a[start:stop]
    # minimum over the previous `frames` frames (edge-padded at the region start)
    padded = np.concatenate([np.full(frames, seg[0]), seg])
    prev_min = np.lib.stride_tricks.sliding_window_view(padded[:-1], frames).min(axis=1)
    gain = seg - prev_min
    rise = rise[start:stop]
    ok = (gain >= rise) & (prev_min <= dip * seg)
    if min_fall is not None:
        # a rise is a new note only after a fall from the level held before it; a note's own
        # attack in two stages (bow noise, then the string speaking) rises without one
        held = np.maximum.accumulate(np.concatenate([np.full(frames + 1, -np.inf), seg]))[: len(seg)]
        ok &= prev_min <= min_fall * held
    only_relaxed = np.zeros(len(seg), dtype=bool)
    if relaxed is not None:
        # where an onset of this pitch is expected, a smaller rise over a shallower dip will do
        zone = relaxed[start:stop]
        only_relaxed = zone & (gain >= 0.5 * rise) & (prev_min <= min(1.5 * dip, 0.9) * seg) & ~ok
        ok |= only_relaxed
    if novelty is not None:
        # a clear attack of this pitch's partials starts a note even without a dip
        nov = novelty[start:stop]
        peaks = np.zeros(len(seg), dtype=bool)
        peaks[1:-1] = (nov[1:-1] >= nov[:-2]) & (nov[1:-1] > nov[2:])
        ok |= peaks & (nov >= novelty_threshold)
        gain = np.where(peaks & (nov >= novelty_threshold), np.maximum(gain, nov), gain)
    candidates = np.nonzero(ok[1:-1] & (gain[1:-1] >= gain[:-2]) & (gain[1:-1] > gain[2:]))[0] + 1
    last = 0
    for c in candidates:
        # a relaxed onset must also be well clear of the previous one: the expected-onset zone
        # around a note's own start would otherwise split its attack
        if c - last >= (5 if only_relaxed[c] else 2) * frames:
            onsets.append(start + int(c) - frames // 2)
            last = c
    return onsets


def activations_to_notes(
    H: np.ndarray,
    pitches: np.ndarray,
    frame_times: np.ndarray,
    *,
    onset_threshold: "float | np.ndarray" = 0.12,
    offset_threshold: float = 0.05,
    release_ratio: float = 0.08,
    reonset_rise: float = 0.08,
    reonset_frames: int = 4,
    min_duration: float = 0.05,
    smoothing: int = 3,
    polyphonic: bool = True,
    reference: float | None = None,
    onset_shift: float = 0.0,
    attack_fraction: float = 0.3,
    reonset_dip: float = 0.6,
    local_window: float = 1.5,
    local_floor: float = 0.1,
    novelty: np.ndarray | None = None,
    novelty_threshold: float = 0.5,
    novelty_snap: float = 0.1,
    expected_onsets: np.ndarray | None = None,
    expected_repeats: np.ndarray | None = None,
    repeat_window: float = 0.25,
    attack_zones: np.ndarray | None = None,
    zone_snap: float = 0.3,
    max_rise: float | None = None,
    valley_dip: float | None = None,
    repeat_dip: float | None = None,
    notch_width: float = 0.0,
    min_fall: float | None = None,
    stage_window: float = 0.0,
    stage_ratio: float = 0.6,
) -> list[Note]:
    """Turn activations into note events.

    Parameters
    ----------
    H : np.ndarray (n_pitches, n_frames)
        Activations.
    pitches : np.ndarray (n_pitches,)
        MIDI pitch of each row.
    frame_times : np.ndarray (n_frames,)
        Time in seconds of each frame.
    onset_threshold : float or np.ndarray (n_pitches, n_frames)
        Level (fraction of ``reference``) a note must reach.
    offset_threshold : float
        Level below which a note ends (hysteresis low threshold).
    release_ratio : float
        A note also ends when it falls below this fraction of its own peak.
    reonset_rise, reonset_frames : float, int
        Rise (fraction of the reference) within that many frames that starts a new note
        of the same pitch.
    min_duration : float
        Shortest note kept, in seconds.
    smoothing : int
        Median filter length in frames (1 = none).
    polyphonic : bool
        False applies the melodic Viterbi decoding first.
    reference : float, optional
        Normalisation level; defaults to ``H.max()``.
    onset_shift : float
        Seconds added to every note time (analysis latency compensation).
    reonset_dip : float
        A re-onset also needs the activation to have dipped to at most this fraction
        of its new value (vibrato and bow changes do not split notes).
    local_window, local_floor : float
        Thresholds are relative to the loudest activation within ± ``local_window``
        seconds (never below ``local_floor`` of the take's loudest), so quiet passages
        are judged against their surroundings. 0 disables it.
    novelty : np.ndarray (n_pitches, n_frames), optional
        Per-pitch onset novelty (:func:`pitch_novelty`). With it, a novelty peak of at
        least ``novelty_threshold`` starts a new note inside a region (repeated notes
        that do not dip), and onsets snap to the strongest novelty peak of at least
        ``novelty_snap`` within 0.1 s before the rise.
    novelty_threshold, novelty_snap : float
    expected_onsets : np.ndarray of bool (n_pitches, n_frames), optional
        Where a note of the pitch is expected to start (score-informed mode): there a new
        onset inside a sounding region needs only half the rise over a shallower dip, so
        repeated chords of a part are split where they are written.
    expected_repeats : np.ndarray of bool (n_pitches, n_frames), optional
        Where the part starts a pitch again right after a note of the same pitch
        (score-informed mode; see :func:`takescribe.informed.score_mask`, ``repeats_only``).
        There a valley of the activation between two swells also starts a new note: at
        most ``reonset_dip`` times the highest activation within ``repeat_window`` seconds
        before it and after it, followed by a rise of at least ``reonset_rise``. A bow
        change or a breath between two legato notes of one pitch leaves such a valley but
        rises too slowly for the rise test; a note held through the written repeat leaves
        none, so it stays one note (the score is a prior, not a cage).
    repeat_window : float
        Seconds on each side of a valley searched for the swells around it.
    valley_dip : float, optional
        Melodic instruments: anywhere (part or no part), a valley between two swells that
        falls to at most this fraction of the highest activation within ``repeat_window``
        on each side starts a new note: a bow change or breath between two notes of the same
        pitch. Deeper than ``reonset_dip``, which serves where the part expects a repeat.
        None: only where the part expects a repeat.
    repeat_dip : float, optional
        Where ``expected_repeats`` is True, a shallower valley, down to this fraction of the
        swell before it only, also starts a new note when the swell after it climbs at least
        as high as the one before: a tongued or re-bowed repeat comes back at full strength,
        while the slow modulation of a note held through the written repeat comes back
        lower. None: only the ``reonset_dip`` valleys.
    notch_width : float
        Seconds. Where ``expected_repeats`` is True, a valley down to ``repeat_dip`` of the
        swells on both sides that is at most this wide at half its depth also starts a new
        note: the short gap of a tongued or re-bowed repeat, narrower than the swells of
        vibrato (5-7 Hz) or bow pressure in a held note. 0: no such test.
    min_fall : float, optional
        A rise inside a sounding region (the rise-after-dip test) starts a new note only
        when the activation had fallen to at most this fraction of the highest level it held
        before the rise: a note whose attack comes in two stages (bow or breath noise, then
        the tone) rises twice without falling in between. None: no such test.
    stage_window, stage_ratio : float
        Melodic instruments: a new onset within ``stage_window`` seconds of the previous one
        is dropped when the swell between them peaked below ``stage_ratio`` times the new
        swell's peak: a bowed or blown attack that comes in two stages is one note. 0: off.
    max_rise : float, optional
        Seconds. For struck and plucked instruments: a note whose activation takes longer
        than this from its onset to 80 % of its peak is dropped. Such a note has no attack:
        it is a slow swell of shared partials (a held chord's energy drifting to this
        template, or the foot of the next stroke), not a new stroke. None: no such test.
    attack_zones : np.ndarray of bool (n_pitches, n_frames), optional
        Where the part starts each pitch (score-informed mode, melodic instruments). With
        ``novelty``, a note whose rise has no novelty peak of ``novelty_snap`` just before it
        starts at the strongest novelty peak of at least ``zone_snap`` inside the zone and
        before its rise: a slow bowed swell crosses ``attack_fraction`` of its peak long
        after the bow started it. Only the placement of detected notes changes.
    zone_snap : float
        Smallest novelty peak that places an onset inside ``attack_zones``.
    attack_fraction : float
        The onset is placed where the activation, rising to the note's peak, crosses
        this fraction of the peak.

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
    ref = float(H.max()) if reference is None else float(reference)
    if ref <= 0:
        return []
    Hn = H.astype(np.float64) / ref
    if smoothing > 1:
        Hn = scipy.ndimage.median_filter(Hn, size=(1, int(smoothing)), mode="nearest")
    hop = float(np.median(np.diff(frame_times))) if T > 1 else 0.01
    # local reference: the loudest activation within +-local_window seconds, floored
    if local_window > 0:
        width = max(int(round(2 * local_window / hop)) | 1, 1)
        local = scipy.ndimage.maximum_filter1d(Hn.max(axis=0), size=width, mode="nearest")
        local = np.maximum(local, local_floor)
    else:
        local = np.ones(T)
    Hl = Hn / local[None, :]  # locally normalised activations, at most 1
    Hsel = Hl if polyphonic else monophonic_activations(Hl, silence_level=2 * offset_threshold)
    thresholds = np.broadcast_to(np.asarray(onset_threshold, dtype=float), Hn.shape)
    rise = np.full(T, reonset_rise)
    end_time = frame_times[-1] + hop
    lookback = max(int(round(0.1 / hop)), 1)
    repeat_frames = max(int(round(repeat_window / hop)), 1)
    notch_frames = int(round(notch_width / hop)) if notch_width > 0 else 0
    for name, zones in (("expected_repeats", expected_repeats), ("attack_zones", attack_zones)):
        if zones is not None and np.shape(zones) != H.shape:
            raise InputError(f"{name} must have the shape of H {H.shape}, got {np.shape(zones)}")
    notes: list[Note] = []
    for k in range(K):
        a = Hsel[k]
        full = Hl[k]
        above = a > offset_threshold
        if not above.any():
            continue
        labels, n_regions = scipy.ndimage.label(above)
        previous_end = 0
        for sl in scipy.ndimage.find_objects(labels):
            start, stop = sl[0].start, sl[0].stop
            onsets, placed = _split_onsets(a, start, stop, rise, reonset_frames, reonset_dip,
                                   None if novelty is None else novelty[k], novelty_threshold,
                                   None if expected_onsets is None else expected_onsets[k],
                                   None if expected_repeats is None else expected_repeats[k], repeat_frames,
                                   None if polyphonic else valley_dip, repeat_dip, min_fall, notch_frames)
            if stage_window > 0 and not polyphonic:
                onsets = _merge_attack_stages(a, onsets, placed, stop, frame_times, stage_window, stage_ratio)
            for i, on in enumerate(onsets):
                nxt = onsets[i + 1] if i + 1 < len(onsets) else stop
                part = a[on:nxt]
                if len(part) == 0:
                    continue
                peak_i = int(np.argmax(part))
                peak = float(part[peak_i])
                if peak < float(thresholds[k, on + peak_i]):
                    continue
                # onset where the rise towards the peak crosses `attack_fraction` of it;
                # melodic decoding may hide the start of the rise, so look back on the
                # undecoded activation (never past the previous note of this pitch)
                first = max(on - (lookback if i == 0 else 0), previous_end)
                rising = full[first: on + peak_i + 1]
                below = np.nonzero(rising < attack_fraction * peak)[0]
                onset_frame = first + (int(below[-1]) + 1 if len(below) else 0)
                onset_frame = max(min(onset_frame, on), first) if i == 0 and not len(below) else onset_frame
                if on in placed:
                    onset_frame = on  # a repeat valley: the onset is where the old stroke fades
                if novelty is not None and on not in placed:
                    # snap to the strongest attack of this pitch shortly before or at the rise
                    lo = max(onset_frame - lookback, first)
                    window = novelty[k, lo: onset_frame + 2]
                    if len(window) and window.max() >= novelty_snap:
                        onset_frame = lo + int(np.argmax(window))
                    elif attack_zones is not None:
                        # where the part starts this pitch, a slow swell may cross the attack
                        # level long after its start: a weaker attack of its partials inside
                        # the written onset's zone and before the rise marks the start
                        window = novelty[k, first: onset_frame + 2] * attack_zones[k, first: onset_frame + 2]
                        if len(window) and window.max() >= zone_snap:
                            onset_frame = first + int(np.argmax(window))
                if max_rise is not None and on not in placed:
                    # a stroke reaches most of its peak at once; a slow swell is no stroke
                    reached = int(np.argmax(part[: peak_i + 1] >= 0.8 * peak))
                    if frame_times[on + reached] - frame_times[min(onset_frame, on + reached)] > max_rise:
                        continue
                # release: first frame after the peak below release_ratio * peak
                after = part[peak_i:]
                low = np.nonzero(after < release_ratio * peak)[0]
                end_frame = on + peak_i + (int(low[0]) if len(low) else len(after))
                previous_end = end_frame
                onset = frame_times[onset_frame] + onset_shift
                offset = (frame_times[end_frame] if end_frame < T else end_time) + onset_shift
                if offset - onset < min_duration:
                    continue
                loudness = float(Hn[k, on + peak_i])
                velocity = int(np.clip(round(127 * np.sqrt(min(loudness, 1.0))), 1, 127))
                notes.append(Note(max(onset, 0.0), max(offset, onset + 1e-3), int(pitches[k]), velocity))
    notes = sort_notes(notes)
    if not polyphonic:
        # one note at a time: a note ends where the next one starts (an onset placed on the
        # attack of the next note can fall before the decoded end of this one)
        for i in range(len(notes) - 1):
            nxt = notes[i + 1].onset
            if notes[i].onset < nxt < notes[i].offset:
                notes[i] = dataclasses.replace(notes[i], offset=max(nxt, notes[i].onset + min_duration))
    return notes


def suppress_harmonic_ghosts(
    notes: list[Note],
    *,
    ratio: float = 0.8,
    window: float = 0.06,
    intervals: tuple[int, ...] = (12, 19, 24),
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
