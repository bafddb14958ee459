"""Long takes: transcription in overlapping blocks with memory that does not grow with the length.

Method
------
Once the dictionary is fixed, the KL factorization without continuity penalty is
local: every frame's activations depend only on that frame's spectrum. Blocks can
therefore be factorized one at a time and agree with a single pass, provided all
of them share

- the tuning (estimated once, on the first minute, as :func:`compute_spectrogram` does),
- the normalisation scale (the average frame sum of the whole take, from a first
  pass over the blocks that keeps only frame sums),
- the dictionary: the semi-learned adaptation runs **once**, on frames sampled
  evenly over the whole take (at most ``adapt_seconds`` worth), and the adapted
  templates serve every block,
- a frame-local start for H (each frame's energy spread over the templates) and a
  fixed number of iterations (no early stop, which would depend on the block),
- the note-tracking reference level (the largest activation of the whole take) and,
  for melodic settings, the onset-novelty peak and scale (the scale is the 99.5th
  percentile over the sampled frames rather than over every frame).

Blocks are ``block_seconds`` long plus ``overlap_seconds`` of context on each side
(the variable-Q filters are up to ~2 s long in the bass, so the context keeps the
spectrogram of the core identical to the unblocked one). Each block's activations
are kept on disk in a temporary folder (only the core frames); note tracking then
runs block by block on the core, ``overlap_seconds`` of left context and the whole
next core as right context, and a block **owns the notes whose onset lies in its
core**: a note crossing a block edge is taken from the block where it starts, with
its end found in the next block's activations. Nothing is duplicated or split at an
edge; a note sounding more than one block beyond its start is cut there.

Conventions
-----------
- ``y`` may be a take that :func:`takescribe.audio.load_audio` spilled to a file
  (``spill_seconds``): each block's samples are released from memory once its
  spectrogram is computed, so nothing here grows with the length of the take.
- Times in seconds from the start of the take; frames on the global grid
  (``HOP_LENGTH`` samples): block edges are whole frames, so a block's frame ``j``
  is the take's frame ``start + j``.
- The result is a :class:`takescribe.transcription.Transcription` whose
  ``spectrogram``, ``H`` and ``H_initial`` are ``None`` (holding them would make
  memory grow with the take); ``timings`` also gives ``n_blocks``.
- With a reference part, the score prior of one-pass transcription
  (:func:`takescribe.transcription.prior.part_prior`: mask, dual threshold, starts and
  repeats) is computed per block from the alignment of the whole take, and the "to check
  by ear" evidence (:func:`takescribe.transcription.evidence.faint_evidence`) is taken from
  each block's activations while they are at hand: ``Transcription.faint``.
"""

from __future__ import annotations

import dataclasses
import tempfile
import time
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np

from ..audio.load import release_samples
from ..errors import AudioWarning, InputError
from ..limits import LIMITS
from ..features.spectrogram import ANALYSIS_SR, HOP_LENGTH, compute_spectrogram, estimate_tuning
from ..notes import Note, sort_notes
from .blind import Transcription, initial_dictionary, noise_templates, track_notes
from .dictionary import Dictionary, adapt_dictionary
from .evidence import faint_evidence, restrikes
from .instruments import Instrument, resolve_instrument
from .nmf import decompose
from .prior import PartPrior, part_prior, prior_pitches
from .settings import SCORE_PRIOR, ScorePrior, TranscriptionSettings, settings_for
from .tracking import pitch_novelty

__all__ = ["transcribe_long", "block_layout", "validate_block_options", "LONG_TAKE_SECONDS"]

#: Takes longer than this (seconds) are transcribed in blocks by :func:`takescribe.jobs.pipeline.transcribe_take`.
LONG_TAKE_SECONDS = LIMITS.long_take_seconds


def validate_block_options(block_seconds: float, overlap_seconds: float, adapt_seconds: float) -> None:
    """Check the block options (positive block, overlap in [2, block) seconds)."""
    if not np.isfinite(block_seconds) or block_seconds <= 0:
        raise InputError(f"block_seconds must be > 0, got {block_seconds}")
    if not np.isfinite(overlap_seconds) or not 2.0 <= overlap_seconds:
        raise InputError(f"overlap_seconds must be >= 2 (the bass filters are ~2 s long), got {overlap_seconds}")
    if adapt_seconds <= 0:
        raise InputError(f"adapt_seconds must be > 0, got {adapt_seconds}")


def block_layout(n_frames: int, core_frames: int, context_frames: int) -> list[tuple[int, int, int, int]]:
    """Blocks on the frame grid: ``(start, core_start, core_stop, stop)`` each.

    Cores tile ``[0, n_frames)`` without gaps; ``start``/``stop`` add up to
    ``context_frames`` on each side.
    """
    blocks = []
    for core_start in range(0, max(n_frames, 1), max(core_frames, 1)):
        core_stop = min(core_start + core_frames, n_frames)
        blocks.append((max(core_start - context_frames, 0), core_start, core_stop,
                       min(core_stop + context_frames, n_frames)))
    return blocks


def _block_spectrogram(y: np.ndarray, sr: int, start: int, stop: int, tuning: float, hop: int):
    """Spectrogram of frames ``[start, stop)`` of the take, on the global frame grid."""
    # frames are centred: frame j of the segment is frame start + j of the take
    end = len(y) if stop == 1 + len(y) // hop else (stop - 1) * hop + 1
    segment = y[start * hop: end]
    spec = compute_spectrogram(segment, sr, hop_length=hop, tuning=tuning)
    return spec, spec.V[:, : stop - start]


def _frame_start(V: np.ndarray, W_colsum_mean: float, K: int) -> np.ndarray:
    """A frame-local start for H: each frame's energy spread evenly over the K templates."""
    energy = V.sum(axis=0, dtype=np.float64) / (K * max(W_colsum_mean, 1e-12))
    return np.repeat(np.maximum(energy, 1e-6).astype(V.dtype)[None, :], K, axis=0)


def _novelty(V: np.ndarray, W: np.ndarray, peak: float) -> np.ndarray:
    """Unscaled per-pitch onset novelty with the whole take's peak (the caller applies the scale)."""
    return pitch_novelty(V, W, peak=peak, scale=1.0)


@dataclass(frozen=True)
class _Plan:
    """What every pass over the blocks shares."""

    y: np.ndarray
    sr: int
    layout: list
    folder: Path
    preset: Instrument
    settings: TranscriptionSettings
    tuning: float
    stride: int
    context: int
    reference: object = None
    alignment: object = None
    pitches: np.ndarray | None = None
    prior: ScorePrior = SCORE_PRIOR
    hop: int = HOP_LENGTH

    @property
    def frame_seconds(self) -> float:
        return self.hop / self.sr

    @property
    def novelty(self) -> bool:
        """Onset novelty is kept: for tracking (melodic), or for the restrikes of struck notes (with a part)."""
        return self.settings.use_novelty or (self.reference is not None and self.preset.decaying)

    def part(self, frames: np.ndarray, rows: np.ndarray | None, *, hints: bool = True) -> PartPrior | None:
        """The part's prior for these take frames and template rows (None without a part)."""
        if self.reference is None:
            return None
        return part_prior(self.reference, self.alignment, self.pitches, frames * self.frame_seconds,
                          onset_threshold=self.settings.tracking.onset_threshold, prior=self.prior,
                          hints=hints).rows(rows)

    def sampled(self, core_start: int, core_stop: int) -> np.ndarray:
        """The frames of a core in the even sample over the whole take."""
        return np.arange(core_start + (-core_start) % self.stride, core_stop, self.stride)


@dataclass
class _Scan:
    """What the first pass learns: templates, the normalisation scale, peaks, an even sample of frames."""

    initial: Dictionary | None = None
    rows: np.ndarray | None = None
    total: float = 0.0
    v_peak: float = 0.0
    samples: list = dataclasses.field(default_factory=list)
    sample_masks: list = dataclasses.field(default_factory=list)


def _first_pass(plan: _Plan, dictionary: Dictionary | None, timings: dict) -> _Scan:
    """Spectrograms of every block (kept on disk), their sums and peaks, and the adaptation sample."""
    scan = _Scan()
    for b, (start, core_start, core_stop, stop) in enumerate(plan.layout):
        t0 = time.perf_counter()
        spec, V = _block_spectrogram(plan.y, plan.sr, start, stop, plan.tuning, plan.hop)
        release_samples(plan.y, start * plan.hop, stop * plan.hop)  # a take spilled to a file leaves memory again
        timings["spectrogram"] += time.perf_counter() - t0
        if scan.initial is None:
            scan.initial = initial_dictionary(spec, plan.preset, dictionary, plan.pitches)
            scan.rows = np.searchsorted(plan.pitches, scan.initial.pitches) if plan.pitches is not None else None
        Vc = V[:, core_start - start: core_stop - start]
        scan.total += float(Vc.sum(dtype=np.float64))
        scan.v_peak = max(scan.v_peak, float(Vc.max(initial=0.0)))
        np.save(plan.folder / f"V{b}.npy", V)
        picked = plan.sampled(core_start, core_stop)
        scan.samples.append(V[:, picked - start])
        if plan.reference is not None:
            scan.sample_masks.append(plan.part(picked, scan.rows, hints=False).mask)
    return scan


def _with_noise_rows(mask: np.ndarray | None, n_noise: int) -> np.ndarray | None:
    """The mask with rows of ones for the broadband templates."""
    if mask is None or not n_noise:
        return mask
    return np.vstack([mask, np.ones((n_noise, mask.shape[1]), mask.dtype)])


def _factorization_options(plan: _Plan) -> dict:
    """Fixed iterations, no early stop: every block does exactly the same work."""
    s = plan.settings
    return dict(beta=s.beta, n_iter=s.n_iter, tol=0.0, check_every=max(s.n_iter, 1), continuity=s.continuity,
                sparsity=s.sparsity, mask_penalty=plan.prior.mask_penalty if plan.reference is not None else 0.0)


def _adapt(plan: _Plan, scan: _Scan, inv_scale: np.float32, say) -> tuple[Dictionary, np.ndarray, np.ndarray]:
    """The one template adaptation, on the sampled frames: ``(adapted, W0, W1)`` with the noise columns."""
    s, initial = plan.settings, scan.initial
    K, n_noise = initial.n_pitches, s.noise_templates
    noise = noise_templates(initial.W.shape[0], n_noise)
    W0 = np.hstack([initial.W, noise]).astype(np.float32)
    adapted = initial
    if s.adapt:
        say("adapting templates on frames sampled over the whole take")
        Vs = np.hstack(scan.samples) * inv_scale
        ms = _with_noise_rows(np.hstack(scan.sample_masks), n_noise) if scan.sample_masks else None
        first = decompose(Vs, W0, H_init=_frame_start(Vs, float(W0.sum(axis=0).mean()), K + n_noise), mask=ms,
                          **_factorization_options(plan))
        V_pitched = np.maximum(Vs - noise @ first.H[K:], 0.0).astype(np.float32)
        adapted = adapt_dictionary(V_pitched, initial, first.H[:K], n_iter=s.adapt_iter, beta=s.beta,
                                   min_activation=s.adapt_min_activation)
    return adapted, W0, np.hstack([adapted.W, noise]).astype(np.float32)


def _second_pass(plan: _Plan, scan: _Scan, adapted: Dictionary, W0, W1, inv_scale, timings, say):
    """Factorize each block; keep its core activations (and onset novelty) on disk.

    Returns the largest activation of the take and the novelty's scale (0 without novelty).
    """
    K = scan.initial.n_pitches
    colsum0 = float(W0.sum(axis=0).mean())
    options = _factorization_options(plan)
    peak, novelty_sample = 0.0, []
    for b, (start, core_start, core_stop, stop) in enumerate(plan.layout):
        say(f"block {b + 1}/{len(plan.layout)}: factorization")
        t0 = time.perf_counter()
        V = np.load(plan.folder / f"V{b}.npy")
        V *= inv_scale
        timings["spectrogram"] += time.perf_counter() - t0
        t0 = time.perf_counter()
        part = plan.part(np.arange(start, stop), scan.rows, hints=False)
        mask = _with_noise_rows(None if part is None else part.mask, plan.settings.noise_templates)
        H = decompose(V, W0, H_init=_frame_start(V, colsum0, W0.shape[1]), mask=mask, **options).H
        if plan.settings.adapt:
            H = decompose(V, W1, H_init=H, mask=mask, **options).H
        core = slice(core_start - start, core_stop - start)
        Hc = np.ascontiguousarray(H[:K, core])
        peak = max(peak, float(Hc.max(initial=0.0)))
        np.save(plan.folder / f"{b}.npy", Hc)
        if plan.novelty:
            N = _novelty(V, adapted.W, scan.v_peak * inv_scale)[:, core]
            np.save(plan.folder / f"N{b}.npy", np.ascontiguousarray(N))
            novelty_sample.append(N[:, plan.sampled(core_start, core_stop) - core_start])
        timings["factorization"] += time.perf_counter() - t0
    novelty_scale = float(np.percentile(np.hstack(novelty_sample), 99.5)) if novelty_sample else 0.0
    return peak, novelty_scale


def _around(plan: _Plan, prefix: str, b: int) -> tuple[np.ndarray, int]:
    """Block b's core with the end of the previous core (its context) and all of the next one."""
    parts = [np.load(plan.folder / f"{prefix}{b}.npy")]
    first_frame = plan.layout[b][1]
    if b > 0 and plan.context:
        left = np.load(plan.folder / f"{prefix}{b - 1}.npy")[:, -plan.context:]
        parts.insert(0, left)
        first_frame -= left.shape[1]
    if b + 1 < len(plan.layout):
        parts.append(np.load(plan.folder / f"{prefix}{b + 1}.npy"))
    return np.hstack(parts), first_frame


def _track_blocks(plan: _Plan, scan: _Scan, adapted: Dictionary, peak: float, novelty_scale: float):
    """Notes (and, with a part, faint notes) block by block: each block owns the notes whose onset lies in its core."""
    notes: list[Note] = []
    faint: list[Note] = []
    settings = plan.settings
    if plan.reference is not None:
        # harmonic ghosts: notes the part starts are exempt, so the informed ratio applies
        settings = dataclasses.replace(settings, ghost_ratio=plan.prior.ghost_ratio)
    for b, (start, core_start, core_stop, stop) in enumerate(plan.layout):
        if peak <= 0:
            break
        H, first_frame = _around(plan, "", b)
        novelty = None
        if plan.novelty:
            novelty, _ = _around(plan, "N", b)
            if novelty_scale > 0:
                novelty /= np.float32(novelty_scale)
        frames = np.arange(first_frame, first_frame + H.shape[1])
        times = frames * plan.frame_seconds
        part = plan.part(frames, scan.rows)
        found = track_notes(H, adapted.pitches, times, settings=settings, polyphonic=plan.preset.polyphonic,
                            part=part, novelty=novelty if settings.use_novelty else None, reference=peak)
        lo = (core_start - 0.5) * plan.frame_seconds if b > 0 else -np.inf
        hi = (core_stop - 0.5) * plan.frame_seconds if b + 1 < len(plan.layout) else np.inf
        owned = [n for n in found if lo <= n.onset - settings.tracking.onset_shift < hi]
        notes += owned
        if part is not None:
            # the faint notes starting in this core, and the restrikes inside the notes it owns
            tracked = faint_evidence(H, adapted.pitches, times, part.starts, instrument=plan.preset, reference=peak)
            faint += [n for n in tracked if lo <= n.onset < hi]
            if plan.preset.decaying and novelty is not None:
                faint += restrikes(novelty, adapted.pitches, times, owned)
    return sort_notes(notes), (None if plan.reference is None else tuple(sort_notes(faint)))


def _plan(y, sr, n_frames, folder, block_seconds, overlap_seconds, adapt_seconds, **shared) -> _Plan:
    """Block layout on the frame grid and the stride of the even sample of frames."""
    context = int(round(overlap_seconds * sr / HOP_LENGTH))
    layout = block_layout(n_frames, max(int(round(block_seconds * sr / HOP_LENGTH)), 1), context)
    stride = max(int(np.ceil(n_frames / max(int(round(adapt_seconds * sr / HOP_LENGTH)), 1))), 1)
    return _Plan(y=y, sr=sr, layout=layout, folder=folder, stride=stride, context=context, **shared)


def _prepare(y: np.ndarray, sr: int, reference, alignment, instrument, dictionary, settings, say):
    """Checked take, preset, settings, alignment and template pitches."""
    y = np.asarray(y)
    if y.ndim != 1:
        raise InputError(f"y must be mono (1-D), got shape {y.shape}")
    if y.dtype != np.float32:
        y = y.astype(np.float32)
    if instrument is None:
        program = getattr(reference, "midi_program", None)
        instrument = program if program is not None else "piano"
    preset = resolve_instrument(instrument)
    settings = settings or settings_for(preset)
    pitches = None
    if reference is not None:
        if alignment is None:
            from ..alignment.align import align_reference

            say("aligning the part with the take")
            alignment = align_reference(y, sr, reference)
        # the preset's (or the dictionary's) pitches and the part's
        pitches = prior_pitches(reference, preset.pitches if dictionary is None else dictionary.pitches)
    return y, preset, settings, alignment, pitches


def transcribe_long(
    y: np.ndarray,
    sr: int = ANALYSIS_SR,
    *,
    block_seconds: float = 60.0,
    overlap_seconds: float = 5.0,
    adapt_seconds: float = 60.0,
    reference=None,
    alignment=None,
    instrument: "str | int | Instrument | None" = None,
    dictionary: Dictionary | None = None,
    settings: TranscriptionSettings | None = None,
    prior: ScorePrior = SCORE_PRIOR,
    progress: Callable[[str], None] | None = None,
) -> Transcription:
    """Transcribe a take of any length in overlapping blocks (see the module docstring).

    Parameters
    ----------
    y, sr : the mono take and its sample rate.
    block_seconds, overlap_seconds : float
        Length of each block's core (the notes it owns) and the context on each side (>= 2 s).
    adapt_seconds : float
        Frames (in seconds' worth) sampled evenly over the take for the one adaptation.
    reference, alignment : optional
        The part and its alignment with the take (computed when not given): score-informed
        mode, with the prior of one-pass transcription (``prior``).
    instrument, dictionary, settings, progress :
        As in :func:`takescribe.transcription.blind.transcribe`.

    Returns
    -------
    Transcription
        ``spectrogram``, ``H`` and ``H_initial`` are None; with a part, ``faint`` holds the
        "to check by ear" notes.

    Examples
    --------
    >>> sr = 22050
    >>> t = np.arange(int(4.0 * sr)) / sr
    >>> y = (0.3 * np.sin(2 * np.pi * 440.0 * t) * (t < 3.0)).astype(np.float32)
    >>> result = transcribe_long(y, sr, block_seconds=2.0, overlap_seconds=2.0, instrument="flute")
    >>> [n.pitch for n in result.notes]
    [69]
    """
    say = progress or (lambda message: None)
    validate_block_options(block_seconds, overlap_seconds, adapt_seconds)
    y, preset, settings, alignment, pitches = _prepare(y, sr, reference, alignment, instrument, dictionary,
                                                       settings, say)
    timings = {"spectrogram": 0.0, "factorization": 0.0, "tracking": 0.0}
    n_frames = 1 + len(y) // HOP_LENGTH
    t0 = time.perf_counter()
    tuning = estimate_tuning(y, sr)
    release_samples(y, 0, 60 * sr)
    timings["spectrogram"] += time.perf_counter() - t0
    # spectrograms of pass 1 are kept on disk for pass 2; activations likewise (memory stays flat)
    with tempfile.TemporaryDirectory(prefix="takescribe-blocks-") as folder:
        plan = _plan(y, sr, n_frames, Path(folder), block_seconds, overlap_seconds, adapt_seconds, preset=preset,
                     settings=settings, tuning=tuning, reference=reference, alignment=alignment, pitches=pitches,
                     prior=prior)
        timings["n_blocks"] = len(plan.layout)
        say(f"long take: {len(plan.layout)} blocks of {block_seconds:g} s; first pass (scale, adaptation sample)")
        scan = _first_pass(plan, dictionary, timings)
        scale = scan.total / max(n_frames, 1)
        if scale <= 0:
            warnings.warn("the take is silent: the draft has no notes", AudioWarning, stacklevel=2)
            return Transcription([], None, scan.initial, scan.initial, None, None, preset, timings)
        inv_scale = np.float32(1.0 / scale)
        t0 = time.perf_counter()
        adapted, W0, W1 = _adapt(plan, scan, inv_scale, say)
        scan.samples.clear()
        scan.sample_masks.clear()
        timings["factorization"] += time.perf_counter() - t0
        peak, novelty_scale = _second_pass(plan, scan, adapted, W0, W1, inv_scale, timings, say)
        say("note tracking")
        t0 = time.perf_counter()
        notes, faint = _track_blocks(plan, scan, adapted, peak, novelty_scale)
        timings["tracking"] += time.perf_counter() - t0
    return Transcription(notes, None, adapted, scan.initial, None, None, preset, timings, faint)
