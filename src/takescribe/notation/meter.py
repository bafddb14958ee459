"""Beats, meter and downbeat of a take without a part.

Beats come from librosa's dynamic-programming tracker (Ellis 2007) on onset evidence
that the analysis stage hands over (:class:`takescribe.features.onsets.OnsetStrength`),
or on an envelope built from the transcribed notes; the notes then refine them and decide
the meter from their accents. The tuned numbers are in :data:`.settings.METER`.

References
----------
Ellis, D. P. W. (2007). Beat tracking by dynamic programming. *Journal of New Music
Research* 36(1), 51–60 (librosa's ``beat_track``).
"""

from __future__ import annotations

from fractions import Fraction
from typing import Any, Sequence

import numpy as np

from ..errors import InputError
from ..notes import Note, sort_notes, validate_notes
from .grid import BeatGrid, beat_of, grid_from_times, interp_extrap, parse_time_signature
from .settings import METER

__all__ = ["estimate_meter"]

# the frame rate of an envelope built from notes: librosa's default 22050 Hz / 512
_NOTE_ENVELOPE_SR = 22050
_HOP_LENGTH = 512


def _notes_onset_envelope(notes: Sequence[Note], *, frame_rate: float, n_frames: int) -> np.ndarray:
    env = np.zeros(n_frames, dtype=float)
    for n in notes:
        i = int(round(n.onset * frame_rate))
        if 0 <= i < n_frames:
            env[i] += 0.5 + n.velocity / 127.0
    # a short smoothing so that slightly spread chords count as one onset
    kernel = np.array([0.25, 1.0, 0.25])
    return np.convolve(env, kernel, mode="same")


def _snap_beats(beats: np.ndarray, onsets: np.ndarray, period: float, *, window: float = METER.snap_window) -> np.ndarray:
    """Move each beat to the nearest note onset within ``window`` periods (onset envelopes lag
    the note starts by a frame or two; notes are what we quantize)."""
    if len(onsets) == 0:
        return beats
    # a constant lag first (onset envelopes peak after the note starts, by more for slow attacks)
    idx = np.clip(np.searchsorted(onsets, beats), 1, len(onsets) - 1)
    lo, hi = onsets[idx - 1], onsets[idx]
    nearest = np.where(np.abs(lo - beats) <= np.abs(hi - beats), lo, hi)
    lag = nearest - beats
    close = np.abs(lag) <= METER.lag_reach * period
    if np.sum(close) >= max(2, len(beats) // 4):
        beats = beats + float(np.median(lag[close]))
    out = beats.copy()
    idx = np.searchsorted(onsets, beats)
    for k, b in enumerate(beats):
        cands = [onsets[j] for j in (idx[k] - 1, idx[k]) if 0 <= j < len(onsets)]
        best = min(cands, key=lambda o: abs(o - b))
        if abs(best - b) <= window * period:
            out[k] = best
    # keep strictly increasing
    for k in range(1, len(out)):
        if out[k] <= out[k - 1] + 0.25 * period:
            out[k] = beats[k] if beats[k] > out[k - 1] + 0.25 * period else out[k - 1] + period
    return out


def _hit_rate(points: np.ndarray, onsets: np.ndarray, period: float) -> float:
    """Share of ``points`` with a note onset within 10 % of a beat."""
    if len(points) == 0 or len(onsets) == 0:
        return 0.0
    idx = np.clip(np.searchsorted(onsets, points), 1, len(onsets) - 1)
    near = np.minimum(np.abs(onsets[idx] - points), np.abs(onsets[idx - 1] - points))
    return float(np.mean(near <= METER.hit_tolerance * period))


def _tempo_preference(period: float) -> float:
    """Weak preference for beats near :attr:`MeterSettings.preferred_period` (see there)."""
    return METER.preference_weight * float(np.log2(period / METER.preferred_period)) ** 2


_TEMPO_RATIOS = (Fraction(1, 2), Fraction(2, 3), Fraction(3, 4), Fraction(1), Fraction(4, 3), Fraction(3, 2), Fraction(2))


def _fit_terms(x: np.ndarray, points_time: np.ndarray, onsets: np.ndarray, period: float) -> float:
    """coverage + hits of onsets at beat positions ``x`` (see :func:`_grid_fit`)."""
    frac = x - np.floor(x)
    d4 = np.abs(frac * 4 - np.round(frac * 4)) / 4
    d3 = np.abs(frac * 3 - np.round(frac * 3)) / 3
    coverage = float(np.mean(np.minimum(d4, d3) <= METER.grid_tolerance))
    return coverage + _hit_rate(points_time, onsets, period)


def _grid_fit(onsets: np.ndarray, beats: np.ndarray | None, period: float) -> tuple[float, float, float]:
    """How well a beat explains the note onsets: ``(score, phase seconds, period seconds)``.

    ``coverage``: share of onsets within 5 % of a beat of a point of the plain (1/4) or
    triplet (1/3) grid; ``hits``: share of beats between the first and last onset that
    carry an onset. With ``beats`` (the tracked ones) positions are measured along them,
    so slow tempo drift does not spoil the fit; without, a steady beat of ``period`` is
    fitted to the onsets (phase searched among the first onsets, period refined by least
    squares). The score adds a weak preference for beats near 0.55 s (about 110 per
    minute, where listeners tap most readily; van Noorden & Moelants 1999, JNMR 28(1),
    from memory).
    """
    if beats is not None:
        idx = np.arange(len(beats), dtype=float)
        x = interp_extrap(onsets, beats, idx)
        inside = beats[(beats >= onsets[0] - 0.1 * period) & (beats <= onsets[-1] + 0.1 * period)]
        score = _fit_terms(x, inside, onsets, period) - _tempo_preference(period)
        return score, float(beats[0]), period
    best = (-np.inf, float(onsets[0]), period)
    for phase in onsets[: min(len(onsets), 12)]:
        c, ph = period, float(phase)
        # refine on a growing window around the phase so a few % of period error does
        # not drift the grid off the far onsets before the fit corrects it
        for reach in (6, 12, 24, 48, np.inf):
            x = (onsets - ph) / c
            grid = np.where(np.abs(x * 4 - np.round(x * 4)) / 4 <= np.abs(x * 3 - np.round(x * 3)) / 3,
                            np.round(x * 4) / 4, np.round(x * 3) / 3)
            ok = (np.abs(x - grid) <= METER.refine_tolerance) & (np.abs(x) <= reach)
            if np.sum(ok) < 3 or np.ptp(grid[ok]) <= 0:
                break
            c_new, ph_new = np.polyfit(grid[ok], onsets[ok], 1)
            if not (0.8 * period <= c_new <= 1.25 * period):
                break
            c, ph = float(c_new), float(ph_new)
        x = (onsets - ph) / c
        k = np.arange(np.floor(x.min()), np.floor(x.max()) + 1)
        score = _fit_terms(x, ph + c * k, onsets, c) - _tempo_preference(c)
        if score > best[0]:
            best = (score, ph, c)
    return best


def _check_tempo(beats: np.ndarray, period: float, onsets: np.ndarray) -> tuple[np.ndarray, float]:
    """Keep the tracked beat, or move to a related steady beat (1/2, 2/3, 3/4, 4/3, 3/2, 2
    times, or 1–4 times the most common gap between onsets) that explains the note onsets
    clearly better (by 0.1; see :func:`_grid_fit`)."""
    candidates = {period * float(r) for r in _TEMPO_RATIOS if r != 1}
    ioi = np.diff(onsets)
    ioi = ioi[ioi > 0.08]
    if len(ioi):
        hist, edges = np.histogram(ioi, bins=np.arange(0.08, 2.0, 0.01))
        lo = edges[np.argmax(hist)]
        mode = float(np.median(ioi[(ioi >= lo - 0.02) & (ioi < lo + 0.03)]))
        candidates |= {mode * k for k in (1, 2, 3, 4)}
    low, high = METER.period_range
    candidates = {c for c in candidates if low <= c <= high and abs(c - period) > 0.03 * period}
    tracked = _grid_fit(onsets, beats, period)
    fits = [_grid_fit(onsets, None, c) for c in sorted(candidates)]
    best = max(fits, key=lambda f: f[0], default=tracked)
    if best[0] <= tracked[0] + METER.tempo_margin:
        return beats, period
    _, phase, new_period = best
    start = phase - new_period * np.ceil((phase - min(beats[0], onsets[0])) / new_period)
    n = int(np.ceil((max(beats[-1], onsets[-1]) - start) / new_period)) + 1
    return start + new_period * np.arange(n), new_period


def _extend_beats(beats: np.ndarray, first: float, last: float, onsets: np.ndarray) -> np.ndarray:
    beats = list(beats)
    period = float(np.median(np.diff(beats))) if len(beats) > 1 else 0.5
    while first < beats[0] - METER.tail_margin * period:
        b = beats[0] - period
        b = float(_snap_beats(np.array([b]), onsets, period)[0])
        if b >= beats[0] - 0.25 * period:
            b = beats[0] - period
        beats.insert(0, b)
    while last > beats[-1] + METER.tail_margin * period:
        b = beats[-1] + period
        b = float(_snap_beats(np.array([b]), onsets, period)[0])
        if b <= beats[-1] + 0.25 * period:
            b = beats[-1] + period
        beats.append(b)
    if len(beats) < 2:
        beats.append(beats[-1] + period)
    return np.asarray(beats, dtype=float)


def _steady_tails(beats: np.ndarray, first_onset: float, last_onset: float) -> np.ndarray:
    """Beats before the first and after the last onset have no note to anchor them:
    continue the neighbouring tempo (median of the 4 nearest intervals) instead."""
    beats = beats.copy()
    inside = np.flatnonzero((beats >= first_onset - 1e-6) & (beats <= last_onset + 1e-6))
    if len(inside) < 3:
        return beats
    a, b = inside[0], inside[-1]
    head = float(np.median(np.diff(beats[a:a + 5])))
    tail = float(np.median(np.diff(beats[max(a, b - 4):b + 1])))
    beats[:a] = beats[a] - head * np.arange(a, 0, -1)
    beats[b + 1:] = beats[b] + tail * np.arange(1, len(beats) - b)
    return beats


def _beat_accents(notes: Sequence[Note], beats: np.ndarray) -> np.ndarray:
    """Metric accent per beat from the notes starting on it: the longest one, a bass onset,
    the loudest velocity and the number of notes (longer, lower, louder and fuller onsets
    tend to start bars: common practice, no source). Each feature is standardised over the
    beats, then weighted 1, 0.7, 0.5, 0.3."""
    period = float(np.median(np.diff(beats))) if len(beats) > 1 else 0.5
    n_beats = len(beats)
    longest = np.zeros(n_beats)
    bass = np.zeros(n_beats)
    loud = np.zeros(n_beats)
    count = np.zeros(n_beats)
    if not notes:
        return longest
    pitches = np.array([n.pitch for n in notes])
    low = np.percentile(pitches, 25)
    for n in notes:
        k = int(np.argmin(np.abs(beats - n.onset)))
        if abs(beats[k] - n.onset) > METER.accent_reach * period:
            continue
        longest[k] = max(longest[k], np.log1p(min(n.duration / period, 4.0)))
        if n.pitch <= low:
            bass[k] = 1.0
        loud[k] = max(loud[k], n.velocity / 127.0)
        count[k] += 1

    def z(a: np.ndarray) -> np.ndarray:
        return (a - a.mean()) / (a.std() + 1e-9) if a.std() > 1e-9 else np.zeros_like(a)

    w = METER.accent_weights
    return w[0] * z(longest) + w[1] * z(bass) + w[2] * z(loud) + w[3] * z(count)


def _phase_scores(accents: np.ndarray, notes: Sequence[Note], beats: np.ndarray, m: int) -> np.ndarray:
    """Score of each downbeat phase for bars of ``m`` beats.

    Accent contrast (mean accent of the phase's beats minus the mean of all beats) minus
    twice the share of notes of a beat or longer that would start inside a bar and run
    over its bar line (long notes rarely cross bar lines unless syncopated: common
    practice, no source), plus 0.3 when the first note falls on the downbeat (0.15 when
    it is a one-beat upbeat).
    """
    out = np.full(m, -np.inf)
    if notes:
        idx = np.arange(len(beats), dtype=float)
        start = np.round(interp_extrap(np.array([n.onset for n in notes]), beats, idx) * 2) / 2
        end = np.round(interp_extrap(np.array([n.offset for n in notes]), beats, idx) * 2) / 2
        long = (end - start) >= 1
    for p in range(m):
        sel = accents[p::m]
        if len(sel) == 0:
            continue
        score = float(sel.mean() - accents.mean())
        if notes and np.any(long):
            a = (start[long] - p) / m
            b = (end[long] - p - 1e-6) / m
            crossing = (np.floor(a) != np.floor(b)) & (np.abs(a - np.round(a)) > 1e-6)
            score -= METER.crossing_penalty * float(np.mean(crossing))
        if notes:
            # pieces start on a downbeat or after a short upbeat
            # (common practice, no source)
            first_pos = (start[0] - p) % m
            if first_pos == 0:
                score += METER.downbeat_bonus
            elif first_pos == m - 1:
                score += METER.upbeat_bonus
        out[p] = score
    return out


def _is_compound(notes: Sequence[Note], beats: np.ndarray) -> bool:
    """Do onsets divide the beats in three rather than two?"""
    period = float(np.median(np.diff(beats)))
    q = interp_extrap(np.array([n.onset for n in notes]), beats, np.arange(len(beats), dtype=float))
    frac = q - np.floor(q)
    tol = METER.compound_tolerance
    thirds = np.sum((np.abs(frac - 1 / 3) < tol) | (np.abs(frac - 2 / 3) < tol))
    halves = np.sum(np.abs(frac - 0.5) < tol) + np.sum((np.abs(frac - 0.25) < 0.04) | (np.abs(frac - 0.75) < 0.04))
    return bool(thirds >= METER.compound_min_thirds and thirds > 2 * halves and period > METER.compound_min_period)



def _envelope(onsets: Any, notes: Sequence[Note]) -> tuple[np.ndarray, int, int, float]:
    """The onset envelope to track beats on: ``(envelope, sr, hop_length, duration)``."""
    if onsets is not None:
        for attr in ("envelope", "sr", "hop_length"):
            if not hasattr(onsets, attr):
                raise TypeError(f"onsets must look like takescribe.features.onsets.OnsetStrength (missing {attr!r})")
        env = np.asarray(onsets.envelope, dtype=float)
        return env, int(onsets.sr), int(onsets.hop_length), len(env) * onsets.hop_length / onsets.sr
    duration = max(n.offset for n in notes) + 1.0
    n_frames = int(duration * _NOTE_ENVELOPE_SR / _HOP_LENGTH) + 2
    env = _notes_onset_envelope(notes, frame_rate=_NOTE_ENVELOPE_SR / _HOP_LENGTH, n_frames=n_frames)
    return env, _NOTE_ENVELOPE_SR, _HOP_LENGTH, duration


def _track_beats(env: np.ndarray, env_sr: int, hop_length: int, duration: float, onsets: np.ndarray,
                 *, tempo: float | None, beat_scale: float, has_meter: bool) -> tuple[np.ndarray, float]:
    """librosa's beat tracker, then the beat level checked against the note onsets."""
    import librosa

    kwargs: dict[str, Any] = {}
    if tempo is not None:
        kwargs["bpm"] = float(tempo) / beat_scale
    else:
        kwargs["start_bpm"] = METER.start_bpm / beat_scale if has_meter else METER.start_bpm
    _, beats = librosa.beat.beat_track(onset_envelope=env, sr=env_sr, hop_length=hop_length,
                                       units="time", trim=False, **kwargs)
    beats = np.asarray(beats, dtype=float)
    if tempo is not None:
        period = 60.0 / (float(tempo) / beat_scale)
    elif len(beats) > 1:
        period = float(np.median(np.diff(beats)))
    else:
        period = METER.default_period
    if len(beats) < 2:
        start = float(onsets[0]) if len(onsets) else 0.0
        beats = start + period * np.arange(max(2, int(duration / period) + 1))
    if tempo is not None:
        # a known tempo: keep the tracked phase, impose the period
        beats = beats[0] + period * np.arange(len(beats))
    elif len(onsets) > 4 and len(beats) > 4:
        beats, period = _check_tempo(_snap_beats(beats, onsets, period, window=0.0), period, onsets)
    return beats, period


def _place_beats(beats: np.ndarray, period: float, onsets: np.ndarray, notes: Sequence[Note]) -> np.ndarray:
    """Snap beats to onsets, cover the notes, steady tails, no beats long before the first note."""
    beats = _snap_beats(beats, onsets, period)
    first = float(onsets[0]) if len(onsets) else float(beats[0])
    last = max(n.offset for n in notes) if notes else float(beats[-1])
    beats = _extend_beats(beats, first, last, onsets)
    beats = _steady_tails(beats, first, float(onsets[-1]) if len(onsets) else last)
    while len(beats) > 2 and beats[1] <= first - METER.tail_margin * period:
        beats = beats[1:]
    return beats


def _choose_meter(notes: Sequence[Note], beats: np.ndarray, period: float,
                  ts: tuple[int, int] | None) -> tuple[int, int, int]:
    """``(numerator, denominator, downbeat phase)`` from the accents of the notes."""
    # accents only over the beats the notes start in (empty tails would blur the statistics)
    n_used = len(beats)
    if notes:
        n_used = max(2, int(np.searchsorted(beats, max(n.onset for n in notes) + METER.lag_reach * period)))
    accents = _beat_accents(notes, beats[:n_used]) if notes else np.zeros(len(beats))
    if ts is not None:
        bpb, _ = beat_of(*ts)
        return ts[0], ts[1], int(np.argmax(_phase_scores(accents, notes, beats[:n_used], bpb)))
    compound = bool(notes) and len(beats) > 4 and _is_compound(notes, beats)
    best = {m: _phase_scores(accents, notes, beats[:n_used], m) for m in (2, 3, 4)}
    top = {m: float(np.max(v)) for m, v in best.items()}
    # 2 and 4 beats both fit a 4/4 (or 12/8) bar: keep the common one -- 4 in simple
    # meters, 2 (6/8) in compound ones -- unless the other stands out clearly
    if compound:
        even = 4 if top[4] > top[2] + METER.even_margin else 2
    else:
        even = 2 if top[2] > top[4] + METER.even_margin else 4
    m = 3 if top[3] > top[even] + METER.triple_margin else even
    num, den = (3 * m, 8) if compound else (m, 4)
    return num, den, int(np.argmax(best[m]))


def estimate_meter(
    notes: Sequence[Note] | None,
    *,
    onsets: Any = None,
    tempo: float | None = None,
    time_signature: object | None = None,
) -> BeatGrid:
    """Estimate beats, meter and downbeat of a take.

    Parameters
    ----------
    notes : sequence of Note or None
        Transcribed notes: they refine beats (snap to nearby onsets) and decide meter and
        downbeat from their accents (length, loudness, bass).
    onsets : takescribe.features.onsets.OnsetStrength, optional
        Onset evidence of the take from the analysis stage; beats are tracked on it when
        given, else on an onset envelope built from ``notes``.
    tempo : float, optional
        Known tempo in quarter notes per minute (overrides the estimate).
    time_signature : str or (int, int), optional
        Known meter, e.g. ``"3/4"`` (overrides the meter guess; the downbeat is still estimated).

    Returns
    -------
    BeatGrid

    Raises
    ------
    InputError
        If there is neither onset evidence nor notes, or an override is out of range.

    Notes
    -----
    Beats: ``librosa.beat.beat_track`` (Ellis 2007) on the envelope, shifted by the median
    lag to the note onsets and snapped to onsets within
    :attr:`~.settings.MeterSettings.snap_window` of a beat; the beat level is then checked
    against related levels (1/2 ... 2 times, multiples of the commonest gap between
    onsets) fitted to the onsets. Beats before the first / after the last onset continue
    the neighbouring tempo. Meter: for 2, 3 and 4 beats per bar, every downbeat phase is
    scored by accent contrast, bar-line crossings of long notes and a start-on-downbeat
    cue; compound meter (6/8, 9/8, 12/8) when onsets divide the beats in three.

    Examples
    --------
    >>> from takescribe.notes import Note
    >>> notes = [Note(0.5 * i, 0.5 * i + 0.45, 60 + (i % 4 == 0) * 7) for i in range(16)]
    >>> estimate_meter(notes, time_signature="4/4", tempo=120).beats_per_bar
    4
    """
    notes = sort_notes(validate_notes(notes or []))
    if tempo is not None and not (20.0 <= float(tempo) <= 400.0):
        raise InputError(f"tempo must be 20..400 quarter notes per minute, got {tempo}")
    ts = parse_time_signature(time_signature) if time_signature is not None else None
    if onsets is None and not notes:
        raise InputError("cannot estimate the meter: give the take's onset evidence or some notes")
    onset_times = np.array(sorted({round(n.onset, 4) for n in notes})) if notes else np.zeros(0)
    env, env_sr, hop_length, duration = _envelope(onsets, notes)
    beat_scale = float(beat_of(*ts)[1]) if ts is not None else 1.0
    beats, period = _track_beats(env, env_sr, hop_length, duration, onset_times, tempo=tempo,
                                 beat_scale=beat_scale, has_meter=ts is not None)
    beats = _place_beats(beats, period, onset_times, notes)
    num, den, phase = _choose_meter(notes, beats, period, ts)
    return grid_from_times(beats, num=num, den=den, downbeat_index=phase)
