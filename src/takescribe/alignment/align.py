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
import scipy.fft
import scipy.sparse
from scipy.ndimage import maximum_filter1d

from ..audio.load import frames_segment, release_samples, validate_audio
from ..reference.part import Reference, validate_reference

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
UNALIGNED_COST = 1.5
SKIP_COST = 0.25
LOWEST_PITCH, HIGHEST_PITCH = 21, 108
_SILENCE_DB = -40.0
_COMPRESSION = 100.0
_ONSET_DECAY_SECONDS = 0.2
_LOCAL_NORM_SECONDS = 1.0
_ENVELOPE_SECONDS = 1.5
_LANDING_SECONDS = 0.1
_NOISE_MARGIN = 4.0  # 6 dB in power
_COVERAGE_FULL = 0.75
_MAX_COARSE_CELLS = 16_000_000
_CONFIDENCE_FRAMES = 1000
_CONFIDENCE_GAIN = 2.0


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


def _pitch_energy(y: np.ndarray, sr: int, *, n_fft: int, hop_length: int, block: int = 512) -> np.ndarray:
    """Power per MIDI pitch (n_pitches, n_frames), centred frames, computed in blocks to bound memory."""
    fb = _semitone_filterbank(sr, n_fft)
    used = int(np.flatnonzero(fb.any(axis=0)).max()) + 1  # bins above the highest pitch are not needed
    fb_sparse = scipy.sparse.csr_matrix(fb[:, :used])
    window = np.hanning(n_fft + 1)[:-1].astype(np.float32)
    n_frames = 1 + len(y) // hop_length
    out = np.empty((fb.shape[0], n_frames), dtype=np.float32)
    for start in range(0, n_frames, block):
        stop = min(start + block, n_frames)
        segment = frames_segment(y, start, stop, hop_length=hop_length, n_fft=n_fft)
        frames = np.lib.stride_tricks.sliding_window_view(segment, n_fft)[::hop_length]
        spec = scipy.fft.rfft(frames * window, axis=1, workers=-1)[:, :used]
        power = np.square(spec.real) + np.square(spec.imag)
        out[:, start:stop] = (fb_sparse @ power.T).astype(np.float32)
    release_samples(y)
    return out


def _render_reference(reference: Reference, sr: int, hop_length: int, n_frames: int,
                      n_ffts: tuple[int, ...], *, block_frames: int = 4096) -> list[np.ndarray]:
    """Pitch energy of the part from harmonic templates, one array per analysis window length.

    Each note is an envelope (exponential decay while held, fast release after) on a grid
    four times finer than the frames, spread over the pitches of its first eight partials;
    the sum is smoothed with the squared analysis window (the time response of a power
    spectrogram) and sampled at the frame centres. The fine grid is built ``block_frames``
    frames at a time (with the window's reach on each side), so memory does not grow
    with the length of the part beyond the result itself.
    """
    sub = 4
    dt = hop_length / sr / sub
    n_sub = n_frames * sub
    n_pitches = HIGHEST_PITCH - LOWEST_PITCH + 1
    release = 0.1
    harmonics = np.arange(1, 9)
    # each note's span on the fine grid and its weight per pitch row
    spans, note_rows, note_weights, helds = [], [], [], []
    for note in reference.notes:
        start = int(round(note.onset / dt))
        stop = min(int(round((note.offset + 3 * release) / dt)), n_sub)
        weights = np.zeros(n_pitches, dtype=np.float32)
        position = note.pitch + 12.0 * np.log2(harmonics) - LOWEST_PITCH
        low = np.floor(position).astype(int)
        frac = position - low
        for bins, share in ((low, 1.0 - frac), (low + 1, frac)):
            ok = (bins >= 0) & (bins < n_pitches)
            np.add.at(weights, bins[ok], (share / harmonics)[ok])
        rows = np.flatnonzero(weights)
        spans.append((start, stop) if start < n_sub and stop > start else (0, 0))
        note_rows.append(rows)
        note_weights.append(weights[rows, None])
        helds.append(note.offset - note.onset)
    starts = np.array([a for a, _ in spans], dtype=np.int64)
    stops = np.array([b for _, b in spans], dtype=np.int64)
    kernels = []
    for n_fft in n_ffts:
        # smoothing with the squared window, evaluated only at the frame centres
        taps = max(int(round(n_fft / (hop_length / sub))), 1)
        kernel = np.hanning(taps + 2)[1:-1] ** 2
        kernel /= kernel.sum()
        kernels.append((kernel, taps // 2))
    before = max(half for _, half in kernels)
    after = max(len(kernel) - half for kernel, half in kernels)
    out = [np.zeros((n_pitches, n_frames), dtype=np.float32) for _ in n_ffts]
    for a in range(0, n_frames, block_frames):
        b = min(a + block_frames, n_frames)
        lo, hi = a * sub - before, (b - 1) * sub + after + 1
        energy = np.zeros((n_pitches, hi - lo), dtype=np.float32)
        for i in np.flatnonzero((starts < hi) & (stops > lo) & (stops > starts)):
            s0, s1 = max(starts[i], lo), min(stops[i], hi)
            t = np.arange(s0 - starts[i], s1 - starts[i]) * dt
            held = helds[i]
            env = (np.exp(-t / _ENVELOPE_SECONDS) * np.where(t > held, np.exp(-(t - held) / release), 1.0)
                   ).astype(np.float32)
            energy[note_rows[i], s0 - lo:s1 - lo] += note_weights[i] * env[None, :]
        for (kernel, half), smooth in zip(kernels, out):
            block = smooth[:, a:b]
            for k, w in enumerate(kernel):
                # frame n takes energy[n * sub + k - half] * kernel[k] (zero outside the part)
                first = a * sub + k - half - lo
                block += np.float32(w) * energy[:, first:first + (b - a) * sub:sub][:, :b - a]
    return out


def _chroma_and_onsets(energy_chroma: np.ndarray, energy_onset: np.ndarray, frame_rate: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Chroma (n_frames, 12), decaying onset chroma (n_frames, 12) and a sounding mask (n_frames,).

    A frame sounds when it is within 40 dB of the loud frames (else its chroma is the
    uniform "rest" vector). When the quietest frames (5th percentile) lie at least
    15 dB under the loud ones, they are taken as the noise floor of the room and frames
    less than 6 dB above it count as silence too, so steady noise before and after the
    playing is not mistaken for music.
    """
    n_frames = energy_chroma.shape[1]
    total = energy_chroma.sum(axis=0)
    ref = float(np.percentile(total, 99)) if total.size else 0.0
    if ref <= 0:
        ref = 1.0
    sounding = total > ref * 10 ** (_SILENCE_DB / 10)
    classes = [(np.arange(energy_chroma.shape[0]) + LOWEST_PITCH) % 12 == c for c in range(12)]
    step = 8192  # frames at a time: the compressed energies never exist for the whole take at once
    folded = np.zeros((12, n_frames), dtype=np.float32)
    for a in range(0, n_frames, step):
        logc = np.log1p(_COMPRESSION * energy_chroma[:, a:a + step] / ref)
        for c in range(12):
            folded[c, a:a + step] = logc[classes[c]].sum(axis=0)
    norm = np.linalg.norm(folded, axis=0)
    chroma = np.where(sounding[None, :] & (norm[None, :] > 0), folded / np.maximum(norm, 1e-12)[None, :],
                      np.float32(1 / np.sqrt(12)))

    total_o = energy_onset.sum(axis=0)
    ref_o = float(np.percentile(total_o, 99)) if total_o.size else 0.0
    if ref_o <= 0:
        ref_o = 1.0
    onset = np.zeros((12, n_frames), dtype=np.float32)
    previous = 0.0  # sound at frame 0 is an onset
    for a in range(0, n_frames, step):
        logo = np.log1p(_COMPRESSION * energy_onset[:, a:a + step] / ref_o)
        rise = np.maximum(0.0, np.diff(logo, axis=1, prepend=previous))
        previous = logo[:, -1:]
        for c in range(12):
            onset[c, a:a + step] = rise[classes[c]].sum(axis=0)
    onorm = np.linalg.norm(onset, axis=0)
    local = maximum_filter1d(onorm, size=max(3, int(2 * _LOCAL_NORM_SECONDS * frame_rate) | 1))
    floor = 0.05 * float(np.percentile(onorm, 99)) if onorm.size else 0.0
    onset = onset / np.maximum(local, max(floor, 1e-12))[None, :]
    n_decay = max(2, int(round(_ONSET_DECAY_SECONDS * frame_rate)))
    weights = np.sqrt(np.linspace(1.0, 0.0, n_decay, endpoint=False))
    decayed = onset.copy()
    for k in range(1, n_decay):
        decayed[:, k:] = np.maximum(decayed[:, k:], onset[:, :-k] * weights[k])
    floor = float(np.percentile(total, 5))
    above_floor = total > _NOISE_MARGIN * floor if floor < ref * 10 ** (-15 / 10) else np.ones_like(sounding)
    return (np.ascontiguousarray(chroma.T, dtype=np.float32), np.ascontiguousarray(decayed.T, dtype=np.float32),
            sounding & above_floor)


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


def reference_features(reference: Reference, sr: int, *,
                       hop_length: int | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The same features as :func:`take_features`, rendered from the part's notes at the written tempo."""
    hop_length = hop_length or _default_hop(sr)
    end = max(n.offset for n in reference.notes) + 0.3
    n_frames = int(np.ceil(end * sr / hop_length)) + 1
    e_chroma, e_onset = _render_reference(reference, sr, hop_length, n_frames, (8 * hop_length, 4 * hop_length))
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


def _landing_cost(score_onset: np.ndarray, jump_penalty: float) -> np.ndarray:
    """Extra jump cost per score frame: none on a note onset, half the jump penalty elsewhere.

    A player who goes back starts again on a note, so a jump should land on an onset.
    """
    norm = np.linalg.norm(score_onset, axis=1)
    rise = np.clip(np.diff(norm, prepend=0.0), 0.0, None)
    rise = maximum_filter1d(rise, size=3) / max(float(rise.max()), 1e-12)
    return 0.5 * jump_penalty * (1.0 - np.clip(rise * 2.0, 0.0, 1.0))


def _dtw(score_chroma, score_onset, take_chroma, take_onset, take_sounding, lo, hi, *, frame_rate: float,
         onset_weight: float = 1.0, block: int = 256, allow_jump: np.ndarray | None = None,
         allow_end: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray, float]:
    """Banded DTW with pauses, jumps back and free ends; returns (rows, cols, total cost).

    ``lo[j]:hi[j]`` are the score rows allowed at take column ``j``; ``allow_jump[j]`` and
    ``allow_end[j]`` (default everywhere) say where a jump back may arrive and where the
    path may end (the fine pass allows them only near the coarse path's). Costs are
    computed a block of columns at a time (one matrix product per block), so
    memory stays proportional to the band.
    """
    n_rows = score_chroma.shape[0]
    n_cols = take_chroma.shape[0]
    inf = np.inf
    jump_penalty = JUMP_SECONDS * frame_rate
    sounding = np.asarray(take_sounding, dtype=float)
    pre = np.concatenate([[0.0], np.cumsum(UNALIGNED_COST * sounding)[:-1]])
    post = (UNALIGNED_COST * sounding)[::-1].cumsum()[::-1] - UNALIGNED_COST * sounding
    skip_before = SKIP_COST * np.arange(n_rows, dtype=float)
    skip_after = SKIP_COST * (n_rows - 1 - np.arange(n_rows, dtype=float))
    s_chroma = score_chroma.astype(np.float64)
    s_onset = score_onset.astype(np.float64)
    so_sq = (s_onset**2).sum(axis=1)
    landing = _landing_cost(s_onset, jump_penalty)

    pad = 2
    prev1 = np.full(n_rows + pad, inf)
    prev2 = np.full(n_rows + pad, inf)
    band1 = (0, 0)
    band2 = (0, 0)
    codes: list[np.ndarray] = []
    sources: dict[int, np.ndarray] = {}  # jump columns: record rows of the previous column
    best_end = (inf, -1, -1)
    cands = np.empty((6, n_rows))
    positions = np.arange(n_rows)
    if allow_jump is None:
        allow_jump = np.ones(n_cols, dtype=bool)
    if allow_end is None:
        allow_end = np.ones(n_cols, dtype=bool)
    block_cost = None
    block_lo = 0
    for j in range(n_cols):
        if j % block == 0:
            stop = min(j + block, n_cols)
            block_lo = int(lo[j:stop].min())
            block_hi = int(hi[j:stop].max())
            tc = take_chroma[j:stop].astype(np.float64)
            to = take_onset[j:stop].astype(np.float64)
            cross = s_onset[block_lo:block_hi] @ to.T
            dist = so_sq[block_lo:block_hi, None] + (to**2).sum(axis=1)[None, :] - 2.0 * cross
            block_cost = (1.0 - s_chroma[block_lo:block_hi] @ tc.T) + onset_weight * np.sqrt(np.maximum(dist, 0.0))
            block_cost = np.ascontiguousarray(block_cost.T)
        l, h = int(lo[j]), int(hi[j])
        n = h - l
        c = block_cost[j % block, l - block_lo:h - block_lo]
        cand = cands[:, :n]
        np.add(pre[j] + skip_before[l:h], c, out=cand[_START])
        if j < 2:
            cand[_DIAG:] = inf
        if j >= 1:
            np.add(prev1[l + pad - 1:h + pad - 1], c, out=cand[_DIAG])
            np.add(prev1[l + pad - 2:h + pad - 2], c, out=cand[_FAST])
            np.add(prev1[l + pad:h + pad], c + PAUSE_COST, out=cand[_PAUSE])
            lp, hp = band1
            if hp > lp and allow_jump[j]:
                vals = prev1[lp + pad:hp + pad]
                rev = vals[::-1]
                acc = np.minimum.accumulate(rev)
                q = np.clip(np.arange(l + 1, h + 1) - lp, 0, None)
                valid = q < rev.size
                suffix_min = acc[::-1]
                qc = np.minimum(q, rev.size - 1)
                cand[_JUMP] = np.where(valid, suffix_min[qc], inf) + (jump_penalty + c) + landing[l:h]
            else:
                cand[_JUMP] = inf
        if j >= 2:
            cand[_SLOW] = prev2[l + pad - 1:h + pad - 1] + 2.0 * c
        code = np.argmin(cand, axis=0).astype(np.int8)
        best = cand[code, positions[:n]]
        if j >= 1 and band1[1] > band1[0] and allow_jump[j]:
            jumped = code == _JUMP
            if jumped.any():
                lp, hp = band1
                vals = prev1[lp + pad:hp + pad]
                # the minimum of vals[p:] sits at the first "record from the end" at or after p
                # (a value <= every later one); records are few, so they are all we keep
                rev = vals[::-1]
                acc = np.minimum.accumulate(rev)
                records = (rev.size - 1 - np.flatnonzero(rev <= acc))[::-1].astype(np.int32) + lp
                sources[j] = records
        # roll the column buffers, clearing only the band that was written two columns ago
        lp2, hp2 = band2
        prev2[lp2 + pad:hp2 + pad] = inf
        prev2, prev1 = prev1, prev2
        band2, band1 = band1, (l, h)
        prev1[l + pad:h + pad] = best
        codes.append(code)
        if allow_end[j]:
            end_cost = best + skip_after[l:h] + post[j]
            k = int(np.argmin(end_cost))
            if end_cost[k] < best_end[0]:
                best_end = (float(end_cost[k]), l + k, j)
    total, i, j = best_end
    if not np.isfinite(total):
        return np.zeros(0, dtype=int), np.zeros(0, dtype=int), float("inf")
    rows_out, cols_out = [], []
    while True:
        rows_out.append(i)
        cols_out.append(j)
        code = codes[j][i - int(lo[j])]
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
            records = sources[j]
            i, j = int(records[np.searchsorted(records, i + 1)]), j - 1
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


def _confidence(similarity: float, null_similarity: float) -> float:
    """Map the path similarity and the best transposed similarity to 0..1.

    ``(s - s_null) / (1 - s_null)`` is the share of the distance to a perfect match that the
    true part gains over the best wrong transposition; :data:`_CONFIDENCE_GAIN` scales it so
    that a clear match saturates at 1.
    """
    gain = (similarity - null_similarity) / max(1.0 - null_similarity, 1e-6)
    return float(np.clip(gain * _CONFIDENCE_GAIN, 0.0, 1.0))


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

        neighbours = np.r_[ratio[max(0, k - 4):k], ratio[k + 1:k + 5]]
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

    def pooled_path(factor, score_chroma, score_onset, take):
        sc, so = _pool(score_chroma, factor, how="sum"), _pool(score_onset, factor, how="max")
        tc, to, ts = take
        m_rows, m_cols = sc.shape[0], tc.shape[0]
        rows, cols, _ = _dtw(sc, so, tc, to, ts, np.zeros(m_cols, dtype=int), np.full(m_cols, m_rows),
                             frame_rate=frame_rate / factor, onset_weight=onset_weight)
        return rows, cols, _path_similarity(sc, tc, rows, cols)

    def pooled_take(factor):
        return (_pool(t_chroma, factor, how="sum"), _pool(t_onset, factor, how="max"),
                _pool(t_sounding[:, None].astype(float), factor, how="max")[:, 0])

    # the full-matrix pass stays under _MAX_COARSE_CELLS cells however long the take and part
    coarse_factor = max(int(coarse_factor), int(np.ceil(np.sqrt(n_rows * n_cols / _MAX_COARSE_CELLS))))
    coarse_take = pooled_take(coarse_factor)
    rows_c, cols_c, sim_coarse = pooled_path(coarse_factor, s_chroma, s_onset, coarse_take)

    # confidence: the part against itself transposed by 1..11 semitones (a rolled chroma is an
    # exact transposition), each aligned by the same programme on frames of at most
    # _CONFIDENCE_FRAMES per take so that the twelve passes stay cheap
    factor = max(coarse_factor, int(np.ceil(n_cols / _CONFIDENCE_FRAMES)))
    conf_take = coarse_take if factor == coarse_factor else pooled_take(factor)
    sims = [sim_coarse if factor == coarse_factor else pooled_path(factor, s_chroma, s_onset, conf_take)[2]]
    for k in range(1, 12):
        sims.append(pooled_path(factor, np.roll(s_chroma, k, axis=1), np.roll(s_onset, k, axis=1), conf_take)[2])
    similarity, null_similarity = float(sims[0]), float(max(sims[1:]))

    if rows_c.size >= 2:
        radius = int(round(band_radius * frame_rate))
        lo, hi = _band_from_path(rows_c, cols_c, coarse_factor, n_rows, n_cols, radius)
        # at the full frame rate, jumps and the end are searched only near the coarse path's
        near = np.zeros(-(-n_cols // coarse_factor), dtype=bool)
        for c in np.r_[cols_c[1:][np.diff(rows_c) < 0], cols_c[-1]]:
            near[max(c - 2, 0):c + 3] = True
        near_fine = near[np.arange(n_cols) // coarse_factor]
        near_end = np.zeros_like(near)
        near_end[max(cols_c[-1] - 2, 0):] = True
        rows, cols, _ = _dtw(s_chroma, s_onset, t_chroma, t_onset, t_sounding.astype(float), lo, hi,
                             frame_rate=frame_rate, onset_weight=onset_weight, allow_jump=near_fine,
                             allow_end=near_end[np.arange(n_cols) // coarse_factor])
    else:
        rows, cols = rows_c, cols_c
    if rows.size < 2:
        # nothing aligned: fall back to the written tempo from the start of the take
        rows = np.array([0, n_rows - 1])
        cols = np.array([0, n_rows - 1])
        confidence = 0.0
    else:
        confidence = _confidence(similarity, null_similarity)
    sounding_total = max(int(t_sounding.sum()), 1)
    coverage = float(t_sounding[cols[0]:cols[-1] + 1].sum()) / sounding_total if rows.size >= 2 else 0.0
    # a path that explains only a small part of what was played is no evidence of a match
    confidence *= float(np.clip(coverage / _COVERAGE_FULL, 0.0, 1.0))
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
