"""Every tuned number of transcription, as frozen values with one line of why each.

Conventions
-----------
- Levels are fractions of the reference activation (the loudest of the take, or of its
  neighbourhood: ``local_window``); times are seconds; frame counts say so in their name.
- The numbers were tuned on the *tuning* split of the fixture corpus (and the large corpus's
  tuning split, ``fixtures/build_corpus.py --large``) and confirmed on held-out. How each was
  reached (the values tried, the figures before and after) is in the commit that set it and in
  the benchmark logs, not here.
- :class:`TrackingSettings` drives :func:`takescribe.transcription.tracking.activations_to_notes`;
  :class:`TranscriptionSettings` the whole blind chain (factorization, then tracking);
  :class:`ScorePrior` the aligned part as a prior (one-pass and long takes alike);
  :class:`FaintSettings` the "to check by ear" evidence (:mod:`takescribe.transcription.evidence`).
"""

from __future__ import annotations

import dataclasses
import types
from dataclasses import dataclass, field

from ..errors import InputError
from .instruments import Instrument, resolve_instrument

__all__ = ["TrackingSettings", "TranscriptionSettings", "ScorePrior", "FaintSettings", "DEFAULT_SETTINGS",
           "POLYPHONIC_SETTINGS", "MELODIC_SETTINGS", "SCORE_PRIOR", "FAINT_SETTINGS", "INFORMED_DEFAULTS",
           "settings_for", "validate_score_prior"]


@dataclass(frozen=True)
class TrackingSettings:
    """Activations → notes (:func:`takescribe.transcription.tracking.activations_to_notes`).

    Attributes
    ----------
    onset_threshold : float
        Level a note must reach (hysteresis high threshold).
    offset_threshold : float
        Level below which a sounding region ends (hysteresis low threshold).
    release_ratio : float
        A note also ends when it falls below this fraction of its own peak.
    reonset_rise : float
        Rise within ``reonset_frames`` frames that starts a new note of the same pitch.
    reonset_frames : int
        Frames over which that rise is measured.
    reonset_dip : float
        A re-onset also needs the activation to have dipped to this fraction of its new value.
    min_duration : float
        Seconds: shorter notes are dropped.
    smoothing : int
        Frames of the running median against single-frame spikes (1 = none).
    onset_shift : float
        Seconds added to every note time (analysis latency).
    attack_fraction : float
        The onset is placed where the rise to the note's peak crosses this fraction of it.
    local_window, local_floor : float
        Thresholds are relative to the loudest activation within ± ``local_window`` seconds,
        never below ``local_floor`` of the take's loudest (0 window: the take's loudest).
    novelty_threshold : float
        A peak of the pitch's onset novelty this high starts a new note inside a region.
    novelty_snap : float
        Smallest novelty peak within ``snap_window`` before the rise that places the onset.
    snap_window : float
        Seconds looked back from a rise for its attack (novelty snap, hidden melodic rises).
    repeat_window : float
        Seconds on each side of a valley searched for the swells around it.
    zone_snap : float
        Smallest novelty peak that places an onset inside the part's attack zone.
    max_rise : float or None
        Seconds: struck and plucked notes slower than this to ``attack_reach`` of their peak
        have no attack and are dropped. None: no test.
    attack_reach : float
        Fraction of the peak a stroke reaches within ``max_rise``.
    valley_dip : float or None
        Melodic: a valley this deep between two swells of one pitch starts a new note anywhere.
    repeat_dip : float or None
        Where the part repeats the pitch, a shallower valley (to this fraction) is a re-attack
        when the next swell comes back at full strength.
    notch_width : float
        Seconds: a valley down to ``repeat_dip`` on both sides and at most this wide at half its
        depth is a re-attack where the part repeats the pitch (0: no test).
    min_fall : float or None
        A rise inside a note is a new note only after a fall to this fraction of the level held
        before it. None: no test.
    stage_window, stage_ratio : float
        Melodic: a new onset within ``stage_window`` seconds of the previous one is dropped when
        the swell between them peaked below ``stage_ratio`` of the new swell's peak (0: off).
    relaxed_rise, relaxed_dip, relaxed_dip_cap : float
        Where the part expects an onset (polyphonic), a re-onset needs only ``relaxed_rise`` of
        the rise over a dip of ``min(relaxed_dip · reonset_dip, relaxed_dip_cap)``.
    onset_spacing, relaxed_spacing : int
        Re-onsets closer than this many times ``reonset_frames`` to the previous one are merged
        (relaxed ones need more room).
    silence_factor : float
        Melodic decoding: the silence state's score is this times ``offset_threshold``.
    stay_probability : float
        Melodic decoding: probability of keeping the same state from one frame to the next.
    """

    # a note must stand out of the noise floor of shared partials
    onset_threshold: float = 0.12
    # hysteresis: a note sounds on until well below its start level
    offset_threshold: float = 0.05
    # a decayed note has ended even while shared partials keep the row above offset_threshold
    release_ratio: float = 0.08
    # a restrike of one key adds this much within reonset_frames (bow vibrato adds less)
    reonset_rise: float = 0.08
    # 4 frames of 11.6 ms: a hammer or plectrum attack completes within them
    reonset_frames: int = 4
    # vibrato and bow changes do not dip this far
    reonset_dip: float = 0.6
    # shorter than a fast grace note: spikes and attack noise
    min_duration: float = 0.05
    # 3 frames: removes one-frame spikes, keeps 35 ms notes
    smoothing: int = 3
    # the variable-Q analysis places energy late; negative moves notes earlier
    onset_shift: float = 0.0
    # the crossing of 30 % of the peak lies nearest the heard attack on the tuning split
    attack_fraction: float = 0.3
    # a quiet passage is judged against its own few seconds
    local_window: float = 1.5
    # ... but never against less than this of the take's loudest (silence stays silence)
    local_floor: float = 0.1
    # a clear attack of the pitch's partials splits a note that does not dip
    novelty_threshold: float = 0.5
    # a weaker attack is enough to place an onset already found
    novelty_snap: float = 0.1
    # an attack lies at most 0.1 s before the activation's rise
    snap_window: float = 0.1
    # a bow change's swells lie within a quarter second of its valley
    repeat_window: float = 0.25
    # where the part starts the pitch, a modest attack marks a slow swell's start
    zone_snap: float = 0.3
    # None by default: only struck and plucked presets test for an attack
    max_rise: float | None = None
    # a stroke reaches most of its peak at once
    attack_reach: float = 0.8
    # None by default: only melodic presets split deep valleys anywhere
    valley_dip: float | None = None
    # None by default: only melodic presets split shallow valleys at written repeats
    repeat_dip: float | None = None
    # 0 by default: only melodic presets look for a tongued repeat's narrow gap
    notch_width: float = 0.0
    # a note's attack in two stages rises twice without falling in between
    min_fall: float | None = 0.9
    # 0 by default: only melodic presets merge two-stage attacks
    stage_window: float = 0.0
    # the first stage (bow or breath noise) is well below the tone
    stage_ratio: float = 0.6
    # a written repeated chord may be struck softer than the first
    relaxed_rise: float = 0.5
    relaxed_dip: float = 1.5
    relaxed_dip_cap: float = 0.9
    # a note's own attack is never split: re-onsets keep 2 rise-widths apart, relaxed ones 5
    onset_spacing: int = 2
    relaxed_spacing: int = 5
    # a pitch below twice the hysteresis low level loses to silence
    silence_factor: float = 2.0
    # melodic lines hold a note for many frames
    stay_probability: float = 0.96


@dataclass(frozen=True)
class TranscriptionSettings:
    """The blind chain: factorization, template adaptation, tracking, harmonic ghosts.

    Attributes
    ----------
    beta : float
        β-divergence of the factorization (1 = KL).
    n_iter : int
        Iterations of each factorization pass.
    tol : float
        Relative cost decrease that stops a factorization early.
    continuity, sparsity : float
        Virtanen's temporal-continuity and sparseness weights.
    adapt : bool
        Semi-learned mode: adapt the partial amplitudes to the take, then re-estimate H.
    adapt_iter : int
    adapt_min_activation : float
        Frames where a pitch is weaker than this are not used to adapt its template.
    noise_templates : int
        Broadband templates that absorb attack noise (0..3).
    use_novelty : bool
        Compute the per-pitch onset novelty for tracking (melodic presets).
    ghost_ratio : float
        A note on the 2nd-4th partial of a note starting with it is dropped when quieter than
        this times it (0: no test; :func:`takescribe.transcription.tracking.suppress_harmonic_ghosts`).
    chord_window, chord_share : float
        A plucked or struck take is one line (tracked melodically) when at most ``chord_share``
        of its polyphonic draft's notes start within ``chord_window`` seconds of another note
        not on their low partials (:func:`takescribe.transcription.blind.plays_one_line`).
    subharmonic_ratio, subharmonic_contrast : float
        One-line drafts: a note is moved down to the played note it is a partial of when that
        note's own partials hold this share of its energy and this many times the other
        candidates' (:func:`takescribe.transcription.octaves.correct_subharmonics`; 0: no check).
    subharmonic_before : float
        Share of the spectrum just before the note (the previous note's tail) taken off first.
    tracking : TrackingSettings
    """

    # KL: the classic choice for magnitude spectra of music (Smaragdis and Brown 2003)
    beta: float = 1.0
    # the onset F-measure stops improving after about 60 updates on the tuning split
    n_iter: int = 60
    tol: float = 1e-4
    continuity: float = 0.0
    sparsity: float = 0.0
    adapt: bool = True
    # a few updates of the partial amplitudes; more overfit the take's noise
    adapt_iter: int = 10
    adapt_min_activation: float = 0.01
    # flat, bass-tilted and treble-tilted: hammer and bow noise
    noise_templates: int = 3
    use_novelty: bool = False
    ghost_ratio: float = 0.0
    # chords start their notes within a few tens of milliseconds of each other
    chord_window: float = 0.05
    # a line may have an odd double stop; the tuning split's piano takes start >= 0.34 of notes together
    chord_share: float = 0.2
    # tuning split (world melodies): right notes read <= 0.12 at the 95th percentile, notes on a partial >= 0.16
    subharmonic_ratio: float = 0.2
    # a ringing previous note or noise lifts every candidate alike: 3 kept 128 fixes, 5 wrong moves of 1,200
    subharmonic_contrast: float = 3.0
    # half the previous note's tail off: the 5 wrong moves of room takes gone, the 128 fixes kept (1.0 lost one)
    subharmonic_before: float = 0.5
    tracking: TrackingSettings = field(default_factory=TrackingSettings)

    def with_tracking(self, **changes) -> "TranscriptionSettings":
        """A copy with some tracking settings changed (unknown names raise TypeError)."""
        return dataclasses.replace(self, tracking=dataclasses.replace(self.tracking, **changes))


DEFAULT_SETTINGS = TranscriptionSettings()
# Polyphonic instruments (piano, guitar): chords leave weak partial-sharing activations and
# hammer noise, so tracking is stricter; a struck note needs an attack (max_rise).
POLYPHONIC_SETTINGS = TranscriptionSettings(
    ghost_ratio=0.7,  # an overtone ghost is clearly quieter than the note it sits on
    tracking=TrackingSettings(onset_threshold=0.3, min_duration=0.06, release_ratio=0.2, reonset_rise=0.1,
                              onset_shift=-0.02, local_floor=0.3, max_rise=0.2),
)
# Melodic instruments: Viterbi decoding keeps one pitch a frame; repeated notes of one pitch
# are found from the onset novelty, deep valleys anywhere and shallower ones at written repeats.
MELODIC_SETTINGS = TranscriptionSettings(
    use_novelty=True,
    tracking=TrackingSettings(onset_threshold=0.2, min_duration=0.06, release_ratio=0.2, reonset_rise=0.1,
                              onset_shift=-0.02, local_floor=0.3, novelty_threshold=2.0, novelty_snap=0.6,
                              reonset_dip=0.5, valley_dip=0.45, repeat_dip=0.75, notch_width=0.06,
                              stage_window=0.15),
)


def settings_for(instrument: "str | int | Instrument") -> TranscriptionSettings:
    """Default settings for an instrument: polyphonic or melodic tracking."""
    return POLYPHONIC_SETTINGS if resolve_instrument(instrument).polyphonic else MELODIC_SETTINGS


@dataclass(frozen=True)
class ScorePrior:
    """The aligned part as a prior on the activations (one-pass and long takes alike).

    Attributes
    ----------
    tolerance : float
        Seconds of slack around the part's notes (alignment error, attack and release).
    floor : float
        Mask value where the part does not expect the pitch (0 forbids, 1 ignores the part).
    mask_penalty : float
        Weight of the L1 prior on unexpected activations.
    unexpected_factor : float
        Onset threshold multiplier where the part does not expect the pitch (>= 1).
    expected_factor : float
        Onset threshold multiplier where it does (dual threshold; in (0, 1]).
    ghost_ratio : float
        An unwritten note on an overtone of a note starting with it must be this times as loud.
    repeat_gap : float
        Seconds of rest between two written notes of one pitch that still make a repeat.
    """

    # DTW alignment error on the tuning split stays within 0.1 s
    tolerance: float = 0.1
    # unexpected pitches are discouraged, not forbidden: wrong notes must still show
    floor: float = 0.3
    # a light prior: heavier ones hid real wrong notes on the deviation takes
    mask_penalty: float = 0.1
    # any stricter threshold for unwritten pitches hid real wrong and extra notes
    unexpected_factor: float = 1.0
    # quiet written notes are recovered at half the blind threshold (Benetos et al. 2012)
    expected_factor: float = 0.5
    # a ghost on an overtone must be louder than its note; wrong notes an octave off still show
    ghost_ratio: float = 1.2
    # a quaver rest between two notes of one pitch is still a repeat at common tempi
    repeat_gap: float = 0.25

    def __post_init__(self):
        validate_score_prior(self)


def validate_score_prior(prior: ScorePrior) -> None:
    """Check the ranges of a :class:`ScorePrior` (ValueError naming the field)."""
    if not 0.0 <= prior.floor <= 1.0:
        raise InputError(f"floor must be in range 0..1, got {prior.floor}")
    if prior.tolerance < 0 or prior.repeat_gap < 0:
        raise InputError(f"tolerance and repeat_gap must be >= 0 seconds, got {prior.tolerance}, {prior.repeat_gap}")
    if prior.unexpected_factor < 1:
        raise InputError(f"unexpected_factor must be >= 1, got {prior.unexpected_factor}")
    if not 0 < prior.expected_factor <= 1:
        raise InputError(f"expected_factor must be in range (0, 1], got {prior.expected_factor}")
    if prior.mask_penalty < 0:
        raise InputError(f"mask_penalty must be >= 0, got {prior.mask_penalty}")


SCORE_PRIOR = ScorePrior()
#: The 0.1 dict of the informed settings, read-only (use :data:`SCORE_PRIOR`).
INFORMED_DEFAULTS = types.MappingProxyType(dataclasses.asdict(SCORE_PRIOR))


@dataclass(frozen=True)
class FaintSettings:
    """"To check by ear": written notes the activations show only faintly.

    Attributes
    ----------
    factor : float
        Onset, offset and re-onset levels are this times the draft's (0 < factor <= 1).
    reonset_dip : float
        A faint repeat needs only a shallow dip.
    min_duration : float
        Seconds; shorter than the draft's, a faint note is often clipped by its neighbours.
    restrike_level, restrike_contrast : float
        Struck and plucked instruments: an onset-novelty peak of the pitch inside its own draft
        note, at least this high (novelty scaled to its 99.5th percentile) and this many times
        the note's median novelty, is a key struck again while it rings.
    restrike_delay : float
        Seconds after a draft note's start before a restrike is looked for (its own attack).
    """

    # a third of the blind levels found quiet written notes without inventing any
    factor: float = 0.3
    reonset_dip: float = 0.9
    min_duration: float = 0.03
    # a restrike's partials gain energy at once even while the activation hardly moves
    restrike_level: float = 0.2
    restrike_contrast: float = 4.0
    restrike_delay: float = 0.1

    def __post_init__(self):
        if not 0 < self.factor <= 1:
            raise InputError(f"factor must be in range (0, 1], got {self.factor}")


FAINT_SETTINGS = FaintSettings()
