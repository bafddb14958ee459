"""Where notes of one pitch start inside a sounding region of its activation.

The steps of :func:`takescribe.transcription.tracking.activations_to_notes` that split a
region (a run of frames above the low threshold) into notes: a rise after a dip, a peak of
the pitch's onset novelty, a valley between two swells (a bow change or breath), and the
merging of an attack that comes in two stages.

Conventions
-----------
- ``a`` is one pitch's (locally normalised) activation, ``[start, stop)`` a region of it in
  frames; onsets are frame indices into ``a``.
- Levels and windows come from one :class:`takescribe.transcription.settings.TrackingSettings`;
  frame counts derived from its seconds are passed in as ``*_frames``.
"""

from __future__ import annotations

import numpy as np

from .settings import TrackingSettings

__all__ = ["region_onsets", "repeat_valleys", "rise_onsets", "merge_attack_stages"]


def region_onsets(a: np.ndarray, start: int, stop: int, rise: np.ndarray, s: TrackingSettings, *,
                  novelty: np.ndarray | None = None, relaxed: np.ndarray | None = None,
                  repeats: np.ndarray | None = None, repeat_frames: int = 0, melodic: bool = False,
                  notch_frames: int = 0) -> tuple[list[int], set[int]]:
    """Onset frames inside region ``[start, stop)`` of one pitch's activation ``a``.

    Also returns the onsets found at repeat valleys: their time is already placed.
    ``melodic`` lets a deep valley (``valley_dip``) split the region anywhere.
    """
    frames, dip = s.reonset_frames, s.reonset_dip
    if stop - start <= 2 * frames:
        return [start], set()
    onsets = rise_onsets(a, start, stop, rise, s, novelty=novelty, relaxed=relaxed)
    valley_dip = s.valley_dip if melodic else None
    if (repeats is None and valley_dip is None) or repeat_frames < 1:
        return onsets, set()
    # where the part repeats this pitch, a swell-valley-swell is a new bow stroke or breath
    # even when the rise after it is too slow for the rise test; elsewhere (and without a
    # part) only a deeper valley, down to ``valley_dip``, counts
    reattack = None
    if valley_dip is None:
        zone, depth = repeats[start:stop], dip
    else:
        zone = np.ones(stop - start, dtype=bool)
        depth = np.full(stop - start, valley_dip) if repeats is None else np.where(repeats[start:stop], dip, valley_dip)
    if s.repeat_dip is not None and repeats is not None:
        # where the part repeats the pitch, a shallower valley that the next swell climbs out
        # of at full strength, or a narrow one, is a re-attack too
        reattack = np.where(repeats[start:stop], s.repeat_dip, 0.0)
    extra = [start + v for v in repeat_valleys(a[start:stop], zone, rise[start:stop], depth, repeat_frames,
                                               reattack_dip=reattack, notch_frames=notch_frames)]
    extra = [v for v in extra if v - start >= 2 * frames
             and not any(-2 * frames <= o - v <= repeat_frames for o in onsets)]
    return sorted(onsets + extra), set(extra)


def _valley_candidates(seg, zone, rise, dip, width, reattack_dip, notch_frames):
    """Frames of ``seg`` that are valleys between two swells (see :func:`repeat_valleys`),
    and the highest level within ``width`` frames before each frame."""
    n = len(seg)
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
            ok[c] = _notch_width(seg, c, before[c], after[c]) <= notch_frames
    return ok, before


def _notch_width(seg: np.ndarray, c: int, before: float, after: float) -> int:
    """Frames of the valley at ``c`` below half-way to the swells on each side."""
    left_level, right_level = 0.5 * (seg[c] + before), 0.5 * (seg[c] + after)
    left = right = 0
    while c - left - 1 >= 0 and seg[c - left - 1] < left_level:
        left += 1
    while c + right + 1 < len(seg) and seg[c + right + 1] < right_level:
        right += 1
    return left + right + 1


def repeat_valleys(seg: np.ndarray, zone: np.ndarray, rise: np.ndarray, dip: "float | np.ndarray", width: int, *,
                   reattack_dip: "np.ndarray | None" = None, notch_frames: int = 0) -> list[int]:
    """Valleys of ``seg`` inside ``zone`` between two swells: the bow change of a repeated note.

    A frame qualifies when it is a local minimum lying in ``zone``, at most ``dip`` times
    the highest activation within ``width`` frames before it *and* within ``width`` frames
    after it, and the swell after it rises by at least ``rise``. A shallower valley, down to
    ``reattack_dip`` only, qualifies when the swell after it is at least as high as the one
    before it (a new stroke or breath comes back at full strength; the slow modulation of a
    held note sags and comes back lower), or when it is that deep on both sides and at most
    ``notch_frames`` wide at half its depth (the short gap of a tongued repeat; vibrato and
    bow-pressure swells are wider). Of valleys closer than ``width`` frames only the deepest
    is kept. Returns, for each valley, the new note's start: half-way between the frame where
    the fall into it is half-way down and its floor.
    """
    n = len(seg)
    if n < 3 or width < 1 or not zone[1:-1].any():
        return []
    ok, before = _valley_candidates(seg, zone, rise, dip, width, reattack_dip, notch_frames)
    valleys: list[int] = []
    for c in np.nonzero(ok)[0]:
        if valleys and c - valleys[-1] < width:
            if seg[c] < seg[valleys[-1]]:
                valleys[-1] = int(c)
            continue
        valleys.append(int(c))
    # the new note starts between the old one's fading and the valley's floor: a bowed stroke
    # builds up while the old one fades, a blown or tongued repeat starts at the floor
    starts = []
    for c in valleys:
        half = 0.5 * (seg[c] + before[c])
        high = np.nonzero(seg[max(c - width, 0): c] > half)[0]
        fall = max(c - width, 0) + int(high[-1]) + 1 if len(high) else c
        starts.append((fall + c + 1) // 2)
    return starts


def merge_attack_stages(a: np.ndarray, onsets: list[int], placed: set[int], stop: int, frame_times: np.ndarray,
                        s: TrackingSettings) -> list[int]:
    """Drop a rise onset that follows the previous onset within ``stage_window`` seconds when the
    swell before it peaked below ``stage_ratio`` times its own peak: that swell was the first stage
    of one attack (bow or breath noise, then the tone), not a note of its own."""
    kept = onsets[:1]
    for j, o in enumerate(onsets[1:], start=1):
        following = onsets[j + 1] if j + 1 < len(onsets) else stop
        if (o not in placed and frame_times[o] - frame_times[kept[-1]] < s.stage_window
                and a[kept[-1]:o].max() < s.stage_ratio * a[o:following].max()):
            continue
        kept.append(o)
    return kept


def _rise_candidates(seg: np.ndarray, rise: np.ndarray, s: TrackingSettings, novelty, relaxed):
    """Frames of a region where a new note may start, their gain, and which only the relaxed test passed."""
    frames, dip = s.reonset_frames, s.reonset_dip
    # minimum over the previous `frames` frames (edge-padded at the region start)
    padded = np.concatenate([np.full(frames, seg[0]), seg])
    prev_min = np.lib.stride_tricks.sliding_window_view(padded[:-1], frames).min(axis=1)
    gain = seg - prev_min
    ok = (gain >= rise) & (prev_min <= dip * seg)
    if s.min_fall is not None:
        # a rise is a new note only after a fall from the level held before it; a note's own
        # attack in two stages (bow noise, then the string speaking) rises without one
        held = np.maximum.accumulate(np.concatenate([np.full(frames + 1, -np.inf), seg]))[: len(seg)]
        ok &= prev_min <= s.min_fall * held
    only_relaxed = np.zeros(len(seg), dtype=bool)
    if relaxed is not None:
        # where an onset of this pitch is expected, a smaller rise over a shallower dip will do
        only_relaxed = (relaxed & (gain >= s.relaxed_rise * rise)
                        & (prev_min <= min(s.relaxed_dip * dip, s.relaxed_dip_cap) * seg) & ~ok)
        ok |= only_relaxed
    if novelty is not None:
        # a clear attack of this pitch's partials starts a note even without a dip
        peaks = np.zeros(len(seg), dtype=bool)
        peaks[1:-1] = (novelty[1:-1] >= novelty[:-2]) & (novelty[1:-1] > novelty[2:])
        ok |= peaks & (novelty >= s.novelty_threshold)
        gain = np.where(peaks & (novelty >= s.novelty_threshold), np.maximum(gain, novelty), gain)
    return ok, gain, only_relaxed


def rise_onsets(a: np.ndarray, start: int, stop: int, rise: np.ndarray, s: TrackingSettings, *,
                novelty: np.ndarray | None = None, relaxed: np.ndarray | None = None) -> list[int]:
    """Region start and the rise-after-dip (and novelty) re-onsets inside it.

    ``rise``, ``novelty`` and ``relaxed`` (where the part expects an onset) cover all of ``a``.
    """
    frames = s.reonset_frames
    seg = a[start:stop]
    ok, gain, only_relaxed = _rise_candidates(
        seg, rise[start:stop], s, None if novelty is None else novelty[start:stop],
        None if relaxed is None else relaxed[start:stop])
    candidates = np.nonzero(ok[1:-1] & (gain[1:-1] >= gain[:-2]) & (gain[1:-1] > gain[2:]))[0] + 1
    onsets = [start]
    last = 0
    for c in candidates:
        # a relaxed onset must also be well clear of the previous one: the expected-onset zone
        # around a note's own start would otherwise split its attack
        if c - last >= (s.relaxed_spacing if only_relaxed[c] else s.onset_spacing) * frames:
            onsets.append(start + int(c) - frames // 2)
            last = c
    return onsets
