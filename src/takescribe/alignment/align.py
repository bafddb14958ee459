"""Score time ↔ take time: align a reference part with a recorded take.

Method
------
1. **Features.** Both sides are turned into the same two features on the same
   frame grid (``hop_length`` samples, about 23 ms):

   - *chroma*: energy per MIDI pitch (21..108), log-compressed, folded into 12
     pitch classes and normalised to unit length; silent frames get the
     uniform vector so that rests match silence;
   - *decaying onset chroma* (DLNCO, Ewert, Müller and Grosche 2009): the
     half-wave rectified rise of the log pitch energy, folded into 12 classes,
     normalised by a local maximum and given a decaying tail of about 0.2 s,
     which pins the alignment to note onsets.

   For the take the pitch energy comes from short-time Fourier spectra through a
   triangular semitone filterbank (a long window, 186 ms at 22050 Hz, for the
   chroma; a shorter one, 93 ms, for the onsets). For the part it is rendered
   from the notes with simple harmonic templates (partial ``h`` at
   ``pitch + 12 log2 h`` with power ``1/h``) and an exponentially decaying
   envelope, then smoothed in time with the squared analysis window, so that
   both sides have the same time response.

2. **Cost.** Cosine distance of the chroma plus Euclidean distance of the onset
   features (the combination of Ewert et al. 2009).

3. **DTW with pauses, restarts and free ends** (our own vectorised dynamic
   programme, one take frame per step, score frames as rows):

   - steps (1,1), (2,1), (1,2) — the score may run from half to twice the
     take's speed, which covers tempi of 50–150 % and rubato;
   - (0,1) with :data:`PAUSE_COST` — the take goes on while the score stands
     still (a hesitation, a held fermata, a slower passage);
   - a *jump back* from any later score frame with :data:`JUMP_SECONDS` worth
     of mismatch as penalty — a restart or a repeated bar;
   - free ends: the path may start at any take frame (frames of sound before the
     start cost :data:`UNALIGNED_COST` each, silence nothing) and at any score
     frame (each skipped score frame costs :data:`SKIP_COST`), and end likewise,
     so silence around the take and a take of only part of the piece both align.

   Every take frame pays exactly once (the (1,2) step pays its cell twice),
   so no tempo is favoured and a jump gains nothing by skipping score frames.

4. **Multiscale.** The programme first runs on frames ``coarse_factor`` times
   longer (full matrix, which stays small: a 10-minute take is about 3300
   frames a side), then at the full frame rate inside a band around the coarse
   path; memory grows with the length of the take, not its square.

5. **Confidence.** The mean chroma similarity along the path ``s_path`` is
   compared with ``s_null``, the best one obtained by aligning the part
   transposed by 1..11 semitones (same rhythm, wrong pitches; a rolled chroma
   is an exact transposition) with the same programme on frames pooled to at
   most 1000 per take: ``confidence = clip(2 (s_path - s_null) / (1 - s_null), 0, 1)``.
   The take of another piece matches some transposition as well as the
   untransposed part, so its confidence falls to about 0. Below
   :data:`MISMATCH_CONFIDENCE` :func:`align_reference` warns with
   :class:`AlignmentWarning`. The confidence is scaled down when the path spans
   less than 75 % of the take's sounding frames (a short stretch that happens to
   match is no evidence).

Conventions
-----------
- ``score_times`` are seconds at the written tempo of the part
  (:meth:`takescribe.score.Reference.quarters_to_seconds`), ``take_times``
  seconds from the start of the take. ``take_times`` increase strictly;
  ``score_times`` never decrease except at a ``jump_back`` segment.
- :meth:`Alignment.score_to_take` follows the *last* pass over each score time
  (after a restart, the attempt that went on), and gives the take time at
  which that score time is first reached (a pause is placed before the next
  note, not before the held one).
- Pauses shorter than :data:`MIN_PAUSE_SECONDS` are tempo, not pauses.

References
----------
Ewert, S., Müller, M., Grosche, P. (2009). High resolution audio synchronization
using chroma onset features. Proc. IEEE ICASSP, 1869–1872.
Müller, M. (2015). Fundamentals of Music Processing, ch. 3 (DTW step sizes,
subsequence DTW). Springer.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field, replace

import numpy as np

from ..audio.load import validate_audio
from ..errors import AlignmentWarning  # re-exported: its home before the warning tree
from ..reference.part import Reference, validate_reference
from .dtw import band_from_path, dtw, pool
from .features import _default_hop, _render_reference, reference_features, take_features  # noqa: F401
from .settings import SETTINGS

__all__ = [
    "Alignment",
    "AlignmentSegment",
    "AlignmentWarning",
    "align_reference",
    "reference_features",
    "take_features",
    "MISMATCH_CONFIDENCE",
    "MIN_PAUSE_SECONDS",
]

# the public names of 0.1, read from the settings (see :mod:`takescribe.alignment.settings`)
MISMATCH_CONFIDENCE = SETTINGS.mismatch_confidence
MIN_PAUSE_SECONDS = SETTINGS.min_pause_seconds
PAUSE_COST = SETTINGS.pause_cost
JUMP_SECONDS = SETTINGS.jump_seconds
UNALIGNED_COST = SETTINGS.unaligned_cost
SKIP_COST = SETTINGS.skip_cost




@dataclass(frozen=True, slots=True)
class AlignmentSegment:
    """An irregularity found on the alignment path.

    Attributes
    ----------
    kind : {"pause", "jump_back"}
        ``pause``: the take goes on while the score stands still for at least
        :data:`MIN_PAUSE_SECONDS`. ``jump_back``: the score time goes back
        (a restart or a repeated passage).
    take_start, take_end : float
        Seconds in the take (for a jump, the frames on either side of it).
    score_start, score_end : float
        Seconds at the written tempo; for a jump, from ``score_start`` back to
        ``score_end``.
    """

    kind: str
    take_start: float
    take_end: float
    score_start: float
    score_end: float

    @property
    def duration(self) -> float:
        """Take seconds covered (the length of a pause)."""
        return self.take_end - self.take_start


@dataclass(frozen=True, eq=False)  # holds arrays: compared by identity
class Alignment:
    """A warping path between a reference part and a take.

    Attributes
    ----------
    score_times : np.ndarray (n_steps,)
        Seconds at the written tempo along the path.
    take_times : np.ndarray (n_steps,)
        Seconds in the take along the path (strictly increasing).
    confidence : float
        0..1; below :data:`MISMATCH_CONFIDENCE` the take may not match the part.
    segments : tuple of AlignmentSegment
        Pauses and jumps back, in take order.
    hop_length, sr : int
        Frame grid of the path.
    similarity, null_similarity : float
        Mean chroma similarity along the path, and the best one found for the part
        transposed by 1..11 semitones (see the module docstring).
    coverage : float
        Share of the take's sounding frames that lie within the path's span.
    """

    score_times: np.ndarray
    take_times: np.ndarray
    confidence: float
    segments: tuple = ()
    hop_length: int = 512
    sr: int = 22050
    similarity: float = float("nan")
    null_similarity: float = float("nan")
    coverage: float = float("nan")
    _forward: tuple = field(default=(), repr=False, compare=False)

    def __post_init__(self) -> None:
        s = np.asarray(self.score_times, dtype=float)
        t = np.asarray(self.take_times, dtype=float)
        if s.shape != t.shape or s.ndim != 1 or s.size < 2:
            raise ValueError("score_times and take_times must be 1-D arrays of the same length (>= 2)")
        object.__setattr__(self, "score_times", s)
        object.__setattr__(self, "take_times", t)
        # where a jump back lands one or two frames after the note the player went back to,
        # the score times just before the landing belong to the new pass as well
        landings = np.flatnonzero(np.diff(s) < 0) + 1
        if landings.size:
            lead = np.minimum(SETTINGS.landing_seconds, s[landings])
            s = np.insert(s, landings, s[landings] - lead)
            t = np.insert(t, landings, t[landings] - lead)
        # the last pass over each score time: walk back from the end, keep new minima
        keep = np.zeros(s.size, dtype=bool)
        low = np.inf
        for k in range(s.size - 1, -1, -1):
            if s[k] < low - 1e-12:
                keep[k] = True
                low = s[k]
            elif s[k] == low and keep[k + 1]:
                keep[k] = True  # the same score time earlier in one pause: the first arrival wins
        ks = s[keep]
        kt = t[keep]
        # keep the earliest take time per score time (arrival, not departure)
        order = np.lexsort((kt, ks))
        ks, kt = ks[order], kt[order]
        first = np.concatenate([[True], np.diff(ks) > 0])
        object.__setattr__(self, "_forward", (ks[first], kt[first]))

    @property
    def overall_ratio(self) -> float:
        """Take seconds per score second over the whole final pass."""
        ks, kt = self._forward
        if ks.size < 2 or ks[-1] <= ks[0]:
            return 1.0
        return float((kt[-1] - kt[0]) / (ks[-1] - ks[0]))

    def score_to_take(self, t_score):
        """Take seconds of score times ``t_score`` (vectorized, monotone; linear beyond the path)."""
        ks, kt = self._forward
        x = np.asarray(t_score, dtype=float)
        out = np.interp(x, ks, kt)
        ratio = self.overall_ratio
        out = np.where(x < ks[0], kt[0] + (x - ks[0]) * ratio, out)
        out = np.where(x > ks[-1], kt[-1] + (x - ks[-1]) * ratio, out)
        return float(out) if out.ndim == 0 else out

    def take_to_score(self, t_take):
        """Score seconds (written tempo) heard at take times ``t_take`` (vectorized)."""
        x = np.asarray(t_take, dtype=float)
        out = np.interp(x, self.take_times, self.score_times)
        return float(out) if out.ndim == 0 else out

    def local_tempo_ratio(self, t_score, *, window: float = 2.0):
        """Take seconds per score second around score times ``t_score``.

        The slope of :meth:`score_to_take` over ``window`` score seconds
        (centred), so pauses inside the window count as slower playing.
        """
        x = np.asarray(t_score, dtype=float)
        half = window / 2.0
        ks = self._forward[0]
        lo = np.clip(x - half, ks[0], ks[-1])
        hi = np.clip(x + half, ks[0], ks[-1])
        span = hi - lo
        ratio = np.where(
            span > 1e-9,
            (np.asarray(self.score_to_take(hi)) - np.asarray(self.score_to_take(lo))) / np.maximum(span, 1e-9),
            self.overall_ratio,
        )
        return float(ratio) if ratio.ndim == 0 else ratio


def _path_similarity(score_chroma, take_chroma, rows, cols) -> float:
    if rows.size == 0:
        return 0.0
    return float(np.mean(np.sum(score_chroma[rows] * take_chroma[cols], axis=1)))


def _confidence(similarity: float, null_similarity: float) -> float:
    """Map the path similarity and the best transposed similarity to 0..1.

    ``(s - s_null) / (1 - s_null)`` is the share of the distance to a perfect match that the
    true part gains over the best wrong transposition; ``confidence_gain`` (:mod:`~takescribe.alignment.settings`) scales it so
    that a clear match saturates at 1.
    """
    gain = (similarity - null_similarity) / max(1.0 - null_similarity, 1e-6)
    return float(np.clip(gain * SETTINGS.confidence_gain, 0.0, 1.0))


def _pauses_between_onsets(alignment: "Alignment", onsets: np.ndarray) -> list[AlignmentSegment]:
    """Pauses: a gap between successive score onsets that lasts at least MIN_PAUSE_SECONDS longer in
    the take than the neighbouring gaps' tempo predicts (the score stands still, then resumes)."""
    groups = np.unique(np.round(onsets, 4))
    if groups.size < 3:
        return []
    take = np.asarray(alignment.score_to_take(groups))
    d_score = np.diff(groups)
    d_take = np.diff(take)
    ratio = d_take / np.maximum(d_score, 1e-9)
    jumps = [x.take_start for x in alignment.segments if x.kind == "jump_back"]
    out = []
    for k in range(d_score.size):
        if any(take[k] - 1e-9 <= t_jump <= take[k + 1] + 1e-9 for t_jump in jumps):
            continue  # the gap straddles a restart: not a pause

        reach = SETTINGS.pause_neighbours
        neighbours = np.r_[ratio[max(0, k - reach):k], ratio[k + 1:k + 1 + reach]]
        local = float(np.median(neighbours)) if neighbours.size else alignment.overall_ratio
        excess = d_take[k] - local * d_score[k]
        if excess >= MIN_PAUSE_SECONDS:
            out.append(AlignmentSegment("pause", float(take[k + 1] - excess), float(take[k + 1]),
                                        float(groups[k + 1]), float(groups[k + 1])))
    return out


def _segments(rows: np.ndarray, cols: np.ndarray, frame_seconds: float) -> tuple[AlignmentSegment, ...]:
    out = []
    k = 0
    n = rows.size
    while k < n - 1:
        if rows[k + 1] < rows[k]:
            out.append(AlignmentSegment("jump_back", cols[k] * frame_seconds, cols[k + 1] * frame_seconds,
                                        rows[k] * frame_seconds, rows[k + 1] * frame_seconds))
            k += 1
            continue
        if rows[k + 1] == rows[k]:
            m = k
            while m + 1 < n and rows[m + 1] == rows[k]:
                m += 1
            if (cols[m] - cols[k]) * frame_seconds >= MIN_PAUSE_SECONDS:
                out.append(AlignmentSegment("pause", cols[k] * frame_seconds, cols[m] * frame_seconds,
                                            rows[k] * frame_seconds, rows[k] * frame_seconds))
            k = m
            continue
        k += 1
    return tuple(out)


def align_reference(
    y: np.ndarray,
    sr: int,
    reference: Reference,
    *,
    hop_length: int | None = None,
    coarse_factor: int = 8,
    band_radius: float = 0.4,
    onset_weight: float = 1.0,
    warn: bool = True,
) -> Alignment:
    """Align a take with its reference part.

    Parameters
    ----------
    y : np.ndarray (n_samples,)
        The take, mono float.
    sr : int
        Sample rate of ``y`` in Hz.
    reference : Reference
        The part (:func:`takescribe.score.load_reference`).
    hop_length : int, optional
        Frame step in samples; default the power of two nearest 23 ms (512 at 22050 Hz).
    coarse_factor : int
        Frames pooled for the first, full-matrix pass (raised automatically so that
        pass stays under 16 million cells: about 12 minutes of take and part at
        the default).
    band_radius : float
        Seconds around the coarse path searched at the full frame rate.
    onset_weight : float
        Weight of the onset-feature distance against the chroma distance.
    warn : bool
        Emit :class:`AlignmentWarning` when the confidence is below
        :data:`MISMATCH_CONFIDENCE`.

    Returns
    -------
    Alignment

    Raises
    ------
    TypeError, AudioError, ScoreError
        Bad signal or reference (see :func:`takescribe.audio.validate_audio`,
        :func:`takescribe.score.validate_reference`).
    ValueError
        A knob out of range.

    References
    ----------
    Ewert, Müller and Grosche (2009), see the module docstring.

    Examples
    --------
    >>> alignment = align_reference(y, sr, reference)  # doctest: +SKIP
    >>> alignment.score_to_take([n.onset for n in reference.notes])  # doctest: +SKIP
    """
    validate_audio(y, sr)
    validate_reference(reference)
    hop_length = hop_length or _default_hop(sr)
    _validate_options(hop_length, coarse_factor, band_radius)
    frame_rate = sr / hop_length
    take = take_features(y, sr, hop_length=hop_length)
    score = reference_features(reference, sr, hop_length=hop_length)
    n_rows, n_cols = score[0].shape[0], take[0].shape[0]
    # the full-matrix pass stays under max_coarse_cells cells however long the take and part
    coarse_factor = max(int(coarse_factor), int(np.ceil(np.sqrt(n_rows * n_cols / SETTINGS.max_coarse_cells))))
    coarse_take = _pooled_take(take, coarse_factor)
    rows_c, cols_c, sim_coarse = _pooled_path(coarse_factor, score[0], score[1], coarse_take,
                                              frame_rate=frame_rate, onset_weight=onset_weight)
    similarity, null_similarity = _similarities(score, take, coarse_take, coarse_factor, sim_coarse,
                                                frame_rate=frame_rate, onset_weight=onset_weight)
    rows, cols = _fine_path(score, take, rows_c, cols_c, coarse_factor, frame_rate=frame_rate,
                            band_radius=band_radius, onset_weight=onset_weight)
    if rows.size < 2:
        # nothing aligned: fall back to the written tempo from the start of the take
        rows = np.array([0, n_rows - 1])
        cols = np.array([0, n_rows - 1])
        confidence = 0.0
    else:
        confidence = _confidence(similarity, null_similarity)
    t_sounding = take[2]
    sounding_total = max(int(t_sounding.sum()), 1)
    coverage = float(t_sounding[cols[0]:cols[-1] + 1].sum()) / sounding_total if rows.size >= 2 else 0.0
    # a path that explains only a small part of what was played is no evidence of a match
    confidence *= float(np.clip(coverage / SETTINGS.coverage_full, 0.0, 1.0))
    frame_seconds = hop_length / sr
    path_segments = _segments(rows, cols, frame_seconds)
    alignment = Alignment(
        score_times=rows * frame_seconds, take_times=cols * frame_seconds, confidence=confidence,
        segments=path_segments, hop_length=int(hop_length), sr=int(sr),
        similarity=similarity, null_similarity=null_similarity, coverage=coverage,
    )
    pauses = _pauses_between_onsets(alignment, np.array([n.onset for n in reference.notes]))
    segments = tuple(sorted([x for x in path_segments if x.kind != "pause"] + pauses, key=lambda x: x.take_start))
    alignment = replace(alignment, segments=segments)
    if warn and confidence < MISMATCH_CONFIDENCE:
        warnings.warn(
            f"the take matches the part {reference.part_name!r} ({reference.source or 'reference'}) poorly "
            f"(alignment confidence {confidence:.2f} < {MISMATCH_CONFIDENCE}); it may be another piece or "
            "another part: check the part selection",
            AlignmentWarning, stacklevel=2,
        )
    return alignment


def _validate_options(hop_length, coarse_factor, band_radius) -> None:
    if isinstance(hop_length, bool) or not isinstance(hop_length, (int, np.integer)) or hop_length < 16:
        raise ValueError(f"hop_length must be an integer number of samples >= 16, got {hop_length!r}")
    if not isinstance(coarse_factor, (int, np.integer)) or not 1 <= coarse_factor <= 64:
        raise ValueError(f"coarse_factor must be an integer in range 1..64, got {coarse_factor!r}")
    if not band_radius > 0:
        raise ValueError(f"band_radius must be a positive number of seconds, got {band_radius!r}")


def _pooled_take(take, factor: int):
    t_chroma, t_onset, t_sounding = take
    return (pool(t_chroma, factor, how="sum"), pool(t_onset, factor, how="max"),
            pool(t_sounding[:, None].astype(float), factor, how="max")[:, 0])


def _pooled_path(factor, score_chroma, score_onset, take, *, frame_rate, onset_weight):
    """Full-matrix path on frames ``factor`` times longer; (rows, cols, mean chroma similarity)."""
    sc, so = pool(score_chroma, factor, how="sum"), pool(score_onset, factor, how="max")
    tc, to, ts = take
    m_rows, m_cols = sc.shape[0], tc.shape[0]
    rows, cols, _ = dtw(sc, so, tc, to, ts, np.zeros(m_cols, dtype=int), np.full(m_cols, m_rows),
                        frame_rate=frame_rate / factor, onset_weight=onset_weight)
    return rows, cols, _path_similarity(sc, tc, rows, cols)


def _similarities(score, take, coarse_take, coarse_factor, sim_coarse, *, frame_rate, onset_weight):
    """Path similarity of the part, and the best of the part transposed by 1..11 semitones.

    A rolled chroma is an exact transposition; each is aligned by the same programme on
    frames of at most ``confidence_frames`` per take so that the twelve passes stay cheap.
    """
    s_chroma, s_onset, _ = score
    n_cols = take[0].shape[0]
    factor = max(coarse_factor, int(np.ceil(n_cols / SETTINGS.confidence_frames)))
    conf_take = coarse_take if factor == coarse_factor else _pooled_take(take, factor)
    kw = dict(frame_rate=frame_rate, onset_weight=onset_weight)
    sims = [sim_coarse if factor == coarse_factor else _pooled_path(factor, s_chroma, s_onset, conf_take, **kw)[2]]
    for k in range(1, 12):
        sims.append(_pooled_path(factor, np.roll(s_chroma, k, axis=1), np.roll(s_onset, k, axis=1), conf_take, **kw)[2])
    return float(sims[0]), float(max(sims[1:]))


def _fine_path(score, take, rows_c, cols_c, coarse_factor, *, frame_rate, band_radius, onset_weight):
    """The path at the full frame rate inside a band around the coarse path."""
    if rows_c.size < 2:
        return rows_c, cols_c
    s_chroma, s_onset, _ = score
    t_chroma, t_onset, t_sounding = take
    n_rows, n_cols = s_chroma.shape[0], t_chroma.shape[0]
    radius = int(round(band_radius * frame_rate))
    lo, hi = band_from_path(rows_c, cols_c, coarse_factor, n_rows, n_cols, radius)
    # at the full frame rate, jumps and the end are searched only near the coarse path's
    near = np.zeros(-(-n_cols // coarse_factor), dtype=bool)
    for c in np.r_[cols_c[1:][np.diff(rows_c) < 0], cols_c[-1]]:
        near[max(c - 2, 0):c + 3] = True
    near_fine = near[np.arange(n_cols) // coarse_factor]
    near_end = np.zeros_like(near)
    near_end[max(cols_c[-1] - 2, 0):] = True
    rows, cols, _ = dtw(s_chroma, s_onset, t_chroma, t_onset, t_sounding.astype(float), lo, hi,
                        frame_rate=frame_rate, onset_weight=onset_weight, allow_jump=near_fine,
                        allow_end=near_end[np.arange(n_cols) // coarse_factor])
    return rows, cols
