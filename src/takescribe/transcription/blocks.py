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
- With a reference part, the score prior (mask and dual threshold) of
  :mod:`takescribe.informed` is computed per block from the alignment of the whole take.
"""

from __future__ import annotations

import tempfile
import time
import warnings
from pathlib import Path
from typing import Callable

import numpy as np

from ..audio.load import release_samples
from ..transcription.dictionary import Dictionary, adapt_dictionary, harmonic_dictionary, validate_dictionary
from ..errors import InputError
from ..transcription.informed import INFORMED_DEFAULTS, score_mask
from ..transcription.instruments import Instrument, resolve_instrument
from ..transcription.nmf import decompose
from ..notes import Note, sort_notes
from ..features.spectrogram import ANALYSIS_SR, HOP_LENGTH, compute_spectrogram, estimate_tuning
from ..transcription.tracking import activations_to_notes, pitch_novelty, suppress_harmonic_ghosts
from ..transcription.blind import Transcription, TranscriptionSettings, noise_templates, onset_exemption, settings_for

__all__ = ["transcribe_long", "block_layout", "validate_block_options", "LONG_TAKE_SECONDS"]

#: Takes longer than this (seconds) are transcribed in blocks by :func:`takescribe.pipeline.transcribe_take`.
LONG_TAKE_SECONDS = 150.0


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


def _novelty(V: np.ndarray, W: np.ndarray, peak: float, *, compression: float = 100.0) -> np.ndarray:
    """Unscaled per-pitch onset novelty with the whole take's peak (the caller applies the scale)."""
    return pitch_novelty(V, W, compression=compression, peak=peak, scale=1.0)


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
    mask_penalty: float = INFORMED_DEFAULTS["mask_penalty"],
    progress: Callable[[str], None] | None = None,
) -> Transcription:
    """Transcribe a take of any length in overlapping blocks (see the module docstring).

    Parameters
    ----------
    y : np.ndarray (n_samples,)
        Mono signal at ``sr``.
    sr : int
    block_seconds : float
        Length of each block's core (the notes it owns).
    overlap_seconds : float
        Context on each side of a core (at least 2 s).
    adapt_seconds : float
        Frames (in seconds' worth) sampled evenly over the take for the one adaptation.
    reference : takescribe.score.Reference, optional
        The part: score-informed mode (mask and dual threshold of :mod:`takescribe.informed`).
    alignment : takescribe.align.Alignment, optional
        Take ↔ part map; computed with :func:`takescribe.align.align_reference` when not given.
    instrument, dictionary, settings :
        As in :func:`takescribe.transcription.transcribe`.
    mask_penalty : float
        Weight of the score prior (informed mode only).
    progress : callable, optional

    Returns
    -------
    Transcription
        ``spectrogram``, ``H`` and ``H_initial`` are ``None``.

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
    # harmonic ghosts: the blind setting, or the informed one (notes the part starts are exempt)
    ghost_ratio = settings.ghost_ratio if reference is None else INFORMED_DEFAULTS["ghost_ratio"]
    timings = {"spectrogram": 0.0, "factorization": 0.0, "tracking": 0.0}
    hop = HOP_LENGTH
    n_frames = 1 + len(y) // hop
    core = max(int(round(block_seconds * sr / hop)), 1)
    context = int(round(overlap_seconds * sr / hop))
    layout = block_layout(n_frames, core, context)
    timings["n_blocks"] = len(layout)
    t0 = time.perf_counter()
    tuning = estimate_tuning(y, sr)
    release_samples(y, 0, 60 * sr)
    timings["spectrogram"] += time.perf_counter() - t0

    if reference is not None and alignment is None:
        from ..alignment.align import align_reference

        say("aligning the part with the take")
        alignment = align_reference(y, sr, reference)
    # pitches of the templates: the preset's (or the dictionary's) and, informed, the part's too
    pitches = None
    if reference is not None:
        base_pitches = preset.pitches if dictionary is None else dictionary.pitches
        part = np.array(sorted({int(n.pitch) for n in reference.notes}), dtype=int)
        pitches = np.union1d(base_pitches, part[(part >= 21) & (part <= 108)])

    def prior(block_times: np.ndarray, rows: np.ndarray):
        """Mask and onset thresholds of the part for these frames (informed mode), as in
        :func:`takescribe.informed.informed_transcription`."""
        if reference is None:
            return None, settings.onset_threshold
        mask = score_mask(reference, alignment, pitches, block_times, tolerance=INFORMED_DEFAULTS["tolerance"],
                          floor=INFORMED_DEFAULTS["floor"])[rows]
        thresholds = np.where(mask >= 1.0, settings.onset_threshold * INFORMED_DEFAULTS["expected_factor"],
                              settings.onset_threshold * INFORMED_DEFAULTS["unexpected_factor"])
        return mask, thresholds

    def expected(block_times: np.ndarray, rows: np.ndarray, **kind) -> np.ndarray | None:
        """Where the part starts a pitch (``onsets_only``) or repeats one (``repeats_only``)."""
        if reference is None:
            return None
        return score_mask(reference, alignment, pitches, block_times, tolerance=INFORMED_DEFAULTS["tolerance"],
                          floor=0.0, **kind)[rows] >= 1.0

    # spectrograms of pass 1 are kept on disk for pass 2; activations likewise (memory stays flat)
    with tempfile.TemporaryDirectory(prefix="takescribe-blocks-") as folder:
        # pass 1: the normalisation scale, the templates and an even sample of frames for the adaptation
        say(f"long take: {len(layout)} blocks of {block_seconds:g} s; first pass (scale, adaptation sample)")
        n_sample = max(int(round(adapt_seconds * sr / hop)), 1)
        stride = max(int(np.ceil(n_frames / n_sample)), 1)
        total = v_peak = 0.0
        initial = None
        samples, sample_masks = [], []
        for b, (start, core_start, core_stop, stop) in enumerate(layout):
            t0 = time.perf_counter()
            spec, V = _block_spectrogram(y, sr, start, stop, tuning, hop)
            release_samples(y, start * hop, stop * hop)  # a take spilled to a file leaves memory again
            timings["spectrogram"] += time.perf_counter() - t0
            if initial is None:
                if dictionary is None:
                    initial = harmonic_dictionary(spec, instrument=preset, pitches=pitches)
                else:
                    initial = validate_dictionary(dictionary.retuned(spec.frequencies), spec)
                rows = np.searchsorted(pitches, initial.pitches) if pitches is not None else None
                frame_seconds = hop / sr
            Vc = V[:, core_start - start: core_stop - start]
            total += float(Vc.sum(dtype=np.float64))
            v_peak = max(v_peak, float(Vc.max(initial=0.0)))
            np.save(Path(folder) / f"V{b}.npy", V)
            picked = np.arange(core_start + (-core_start) % stride, core_stop, stride)
            samples.append(V[:, picked - start])
            if reference is not None:
                mask, _ = prior(picked * frame_seconds, rows)
                sample_masks.append(mask)
        scale = total / max(n_frames, 1)
        K = initial.n_pitches
        n_noise = settings.noise_templates
        noise = noise_templates(initial.W.shape[0], n_noise)
        if scale <= 0:
            warnings.warn("the take is silent: the draft has no notes", UserWarning, stacklevel=2)
            return Transcription([], None, initial, initial, None, None, preset, timings)
        inv_scale = np.float32(1.0 / scale)
        common = dict(beta=settings.beta, n_iter=settings.n_iter, tol=0.0, check_every=max(settings.n_iter, 1),
                      continuity=settings.continuity, sparsity=settings.sparsity,
                      mask_penalty=mask_penalty if reference is not None else 0.0)

        def noise_rows(mask):
            if mask is None or not n_noise:
                return mask
            return np.vstack([mask, np.ones((n_noise, mask.shape[1]), mask.dtype)])

        t0 = time.perf_counter()
        W0 = np.hstack([initial.W, noise]).astype(np.float32)
        colsum0 = float(W0.sum(axis=0).mean())
        adapted = initial
        if settings.adapt:
            say("adapting templates on frames sampled over the whole take")
            Vs = np.hstack(samples) * inv_scale
            ms = noise_rows(np.hstack(sample_masks)) if sample_masks else None
            first = decompose(Vs, W0, H_init=_frame_start(Vs, colsum0, K + n_noise), mask=ms, **common)
            V_pitched = np.maximum(Vs - noise @ first.H[K:], 0.0).astype(np.float32)
            adapted = adapt_dictionary(V_pitched, initial, first.H[:K], n_iter=settings.adapt_iter,
                                       beta=settings.beta, min_activation=0.01)
        del samples, sample_masks
        W1 = np.hstack([adapted.W, noise]).astype(np.float32)
        timings["factorization"] += time.perf_counter() - t0

        # pass 2: factorize each block, keep the core activations (and onset novelty) on disk
        peak = 0.0
        novelty_sample = []
        for b, (start, core_start, core_stop, stop) in enumerate(layout):
            say(f"block {b + 1}/{len(layout)}: factorization")
            t0 = time.perf_counter()
            V = np.load(Path(folder) / f"V{b}.npy")
            V *= inv_scale
            timings["spectrogram"] += time.perf_counter() - t0
            t0 = time.perf_counter()
            mask, _ = prior(np.arange(start, stop) * frame_seconds, rows)
            mask = noise_rows(mask)
            H = decompose(V, W0, H_init=_frame_start(V, colsum0, K + n_noise), mask=mask, **common).H
            if settings.adapt:
                H = decompose(V, W1, H_init=H, mask=mask, **common).H
            Hc = np.ascontiguousarray(H[:K, core_start - start: core_stop - start])
            peak = max(peak, float(Hc.max(initial=0.0)))
            np.save(Path(folder) / f"{b}.npy", Hc)
            if settings.use_novelty:
                N = _novelty(V, adapted.W, v_peak * inv_scale)[:, core_start - start: core_stop - start]
                np.save(Path(folder) / f"N{b}.npy", np.ascontiguousarray(N))
                picked = np.arange(core_start + (-core_start) % stride, core_stop, stride)
                novelty_sample.append(N[:, picked - core_start])
            timings["factorization"] += time.perf_counter() - t0

        # tracking: each block owns the notes whose onset lies in its core
        say("note tracking")
        t0 = time.perf_counter()
        novelty_scale = 0.0
        if novelty_sample:
            novelty_scale = float(np.percentile(np.hstack(novelty_sample), 99.5))
        notes: list[Note] = []

        def around(prefix: str, b: int) -> tuple[np.ndarray, int]:
            """Block b's core with the end of the previous core and all of the next one."""
            parts = [np.load(Path(folder) / f"{prefix}{b}.npy")]
            first_frame = layout[b][1]
            if b > 0 and context:
                left = np.load(Path(folder) / f"{prefix}{b - 1}.npy")[:, -context:]
                parts.insert(0, left)
                first_frame -= left.shape[1]
            if b + 1 < len(layout):
                parts.append(np.load(Path(folder) / f"{prefix}{b + 1}.npy"))
            return np.hstack(parts), first_frame

        for b, (start, core_start, core_stop, stop) in enumerate(layout):
            if peak <= 0:
                break
            H, first_frame = around("", b)
            novelty = None
            if settings.use_novelty:
                novelty, _ = around("N", b)
                if novelty_scale > 0:
                    novelty /= np.float32(novelty_scale)
            times = np.arange(first_frame, first_frame + H.shape[1]) * frame_seconds
            _, thresholds = prior(times, rows)
            starts = expected(times, rows, onsets_only=True)
            repeats = expected(times, rows, repeats_only=True)
            found = activations_to_notes(
                H, adapted.pitches, times, onset_threshold=thresholds,
                offset_threshold=settings.offset_threshold, release_ratio=settings.release_ratio,
                reonset_rise=settings.reonset_rise, reonset_frames=settings.reonset_frames,
                min_duration=settings.min_duration,
                smoothing=settings.smoothing, polyphonic=preset.polyphonic, reference=peak,
                onset_shift=settings.onset_shift, attack_fraction=settings.attack_fraction,
                reonset_dip=settings.reonset_dip, local_window=settings.local_window,
                local_floor=settings.local_floor, novelty=novelty, novelty_threshold=settings.novelty_threshold,
                novelty_snap=settings.novelty_snap,
                # the part's onsets and repeats, as in takescribe.transcription.transcribe
                expected_onsets=starts if preset.polyphonic else None,
                expected_repeats=None if preset.polyphonic else repeats,
                attack_zones=None if preset.polyphonic else starts,
                zone_snap=settings.zone_snap, repeat_window=settings.repeat_window, max_rise=settings.max_rise,
                valley_dip=settings.valley_dip, repeat_dip=settings.repeat_dip, notch_width=settings.notch_width, min_fall=settings.min_fall,
                stage_window=settings.stage_window,
            )
            found = suppress_harmonic_ghosts(found, ratio=ghost_ratio, exempt=onset_exemption(starts, adapted.pitches, times))
            lo = (core_start - 0.5) * frame_seconds if b > 0 else -np.inf
            hi = (core_stop - 0.5) * frame_seconds if b + 1 < len(layout) else np.inf
            notes.extend(n for n in found if lo <= n.onset - settings.onset_shift < hi)
        timings["tracking"] += time.perf_counter() - t0
    return Transcription(sort_notes(notes), None, adapted, initial, None, None, preset, timings)
