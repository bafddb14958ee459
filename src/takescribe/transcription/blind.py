"""Transcription of a signal: spectrogram → harmonic dictionary → NMF → note tracking.

The blind stage chain (with an optional prior on H used by score-informed mode,
:mod:`takescribe.informed`): the spectrogram is normalised so an average frame sums
to one, factorized with the instrument's harmonic dictionary plus three smooth
broadband templates, the partial amplitudes are adapted to the take (semi-learned
mode) and the activations re-estimated, then tracked into notes.
"""

from __future__ import annotations

import time
import warnings
from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from ..errors import AudioWarning
from ..features.spectrogram import ANALYSIS_SR, Spectrogram, compute_spectrogram
from ..notes import Note
from .dictionary import Dictionary, adapt_dictionary, harmonic_dictionary, validate_dictionary
from .instruments import Instrument, resolve_instrument
from .nmf import decompose
from .octaves import correct_subharmonics
from .prior import PartPrior
from .settings import (DEFAULT_SETTINGS, MELODIC_SETTINGS, POLYPHONIC_SETTINGS, TrackingSettings,  # noqa: F401
                       TranscriptionSettings, settings_for)
from .tracking import activations_to_notes, pitch_novelty, suppress_harmonic_ghosts

#: Instrument families whose polyphonic presets may play one line (guitar, harp, mallets).
LINE_FAMILIES = ("guitar", "chromatic percussion")

__all__ = ["plays_one_line", "TranscriptionSettings", "TrackingSettings", "Transcription", "transcribe", "settings_for", "noise_templates",
           "DEFAULT_SETTINGS", "POLYPHONIC_SETTINGS", "MELODIC_SETTINGS", "normalize_spectrogram", "onset_exemption",
           "track_notes", "initial_dictionary"]


def onset_exemption(starts: np.ndarray | None, pitches: np.ndarray, frame_times: np.ndarray):
    """``exempt`` for :func:`takescribe.tracking.suppress_harmonic_ghosts`: notes starting where
    ``starts`` (n_pitches, n_frames) is True (the part starts that pitch) are kept. None without a part."""
    if starts is None:
        return None
    rows = {int(p): k for k, p in enumerate(pitches)}

    def exempt(note: Note) -> bool:
        k = rows.get(note.pitch)
        f = min(int(np.searchsorted(frame_times, note.onset)), len(frame_times) - 1)
        return k is not None and bool(starts[k, f])

    return exempt


@dataclass(frozen=True)
class Transcription:
    """What blind or score-informed transcription produces.

    Attributes
    ----------
    notes : list of Note
    spectrogram : Spectrogram
    dictionary : Dictionary
        The dictionary used for the final pass (adapted when semi-learned).
    initial_dictionary : Dictionary
    H : np.ndarray (n_pitches, n_frames)
        Final activations.
    H_initial : np.ndarray (n_pitches, n_frames)
        Activations of the first pass (before adaptation).
    instrument : Instrument
    timings : dict
        Seconds spent per stage.
    faint : tuple of Note or None
        Long takes transcribed with a part (``H`` is None): the notes the part expects that
        the activations show only faintly, found block by block as they were transcribed
        (:func:`takescribe.transcription.evidence.faint_notes` returns them).
    """

    notes: list[Note]
    spectrogram: Spectrogram
    dictionary: Dictionary
    initial_dictionary: Dictionary
    H: np.ndarray
    H_initial: np.ndarray
    instrument: Instrument
    timings: dict = field(default_factory=dict)
    faint: tuple | None = None


def noise_templates(n_bins: int, n_noise: int) -> np.ndarray:
    """Smooth broadband templates (flat, and tilted towards the bass and the treble).

    They absorb what no pitch template explains, chiefly the hammer and bow noise at
    note attacks, which otherwise leaks into short ghost notes of low pitches. Their
    activations are discarded.
    """
    x = np.linspace(0.0, 1.0, n_bins)
    shapes = [np.ones(n_bins), 1.0 - 0.8 * x, 0.2 + 0.8 * x][:n_noise]
    N = np.stack(shapes, axis=1).astype(np.float32)
    return N / N.sum(axis=0, keepdims=True)


def normalize_spectrogram(V: np.ndarray) -> tuple[np.ndarray, float]:
    """Scale V so an average frame sums to 1 (keeps penalty weights scale-free)."""
    scale = float(V.sum()) / max(V.shape[1], 1)
    if scale <= 0:
        return V, 1.0
    return V / np.float32(scale), scale


def initial_dictionary(spectrogram: Spectrogram, preset: Instrument, dictionary: Dictionary | None = None,
                       pitches: np.ndarray | None = None) -> Dictionary:
    """The preset's harmonic templates on this frequency axis, or a calibrated dictionary retuned to it."""
    if dictionary is None:
        return harmonic_dictionary(spectrogram, instrument=preset, pitches=pitches)
    return validate_dictionary(dictionary.retuned(spectrogram.frequencies), spectrogram)


def track_notes(H: np.ndarray, pitches: np.ndarray, frame_times: np.ndarray, *, settings: TranscriptionSettings,
                polyphonic: bool, part: PartPrior | None = None, novelty: np.ndarray | None = None,
                reference: float | None = None) -> list[Note]:
    """Activations to the draft's notes: tracking, then harmonic ghosts removed.

    With a part, its dual threshold, starts and repeats guide the tracking and a note
    starting where the part starts its pitch is never taken for a ghost. Shared by one-pass
    and long-take transcription.
    """
    notes = activations_to_notes(
        H, pitches, frame_times, settings=settings.tracking, polyphonic=polyphonic, reference=reference,
        novelty=novelty, onset_thresholds=None if part is None else part.thresholds,
        part_starts=None if part is None else part.starts, part_repeats=None if part is None else part.repeats)
    starts = None if part is None else part.starts
    return suppress_harmonic_ghosts(notes, ratio=settings.ghost_ratio,
                                    exempt=onset_exemption(starts, pitches, frame_times))


def _factorize(V: np.ndarray, initial: Dictionary, settings: TranscriptionSettings, mask: np.ndarray | None,
               mask_penalty: float, say) -> tuple[Dictionary, np.ndarray, np.ndarray]:
    """First pass, template adaptation, second pass: ``(dictionary, H, H_first)`` of the pitch rows."""
    common = dict(beta=settings.beta, n_iter=settings.n_iter, tol=settings.tol, continuity=settings.continuity,
                  sparsity=settings.sparsity, mask=mask, mask_penalty=mask_penalty)
    K = initial.n_pitches
    noise = noise_templates(V.shape[0], settings.noise_templates)
    if mask is not None and settings.noise_templates:
        common["mask"] = np.vstack([mask, np.ones((settings.noise_templates, mask.shape[1]), mask.dtype)])
    first = decompose(V, np.hstack([initial.W, noise]), **common)
    final, H_full = initial, first.H
    if settings.adapt:
        say("adapting templates to the instrument")
        # adapt on what the pitch templates explain: V minus the noise part
        V_pitched = np.maximum(V - noise @ first.H[K:], 0.0).astype(np.float32)
        final = adapt_dictionary(V_pitched, initial, first.H[:K], n_iter=settings.adapt_iter, beta=settings.beta,
                                 min_activation=settings.adapt_min_activation)
        H_full = decompose(V, np.hstack([final.W, noise]), H_init=first.H, **common).H
    return final, H_full[:K], first.H[:K]


def plays_one_line(notes: list[Note], *, window: float, max_share: float) -> bool:
    """True when at most ``max_share`` of the notes start within ``window`` seconds of another note
    that is not on one of its low partials (12, 19, 24 semitones: a ringing string's overtones)."""
    if len(notes) < 4:
        return False
    onsets = np.array([n.onset for n in notes])
    together = 0
    for i, n in enumerate(notes):
        near = np.nonzero(np.abs(onsets - n.onset) <= window)[0]
        if any(abs(notes[j].pitch - n.pitch) not in (0, 12, 19, 24) for j in near if j != i):
            together += 1
    return together <= max_share * len(notes)


def _tracked(H, V, dictionary, frame_times, settings, preset, part, melodic) -> list[Note]:
    """Draft notes, polyphonic or melodic (see :func:`transcribe`, ``melodic``).

    A plucked line keeps its preset's tracking levels (its attacks and decays are a plucked
    string's) and gains the melodic decoding only: the bowed and blown melodic levels lost
    onsets on the tuning split's clean guitar line."""
    line_candidate = preset.polyphonic and preset.family in LINE_FAMILIES
    if melodic is None and line_candidate and part is None:
        notes = _tracked(H, V, dictionary, frame_times, settings, preset, part, False)
        melodic = plays_one_line(notes, window=settings.chord_window, max_share=settings.chord_share)
        if not melodic:
            return notes
    novelty = pitch_novelty(V, dictionary.W) if settings.use_novelty else None
    polyphonic = preset.polyphonic and not melodic
    notes = track_notes(H, dictionary.pitches, frame_times, settings=settings, polyphonic=polyphonic, part=part,
                        novelty=novelty)
    if polyphonic or part is not None:
        return notes
    return correct_subharmonics(notes, V, dictionary.frequencies, frame_times, lowest=int(dictionary.pitches.min()),
                                ratio=settings.subharmonic_ratio, contrast=settings.subharmonic_contrast,
                                before=settings.subharmonic_before)


def transcribe(
    y: np.ndarray,
    sr: int = ANALYSIS_SR,
    *,
    instrument: "str | int | Instrument" = "piano",
    dictionary: Dictionary | None = None,
    settings: TranscriptionSettings | None = None,
    part: PartPrior | None = None,
    mask_penalty: float = 0.0,
    spectrogram: Spectrogram | None = None,
    progress: Callable[[str], None] | None = None,
    pitches: np.ndarray | None = None,
    melodic: bool | None = None,
) -> Transcription:
    """Transcribe a mono signal into note events (blind, or guided by the part's prior).

    Parameters
    ----------
    y : np.ndarray (n_samples,)
        Mono float signal at ``sr``.
    sr : int
    instrument : str, int or Instrument
        Preset name or GM program.
    dictionary : Dictionary, optional
        A calibrated dictionary (e.g. from ``takescribe dictionary learn``); rebuilt on
        this take's frequency axis.
    settings : TranscriptionSettings, optional
        Defaults to :func:`settings_for` the instrument.
    part : PartPrior, optional
        The aligned part's prior (:func:`takescribe.transcription.prior.part_prior`): mask on H
        with weight ``mask_penalty`` (:func:`takescribe.transcription.nmf.decompose`), dual
        threshold, starts and repeats. Its rows follow ``pitches``; only those with templates
        are kept, in order.
    spectrogram : Spectrogram, optional
        Precomputed spectrogram of ``y``.
    progress : callable, optional
        Called with a short stage description.
    pitches : np.ndarray, optional
        MIDI pitches of the templates (default: the instrument's range).
    melodic : bool, optional
        True tracks one note at a time (melodic decoding), False as the preset says. None
        (default): without a part, a plucked or struck line (guitar, harp, mallets) whose
        polyphonic draft seldom starts two notes together (:func:`plays_one_line`) is tracked
        melodically, so a ringing string's overtones do not become notes.

    Returns
    -------
    Transcription
    """
    say = progress or (lambda message: None)
    timings: dict[str, float] = {}
    preset = resolve_instrument(instrument)
    settings = settings or settings_for(preset)
    t0 = time.perf_counter()
    if spectrogram is None:
        say("spectrogram")
        spectrogram = compute_spectrogram(y, sr)
    timings["spectrogram"] = time.perf_counter() - t0
    initial = initial_dictionary(spectrogram, preset, dictionary, pitches)
    if pitches is not None and part is not None:
        part = part.rows(np.searchsorted(np.asarray(pitches), initial.pitches))
    V, _ = normalize_spectrogram(spectrogram.V)
    if not np.any(V):
        warnings.warn("the take is silent: the draft has no notes", AudioWarning, stacklevel=2)
        empty = np.zeros((initial.n_pitches, spectrogram.n_frames), np.float32)
        return Transcription([], spectrogram, initial, initial, empty, empty, preset, timings)
    t0 = time.perf_counter()
    say("factorization")
    final, H, H_first = _factorize(V, initial, settings, None if part is None else part.mask, mask_penalty, say)
    timings["factorization"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    say("note tracking")
    notes = _tracked(H, V, final, spectrogram.frame_times, settings, preset, part, melodic)
    timings["tracking"] = time.perf_counter() - t0
    return Transcription(notes, spectrogram, final, initial, H, H_first, preset, timings)
