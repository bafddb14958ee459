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

5. **Confidence.** The mean chroma similarity along the path is compared with
   that of the best path against the part transposed by a tritone (a
   same-rhythm, wrong-pitch reference aligned by the same programme):
   ``confidence = clip((s_path - s_null) / (1 - s_null) * 2, 0, 1)``. Below
   :data:`MISMATCH_CONFIDENCE` :func:`align_reference` warns with
   :class:`AlignmentWarning`.

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
from dataclasses import dataclass, field

import numpy as np
from scipy.ndimage import convolve1d, maximum_filter1d

from .audio import validate_audio
from .score import Reference, validate_reference

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

MISMATCH_CONFIDENCE = 0.3
MIN_PAUSE_SECONDS = 0.5
PAUSE_COST = 0.1
JUMP_SECONDS = 0.5
UNALIGNED_COST = 0.5
SKIP_COST = 1.2
LOWEST_PITCH, HIGHEST_PITCH = 21, 108
_SILENCE_DB = -40.0
_COMPRESSION = 100.0
_ONSET_DECAY_SECONDS = 0.2
_LOCAL_NORM_SECONDS = 1.0
_ENVELOPE_SECONDS = 1.5
_LANDING_SECONDS = 0.1


class AlignmentWarning(UserWarning):
    """The take may not be a performance of the reference part (low alignment confidence)."""


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


@dataclass(frozen=True)
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
        Mean chroma similarity along the path, and along the path found for the
        tritone-transposed part (see the module docstring).
    """

    score_times: np.ndarray
    take_times: np.ndarray
    confidence: float
    segments: tuple = ()
    hop_length: int = 512
    sr: int = 22050
    similarity: float = float("nan")
    null_similarity: float = float("nan")
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
            lead = np.minimum(_LANDING_SECONDS, s[landings])
            s = np.insert(s, landings, s[landings] - lead)
            t = np.insert(t, landings, t[landings] - lead)
        # the last pass over each score time: walk back from the end, keep new minima
        keep = np.zeros(s.size, dtype=bool)
        low = np.inf
        for k in range(s.size - 1, -1, -1):
            if s[k] < low - 1e-12:
                keep[k] = True
                low = s[k]
            elif s[k] == low:
                keep[k] = True  # same score time reached earlier in a pause: the first arrival wins
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


# --------------------------------------------------------------------------
# features
# --------------------------------------------------------------------------
def _default_hop(sr: int) -> int:
    """The power of two closest to 23 ms at ``sr`` (512 at 22050 Hz)."""
    return int(2 ** round(np.log2(0.0232 * sr)))


def _semitone_filterbank(sr: int, n_fft: int) -> np.ndarray:
    """Triangular weights (n_pitches, n_bins) from FFT bins to MIDI pitches 21..108 (A4 = 440 Hz, ISO 16)."""
    freqs = np.arange(n_fft // 2 + 1) * sr / n_fft
    with np.errstate(divide="ignore"):
        midi = 69.0 + 12.0 * np.log2(np.maximum(freqs, 1e-6) / 440.0)
    pitches = np.arange(LOWEST_PITCH, HIGHEST_PITCH + 1)[:, None]
    fb = np.maximum(0.0, 1.0 - np.abs(midi[None, :] - pitches))
    fb[:, freqs < 20.0] = 0.0
    return fb.astype(np.float32)


def _pitch_energy(y: np.ndarray, sr: int, *, n_fft: int, hop_length: int, block: int = 1024) -> np.ndarray:
    """Power per MIDI pitch (n_pitches, n_frames), centred frames, computed in blocks to bound memory."""
    fb = _semitone_filterbank(sr, n_fft)
    window = np.hanning(n_fft + 1)[:-1].astype(np.float32)
    y_pad = np.pad(y.astype(np.float32, copy=False), n_fft // 2)
    n_frames = 1 + len(y) // hop_length
    need = (n_frames - 1) * hop_length + n_fft
    if y_pad.size < need:
        y_pad = np.pad(y_pad, (0, need - y_pad.size))
    out = np.empty((fb.shape[0], n_frames), dtype=np.float32)
    for start in range(0, n_frames, block):
        stop = min(start + block, n_frames)
        idx = np.arange(start, stop)[:, None] * hop_length + np.arange(n_fft)[None, :]
        frames = y_pad[idx] * window
        spec = np.fft.rfft(frames, axis=1)
        power = (spec.real**2 + spec.imag**2).astype(np.float32)
        out[:, start:stop] = fb @ power.T
    return out


def _render_reference(reference: Reference, sr: int, hop_length: int, n_frames: int, n_ffts: tuple[int, ...],
                       *, transpose: int = 0) -> list[np.ndarray]:
    """Pitch energy of the part from harmonic templates, one array per analysis window length."""
    sub = 4
    dt = hop_length / sr / sub
    n_sub = n_frames * sub
    pitches = np.arange(LOWEST_PITCH, HIGHEST_PITCH + 1)
    energy = np.zeros((pitches.size, n_sub), dtype=np.float32)
    release = 0.1
    for note in reference.notes:
        start = int(round(note.onset / dt))
        stop = min(int(round((note.offset + 3 * release) / dt)), n_sub)
        if start >= n_sub or stop <= start:
            continue
        t = np.arange(stop - start) * dt
        env = np.exp(-t / _ENVELOPE_SECONDS)
        held = note.offset - note.onset
        env = np.where(t > held, env * np.exp(-(t - held) / release), env).astype(np.float32)
        for h in range(1, 9):
            p = note.pitch + transpose + 12.0 * np.log2(h)
            k = p - LOWEST_PITCH
            k0 = int(np.floor(k))
            frac = k - k0
            for kk, w in ((k0, 1.0 - frac), (k0 + 1, frac)):
                if 0 <= kk < pitches.size and w > 0:
                    energy[kk, start:stop] += np.float32(w / h) * env
    out = []
    for n_fft in n_ffts:
        taps = max(int(round(n_fft / (hop_length / sub))), 1)
        kernel = np.hanning(taps + 2)[1:-1] ** 2
        kernel /= kernel.sum()
        smooth = convolve1d(energy, kernel.astype(np.float32), axis=1, mode="constant")
        out.append(np.ascontiguousarray(smooth[:, ::sub][:, :n_frames]))
    return out


def _chroma_and_onsets(energy_chroma: np.ndarray, energy_onset: np.ndarray, frame_rate: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Chroma (n_frames, 12), decaying onset chroma (n_frames, 12) and a sounding mask (n_frames,)."""
    n_frames = energy_chroma.shape[1]
    total = energy_chroma.sum(axis=0)
    ref = float(np.percentile(total, 99)) if total.size else 0.0
    if ref <= 0:
        ref = 1.0
    sounding = total > ref * 10 ** (_SILENCE_DB / 10)
    folded = np.zeros((12, n_frames), dtype=np.float32)
    logc = np.log1p(_COMPRESSION * energy_chroma / ref)
    for c in range(12):
        folded[c] = logc[(np.arange(logc.shape[0]) + LOWEST_PITCH) % 12 == c].sum(axis=0)
    norm = np.linalg.norm(folded, axis=0)
    chroma = np.where(sounding[None, :] & (norm[None, :] > 0), folded / np.maximum(norm, 1e-12)[None, :],
                      np.float32(1 / np.sqrt(12)))

    total_o = energy_onset.sum(axis=0)
    ref_o = float(np.percentile(total_o, 99)) if total_o.size else 0.0
    if ref_o <= 0:
        ref_o = 1.0
    logo = np.log1p(_COMPRESSION * energy_onset / ref_o)
    rise = np.maximum(0.0, np.diff(logo, axis=1, prepend=logo[:, :1]))
    onset = np.zeros((12, n_frames), dtype=np.float32)
    for c in range(12):
        onset[c] = rise[(np.arange(rise.shape[0]) + LOWEST_PITCH) % 12 == c].sum(axis=0)
    onorm = np.linalg.norm(onset, axis=0)
    local = maximum_filter1d(onorm, size=max(3, int(2 * _LOCAL_NORM_SECONDS * frame_rate) | 1))
    floor = 0.05 * float(np.percentile(onorm, 99)) if onorm.size else 0.0
    onset = onset / np.maximum(local, max(floor, 1e-12))[None, :]
    n_decay = max(2, int(round(_ONSET_DECAY_SECONDS * frame_rate)))
    weights = np.sqrt(np.linspace(1.0, 0.0, n_decay, endpoint=False))
    decayed = onset.copy()
    for k in range(1, n_decay):
        decayed[:, k:] = np.maximum(decayed[:, k:], onset[:, :-k] * weights[k])
    return np.ascontiguousarray(chroma.T, dtype=np.float32), np.ascontiguousarray(decayed.T, dtype=np.float32), sounding


def take_features(y: np.ndarray, sr: int, *, hop_length: int | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Chroma (n_frames, 12), decaying onset chroma (n_frames, 12) and sounding mask of a take.

    Frame ``n`` is centred on ``n * hop_length / sr`` seconds.
    """
    hop_length = hop_length or _default_hop(sr)
    n_fft_chroma = 8 * hop_length
    n_fft_onset = 4 * hop_length
    e_chroma = _pitch_energy(y, sr, n_fft=n_fft_chroma, hop_length=hop_length)
    e_onset = _pitch_energy(y, sr, n_fft=n_fft_onset, hop_length=hop_length)
    return _chroma_and_onsets(e_chroma, e_onset, sr / hop_length)


def reference_features(reference: Reference, sr: int, *, hop_length: int | None = None,
                       transpose: int = 0) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The same features as :func:`take_features`, rendered from the part's notes at the written tempo."""
    hop_length = hop_length or _default_hop(sr)
    end = max(n.offset for n in reference.notes) + 0.3
    n_frames = int(np.ceil(end * sr / hop_length)) + 1
    e_chroma, e_onset = _render_reference(reference, sr, hop_length, n_frames, (8 * hop_length, 4 * hop_length),
                                          transpose=transpose)
    return _chroma_and_onsets(e_chroma, e_onset, sr / hop_length)


# --------------------------------------------------------------------------
# dynamic programming
# --------------------------------------------------------------------------
_START, _DIAG, _FAST, _SLOW, _PAUSE, _JUMP = range(6)


def _pool(features: np.ndarray, factor: int, *, how: str) -> np.ndarray:
    n = features.shape[0]
    m = -(-n // factor)
    pad = np.concatenate([features, np.repeat(features[-1:], m * factor - n, axis=0)]) if m * factor > n else features
    blocks = pad.reshape(m, factor, -1)
    if how == "max":
        return blocks.max(axis=1)
    pooled = blocks.sum(axis=1)
    return pooled / np.maximum(np.linalg.norm(pooled, axis=1, keepdims=True), 1e-12)


def _dtw(score_chroma, score_onset, take_chroma, take_onset, take_sounding, lo, hi, *, frame_rate: float,
         onset_weight: float = 1.0) -> tuple[np.ndarray, np.ndarray, float]:
    """Banded DTW with pauses, jumps back and free ends; returns (rows, cols, total cost).

    ``lo[j]:hi[j]`` are the score rows allowed at take column ``j``.
    """
    n_rows = score_chroma.shape[0]
    n_cols = take_chroma.shape[0]
    inf = np.float64(np.inf)
    jump_penalty = JUMP_SECONDS * frame_rate
    pre = np.concatenate([[0.0], np.cumsum(UNALIGNED_COST * take_sounding)[:-1]])
    post = (UNALIGNED_COST * take_sounding)[::-1].cumsum()[::-1] - UNALIGNED_COST * take_sounding
    skip_before = SKIP_COST * np.arange(n_rows, dtype=float)
    skip_after = SKIP_COST * (n_rows - 1 - np.arange(n_rows, dtype=float))
    so_sq = (score_onset.astype(np.float64) ** 2).sum(axis=1)

    pad = 2
    prev1 = np.full(n_rows + pad, inf)
    prev2 = np.full(n_rows + pad, inf)
    cur = np.full(n_rows + pad, inf)
    band1 = (0, 0)
    band2 = (0, 0)
    codes: list[np.ndarray] = []
    sources: list[np.ndarray | None] = []
    best_end = (inf, -1, -1)
    for j in range(n_cols):
        l, h = int(lo[j]), int(hi[j])
        lc = l
        sc = score_chroma[lc:h]
        cost = 1.0 - sc @ take_chroma[j].astype(np.float64)
        t_on = take_onset[j].astype(np.float64)
        d2 = so_sq[lc:h] + t_on @ t_on - 2.0 * (score_onset[lc:h] @ t_on)
        cost = cost + onset_weight * np.sqrt(np.maximum(d2, 0.0))
        c = cost[l - lc:]
        rows = np.arange(l, h)
        idx = rows + pad
        best = pre[j] + skip_before[l:h] + c
        code = np.full(h - l, _START, dtype=np.int8)
        src = None
        if j >= 1:
            cand = prev1[idx - 1] + c
            better = cand < best
            best = np.where(better, cand, best)
            code[better] = _DIAG
            cand = prev1[idx - 2] + c
            better = cand < best
            best = np.where(better, cand, best)
            code[better] = _FAST
            cand = prev1[idx] + c + PAUSE_COST
            better = cand < best
            best = np.where(better, cand, best)
            code[better] = _PAUSE
            lp, hp = band1
            if hp > lp:
                vals = prev1[lp + pad:hp + pad]
                rev = vals[::-1]
                acc = np.minimum.accumulate(rev)
                marks = np.where(rev <= acc, np.arange(rev.size), 0)
                arg_rev = np.maximum.accumulate(marks)
                suffix_min = acc[::-1]
                suffix_arg = (rev.size - 1 - arg_rev)[::-1] + lp
                q = rows + 1 - lp
                valid = q < rev.size
                qc = np.clip(q, 0, rev.size - 1)
                cand = np.where(valid, suffix_min[qc], inf) + jump_penalty + c
                better = cand < best
                if better.any():
                    best = np.where(better, cand, best)
                    code[better] = _JUMP
                    src = np.where(better, suffix_arg[qc], -1).astype(np.int32)
        if j >= 2:
            cand = prev2[idx - 1] + 2.0 * c
            better = cand < best
            best = np.where(better, cand, best)
            code[better] = _SLOW
        # roll the column buffers, clearing only the band that was written
        lp2, hp2 = band2
        prev2[lp2 + pad:hp2 + pad] = inf
        prev2, prev1, cur = prev1, cur, prev2
        band2, band1 = band1, (l, h)
        prev1[l + pad:h + pad] = best
        codes.append(code)
        sources.append(src)
        end_cost = best + skip_after[l:h] + post[j]
        k = int(np.argmin(end_cost))
        if end_cost[k] < best_end[0]:
            best_end = (float(end_cost[k]), l + k, j)
        # prev2 now holds garbage from two columns ago only inside band2, cleared next time
    total, i, j = best_end
    if not np.isfinite(total):
        return np.zeros(0, dtype=int), np.zeros(0, dtype=int), float("inf")
    rows_out, cols_out = [], []
    while True:
        rows_out.append(i)
        cols_out.append(j)
        l = int(lo[j])
        code = codes[j][i - l]
        if code == _START:
            break
        if code == _DIAG:
            i, j = i - 1, j - 1
        elif code == _FAST:
            i, j = i - 2, j - 1
        elif code == _SLOW:
            i, j = i - 1, j - 2
        elif code == _PAUSE:
            j = j - 1
        else:
            i, j = int(sources[j][i - l]), j - 1
    return np.array(rows_out[::-1]), np.array(cols_out[::-1]), total


def _band_from_path(rows_c, cols_c, factor: int, n_rows: int, n_cols: int, radius: int) -> tuple[np.ndarray, np.ndarray]:
    """Fine-resolution row band around a coarse path (``radius`` fine frames each side)."""
    n_cols_c = -(-n_cols // factor)
    low_c = np.full(n_cols_c, np.iinfo(np.int64).max)
    high_c = np.full(n_cols_c, -1)
    np.minimum.at(low_c, cols_c, rows_c)
    np.maximum.at(high_c, cols_c, rows_c)
    # columns the coarse path skipped ((1,2) steps, before its start, after its end) borrow from neighbours
    visited = high_c >= 0
    if not visited.any():
        return np.zeros(n_cols, dtype=int), np.full(n_cols, n_rows)
    pos = np.flatnonzero(visited)
    nearest_before = np.maximum.accumulate(np.where(visited, np.arange(n_cols_c), -1))
    nearest_after = np.minimum.accumulate(np.where(visited, np.arange(n_cols_c), n_cols_c)[::-1])[::-1]
    nb = np.where(nearest_before >= 0, nearest_before, pos[0])
    na = np.where(nearest_after < n_cols_c, nearest_after, pos[-1])
    low_c = np.minimum(low_c[nb], low_c[na])
    high_c = np.maximum(high_c[nb], high_c[na])
    # widen by one coarse column either side
    low_c = np.minimum(low_c, np.minimum(np.r_[low_c[1:], low_c[-1]], np.r_[low_c[0], low_c[:-1]]))
    high_c = np.maximum(high_c, np.maximum(np.r_[high_c[1:], high_c[-1]], np.r_[high_c[0], high_c[:-1]]))
    # outside the path's span (silence before and after) the path may start or end anywhere near its ends
    first, last = pos[0], pos[-1]
    low_c[:first] = 0
    high_c[last + 1:] = high_c[last]
    col_c = np.arange(n_cols) // factor
    lo = np.clip(low_c[col_c] * factor - radius, 0, n_rows)
    hi = np.clip((high_c[col_c] + 1) * factor + radius, 0, n_rows)
    hi = np.maximum(hi, lo + 1)
    return lo.astype(int), hi.astype(int)


def _path_similarity(score_chroma, take_chroma, rows, cols) -> float:
    if rows.size == 0:
        return 0.0
    return float(np.mean(np.sum(score_chroma[rows] * take_chroma[cols], axis=1)))


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
        Frames pooled for the first, full-matrix pass.
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
    if isinstance(hop_length, bool) or not isinstance(hop_length, (int, np.integer)) or hop_length < 16:
        raise ValueError(f"hop_length must be an integer number of samples >= 16, got {hop_length!r}")
    if not isinstance(coarse_factor, (int, np.integer)) or not 1 <= coarse_factor <= 64:
        raise ValueError(f"coarse_factor must be an integer in range 1..64, got {coarse_factor!r}")
    if not band_radius > 0:
        raise ValueError(f"band_radius must be a positive number of seconds, got {band_radius!r}")
    frame_rate = sr / hop_length

    t_chroma, t_onset, t_sounding = take_features(y, sr, hop_length=hop_length)
    s_chroma, s_onset, _ = reference_features(reference, sr, hop_length=hop_length)
    n_rows, n_cols = s_chroma.shape[0], t_chroma.shape[0]

    def coarse_path(score_chroma, score_onset):
        sc, so = _pool(score_chroma, coarse_factor, how="sum"), _pool(score_onset, coarse_factor, how="max")
        tc, to = _pool(t_chroma, coarse_factor, how="sum"), _pool(t_onset, coarse_factor, how="max")
        ts = _pool(t_sounding[:, None].astype(float), coarse_factor, how="max")[:, 0]
        m_rows, m_cols = sc.shape[0], tc.shape[0]
        rows, cols, _ = _dtw(sc, so, tc, to, ts, np.zeros(m_cols, dtype=int), np.full(m_cols, m_rows),
                             frame_rate=frame_rate / coarse_factor, onset_weight=onset_weight)
        return rows, cols, _path_similarity(sc, tc, rows, cols)

    rows_c, cols_c, sim_coarse = coarse_path(s_chroma, s_onset)
    null_chroma, null_onset, _ = reference_features(reference, sr, hop_length=hop_length, transpose=6)
    _, _, sim_null = coarse_path(null_chroma, null_onset)

    if rows_c.size >= 2:
        radius = int(round(band_radius * frame_rate))
        lo, hi = _band_from_path(rows_c, cols_c, coarse_factor, n_rows, n_cols, radius)
        rows, cols, _ = _dtw(s_chroma, s_onset, t_chroma, t_onset, t_sounding.astype(float), lo, hi,
                             frame_rate=frame_rate, onset_weight=onset_weight)
    else:
        rows, cols = rows_c, cols_c
    if rows.size < 2:
        # nothing aligned: fall back to the written tempo from the start of the take
        rows = np.array([0, n_rows - 1])
        cols = np.array([0, n_rows - 1])
        confidence = 0.0
    else:
        confidence = float(np.clip((sim_coarse - sim_null) / max(1.0 - sim_null, 1e-6) * 2.0, 0.0, 1.0))
    frame_seconds = hop_length / sr
    alignment = Alignment(
        score_times=rows * frame_seconds, take_times=cols * frame_seconds, confidence=confidence,
        segments=_segments(rows, cols, frame_seconds), hop_length=int(hop_length), sr=int(sr),
        similarity=sim_coarse, null_similarity=sim_null,
    )
    if warn and confidence < MISMATCH_CONFIDENCE:
        warnings.warn(
            f"the take matches the part {reference.part_name!r} ({reference.source or 'reference'}) poorly "
            f"(alignment confidence {confidence:.2f} < {MISMATCH_CONFIDENCE}); it may be another piece or "
            "another part: check the part selection",
            AlignmentWarning, stacklevel=2,
        )
    return alignment
