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

from ..transcription.dictionary import Dictionary, adapt_dictionary, harmonic_dictionary, validate_dictionary
from ..transcription.instruments import Instrument, resolve_instrument
from ..transcription.nmf import Factorization, decompose
from ..notes import Note
from ..features.spectrogram import ANALYSIS_SR, Spectrogram, compute_spectrogram
from ..transcription.tracking import activations_to_notes, pitch_novelty, suppress_harmonic_ghosts

__all__ = ["TranscriptionSettings", "Transcription", "transcribe", "settings_for", "noise_templates", "DEFAULT_SETTINGS",
           "POLYPHONIC_SETTINGS", "MELODIC_SETTINGS", "normalize_spectrogram", "onset_exemption"]


@dataclass(frozen=True)
class TranscriptionSettings:
    """Knobs of blind transcription (defaults tuned on the tuning split of the fixture corpus).

    Attributes
    ----------
    beta : float
        β-divergence of the factorization (1 = KL).
    n_iter : int
        Iterations of each factorization pass.
    continuity, sparsity : float
        Virtanen's temporal-continuity and sparseness weights.
    adapt : bool
        Semi-learned mode: adapt the partial amplitudes to the take, then re-estimate H.
    adapt_iter : int
    onset_threshold, offset_threshold, release_ratio, reonset_rise : float
        Note-tracking levels (fractions of the loudest activation).
    min_duration : float
        Seconds.
    onset_shift : float
        Seconds added to note times to compensate the analysis delay.
    repeat_window : float
        Seconds searched on each side of an activation valley where the part repeats a
        pitch (score-informed; :func:`takescribe.tracking.activations_to_notes`).
    zone_snap : float
        Novelty level that places a melodic note's onset inside the zone where the part
        starts its pitch (score-informed; same function).
    max_rise : float or None
        Struck and plucked instruments: a note slower than this (seconds) from its onset
        to 80 % of its peak has no attack and is dropped (same function).
    min_fall : float or None
        A rise inside a note is a new note only after a fall to this fraction of the level
        held before it (same function). 0.9 and 1.0 gave the same informed figures on the
        tuning split (a cello note rising in two stages was no longer split into a false
        extra note; reverberant Alberti bass 0.857 -> 0.935); 0.8 lost a trumpet repeat.
        Confirmed on held-out (mixed guitar jig informed onset F 0.898 -> 0.936).
    valley_dip, repeat_dip : float or None
        Melodic instruments: how deep a valley between two swells of one pitch must fall to
        start a new note anywhere (``valley_dip``), and, where the part repeats the pitch
        and the next swell comes back at full strength, a re-attack (``repeat_dip``) (same
        function).
    notch_width : float
        Seconds: a valley down to ``repeat_dip`` on both sides and at most this wide at half
        its depth is a re-attack too, where the part repeats the pitch (same function).
    stage_window : float
        Seconds: melodic instruments, a rise within this time of the previous onset, after a
        swell below 0.6 of its own peak, is the second stage of the same attack (same function).
        Tuned on the large corpus's tuning split: 0.1-0.2 s the same (a cello jig's two-stage
        attacks no longer split: informed onset F 0.886 -> 0.929), no piece lower.
    """

    beta: float = 1.0
    n_iter: int = 60
    tol: float = 1e-4
    continuity: float = 0.0
    sparsity: float = 0.0
    adapt: bool = True
    adapt_iter: int = 10
    onset_threshold: float = 0.12
    offset_threshold: float = 0.05
    release_ratio: float = 0.08
    reonset_rise: float = 0.08
    reonset_frames: int = 4
    min_duration: float = 0.05
    onset_shift: float = 0.0
    smoothing: int = 3
    noise_templates: int = 3
    attack_fraction: float = 0.3
    reonset_dip: float = 0.6
    local_window: float = 1.5
    local_floor: float = 0.1
    use_novelty: bool = False
    novelty_threshold: float = 0.5
    novelty_snap: float = 0.1
    ghost_ratio: float = 0.0
    repeat_window: float = 0.25
    zone_snap: float = 0.3
    max_rise: float | None = None
    valley_dip: float | None = None
    repeat_dip: float | None = None
    notch_width: float = 0.0
    min_fall: float | None = 0.9
    stage_window: float = 0.0


DEFAULT_SETTINGS = TranscriptionSettings()
# Polyphonic instruments (piano, guitar) and melodic ones differ in what a ghost note
# looks like: chords leave weak partial-sharing activations and hammer noise, so
# polyphonic tracking is stricter; melodic decoding already keeps one pitch a frame.
# max_rise (struck and plucked notes need an attack): 0.15 and 0.2 s gave the same figures
# on the tuning split (0.1 s lost notes in reverb, 0.3 s kept slow swells); confirmed on
# held-out, where only the sustained-bass piece changed (informed onset F 0.974 -> 0.987).
POLYPHONIC_SETTINGS = TranscriptionSettings(onset_threshold=0.3, min_duration=0.06, release_ratio=0.2,
                                            reonset_rise=0.1, onset_shift=-0.02, local_floor=0.3,
                                            use_novelty=False, ghost_ratio=0.7, max_rise=0.2)
# repeat_dip (a re-attack where the part repeats the pitch): 0.7-0.85 gave the same figures on
# the tuning pieces (a flute note tongued late into its repeat dips to 0.67, a slow cello
# repeat to 0.63; mixed trumpet reel informed onset F 0.970 -> 1.000); 0.65 lost both; the
# held-out pieces are unchanged. A held cello note's loop modulation dips to 0.56 but comes
# back lower, so the full-strength condition keeps it one note.
# notch_width (a narrow valley at a written repeat): tuned on the tuning split of the large
# corpus (build_corpus.py --large; 40 pieces, none in the committed held-out split): 0.06 and
# 0.08 s gave the same figures (saxophone jig 0.975 -> 1.000, no piece lower), 0.035 s missed
# one of its repeats; 0.1 s also split a slow cello repeat (0.886 -> 0.899) but nears the
# width of a held note's loop modulation (about 0.1 s in the tied-cello test of
# test_informed.py); depth 0.65 and 0.85 were worse than repeat_dip 0.75.
# Confirmed on the committed held-out split (clarinet tune 0.952 -> 0.977, alto sax jig
# 0.959 -> 0.973).
MELODIC_SETTINGS = TranscriptionSettings(onset_threshold=0.2, min_duration=0.06, release_ratio=0.2,
                                         reonset_rise=0.1, onset_shift=-0.02, local_floor=0.3,
                                         use_novelty=True, novelty_threshold=2.0, novelty_snap=0.6, reonset_dip=0.5,
                                         valley_dip=0.45, repeat_dip=0.75, notch_width=0.06, stage_window=0.15)


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


def settings_for(instrument: "str | int | Instrument") -> TranscriptionSettings:
    """Default settings for an instrument: polyphonic or melodic tracking."""
    return POLYPHONIC_SETTINGS if resolve_instrument(instrument).polyphonic else MELODIC_SETTINGS


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
    """

    notes: list[Note]
    spectrogram: Spectrogram
    dictionary: Dictionary
    initial_dictionary: Dictionary
    H: np.ndarray
    H_initial: np.ndarray
    instrument: Instrument
    timings: dict = field(default_factory=dict)


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


def transcribe(
    y: np.ndarray,
    sr: int = ANALYSIS_SR,
    *,
    instrument: "str | int | Instrument" = "piano",
    dictionary: Dictionary | None = None,
    settings: TranscriptionSettings | None = None,
    mask: np.ndarray | None = None,
    mask_penalty: float = 0.0,
    onset_thresholds: np.ndarray | None = None,
    spectrogram: Spectrogram | None = None,
    progress: Callable[[str], None] | None = None,
    pitches: np.ndarray | None = None,
    ghost_exempt: np.ndarray | None = None,
    repeat_onsets: np.ndarray | None = None,
) -> Transcription:
    """Transcribe a mono signal into note events (blind, or guided by a mask on H).

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
    mask, mask_penalty :
        Score prior on H (see :func:`takescribe.nmf.decompose`).
    onset_thresholds : np.ndarray (n_pitches, n_frames), optional
        Per-pitch, per-frame onset thresholds (score-informed dual threshold).
    spectrogram : Spectrogram, optional
        Precomputed spectrogram of ``y``.
    progress : callable, optional
        Called with a short stage description.
    pitches : np.ndarray, optional
        MIDI pitches of the templates (default: the instrument's range). ``mask`` and
        ``onset_thresholds`` rows follow these pitches (only those on the frequency
        axis are kept, in order).
    ghost_exempt : np.ndarray of bool (n_pitches, n_frames), optional
        Where the part starts each pitch (score-informed): a note starting there is never
        dropped as a harmonic ghost; a re-onset there needs less evidence (polyphonic) or
        a weaker attack places the onset (melodic). Rows follow ``pitches`` like ``mask``.
    repeat_onsets : np.ndarray of bool (n_pitches, n_frames), optional
        Where the part starts a pitch again right after a note of that pitch
        (score-informed): an activation valley there starts a new note (a bow change
        or breath between repeated legato notes). Rows follow ``pitches`` like ``mask``.

    Returns
    -------
    Transcription
    """
    say = progress or (lambda message: None)
    timings: dict[str, float] = {}
    preset = resolve_instrument(instrument)
    if settings is None:
        settings = settings_for(preset)
    t0 = time.perf_counter()
    if spectrogram is None:
        say("spectrogram")
        spectrogram = compute_spectrogram(y, sr)
    timings["spectrogram"] = time.perf_counter() - t0
    if dictionary is None:
        initial = harmonic_dictionary(spectrogram, instrument=preset, pitches=pitches)
    else:
        initial = validate_dictionary(dictionary.retuned(spectrogram.frequencies), spectrogram)
    if pitches is not None and (mask is not None or onset_thresholds is not None):
        # keep the prior rows of the pitches that have templates
        rows = np.searchsorted(np.asarray(pitches), initial.pitches)
        if mask is not None:
            mask = mask[rows]
        if onset_thresholds is not None:
            onset_thresholds = onset_thresholds[rows]
        if ghost_exempt is not None:
            ghost_exempt = ghost_exempt[rows]
        if repeat_onsets is not None:
            repeat_onsets = repeat_onsets[rows]
    V, _ = normalize_spectrogram(spectrogram.V)
    empty = np.zeros((initial.n_pitches, spectrogram.n_frames), np.float32)
    if not np.any(V):
        warnings.warn("the take is silent: the draft has no notes", UserWarning, stacklevel=2)
        return Transcription([], spectrogram, initial, initial, empty, empty, preset, timings)
    t0 = time.perf_counter()
    say("factorization")
    common = dict(beta=settings.beta, n_iter=settings.n_iter, tol=settings.tol, continuity=settings.continuity,
                  sparsity=settings.sparsity, mask=mask, mask_penalty=mask_penalty)
    K = initial.n_pitches
    noise = noise_templates(V.shape[0], settings.noise_templates)
    if mask is not None and settings.noise_templates:
        mask = np.vstack([mask, np.ones((settings.noise_templates, mask.shape[1]), mask.dtype)])
        common["mask"] = mask
    first: Factorization = decompose(V, np.hstack([initial.W, noise]), **common)
    final_dictionary, H_full = initial, first.H
    if settings.adapt:
        say("adapting templates to the instrument")
        # adapt on what the pitch templates explain: V minus the noise part
        V_pitched = np.maximum(V - noise @ first.H[K:], 0.0).astype(np.float32)
        final_dictionary = adapt_dictionary(V_pitched, initial, first.H[:K], n_iter=settings.adapt_iter,
                                            beta=settings.beta, min_activation=0.01)
        H_full = decompose(V, np.hstack([final_dictionary.W, noise]), H_init=first.H, **common).H
    H = H_full[:K]
    timings["factorization"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    say("note tracking")
    notes = activations_to_notes(
        H,
        final_dictionary.pitches,
        spectrogram.frame_times,
        onset_threshold=settings.onset_threshold if onset_thresholds is None else onset_thresholds,
        offset_threshold=settings.offset_threshold,
        release_ratio=settings.release_ratio,
        reonset_rise=settings.reonset_rise,
        reonset_frames=settings.reonset_frames,
        min_duration=settings.min_duration,
        smoothing=settings.smoothing,
        polyphonic=preset.polyphonic,
        onset_shift=settings.onset_shift,
        attack_fraction=settings.attack_fraction,
        reonset_dip=settings.reonset_dip,
        local_window=settings.local_window,
        local_floor=settings.local_floor,
        novelty=pitch_novelty(V, final_dictionary.W) if settings.use_novelty else None,
        novelty_threshold=settings.novelty_threshold,
        novelty_snap=settings.novelty_snap,
        # relaxed re-onsets serve repeated chords of struck instruments; on bowed and blown
        # notes a slow attack would look like several onsets
        expected_onsets=ghost_exempt if preset.polyphonic else None,
        # and conversely: a struck note decays, so a valley before a repeated strike is no
        # second onset, while a bowed or blown repeat may rise too slowly for the rise test
        expected_repeats=None if preset.polyphonic else repeat_onsets,
        attack_zones=None if preset.polyphonic else ghost_exempt,
        zone_snap=settings.zone_snap,
        repeat_window=settings.repeat_window,
        max_rise=settings.max_rise,
        valley_dip=settings.valley_dip,
        repeat_dip=settings.repeat_dip,
        notch_width=settings.notch_width,
        min_fall=settings.min_fall,
        stage_window=settings.stage_window,
    )
    notes = suppress_harmonic_ghosts(notes, ratio=settings.ghost_ratio,
                                     exempt=onset_exemption(ghost_exempt, final_dictionary.pitches,
                                                            spectrogram.frame_times))
    timings["tracking"] = time.perf_counter() - t0
    return Transcription(notes, spectrogram, final_dictionary, initial, H, first.H[:K], preset, timings)


