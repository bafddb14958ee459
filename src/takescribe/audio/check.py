"""Recording check: what a take's recording can support, measured before any comparison.

:func:`check_recording` estimates, from the signal alone,

- the **reverberation time** ``rt60_s``: from the free decays that follow note releases (and
  the end of the take). A decay in a room cannot be faster than the room's own decay, so the
  fastest decays observed estimate the room's RT60; in a dry recording they are the
  instruments' releases (a few tenths of a second);
- the **noise floor** ``noise_floor_db`` (dBFS) and the **signal-to-noise ratio** ``snr_db``;
- the **peak level** ``peak_dbfs`` and the **clipped fraction** ``clipped_fraction``: samples in
  flattened tops (several equal samples at the take's extreme level, also below full scale,
  as a limiter or a clipped stage before a gain change leaves them);
- the **bandwidth** ``bandwidth_hz``: the highest frequency up to which the music rises
  clearly above the recording's floor (a phone's band limit, a low-rate codec, loud noise);

and, from these, ``limits``: the kinds of finding the recording cannot support (note
lengths in a reverberant room, soft notes under loud noise, pitches of high notes through a
narrow band, anything under heavy clipping), each with the reason in plain words.

Conventions
-----------
- ``y`` is mono float audio (full scale 1.0), ``sr`` in Hz; levels in dB relative to full
  scale (dBFS: a full-scale square wave is 0 dBFS, a full-scale sine -3 dBFS).
- Frame powers are mean squares over ``frame_s`` windows every ``hop_s``.
- RT60 is the time for a 60 dB fall of the energy, extrapolated from the slope of a fall of
  at least ``min_drop_db`` (ISO 3382-1 defines T20 and T30 the same way on a room's impulse
  response, from the slope of Schroeder's backward integral between -5 dB and -25 / -35 dB).
- Finding kinds in ``limits`` use the comparison's names (``held_short``, ``held_long``,
  ``missed``, ``extra``, ``wrong_pitch``, ``early``, ``late``, ...).

The check makes no finding about the player. It tells the comparison (and the teacher
reading the report) which findings the recording can back up; the decision to hide or mark
them is the caller's.

References
----------
ISO 3382-1:2009, Acoustics - Measurement of room acoustic parameters - Part 1: Performance spaces.
M. R. Schroeder, "New method of measuring reverberation time", J. Acoust. Soc. Am. 37 (1965).
H. W. Loellmann, E. Yilmaz, M. Jeub, P. Vary, "An improved algorithm for blind reverberation
time estimation", IWAENC 2010 (blind estimation from the free decays of running signals).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .load import validate_audio

__all__ = ["CheckSettings", "CHECK_SETTINGS", "Limit", "RecordingCheck", "check_recording",
           "estimate_rt60", "noise_and_snr", "clipped_fraction", "estimate_bandwidth",
           "recording_limits"]

_TINY = 1e-12


@dataclass(frozen=True)
class CheckSettings:
    """Tuned numbers of the recording check (tuned on the world corpus' tuning split)."""

    frame_s: float = 0.05            # frame for levels: a few periods of the lowest piano notes
    hop_s: float = 0.0125            # decay slopes need a fine time grid
    noise_percentile: float = 1.0    # the quietest 1 % of frames hold the floor (the lead-in, rests)
    active_margin_db: float = 10.0   # frames this far above the floor count as music
    decay_bands_hz: tuple[float, ...] = (500.0, 1000.0, 2000.0, 4000.0)  # octave bands for decays
    min_drop_db: float = 25.0        # the fitted fall (between T20's and T30's ranges)
    decay_floor_margin_db: float = 15.0  # the fit stays this far above the band's floor
    decay_tolerance_db: float = 6.0  # rises smaller than this do not end a decay (tails flutter)
    decay_skip_db: float = 10.0      # the fit starts this far below the peak (past the direct sound)
    dynamic_range_db: float = 80.0   # decays are followed at most this far below a band's peak
    smooth_frames: int = 5           # moving average of band energies (60 ms): tails fluctuate
    rt60_percentile: float = 10.0    # the fastest decays bound the room's decay from above
    min_decays: int = 3              # fewer decays: no estimate
    clip_min_run: int = 4            # equal samples in a row that count as a flattened top
    clip_level: float = 0.98         # ... at this fraction of the take's peak or above
    bandwidth_range_db: float = 12.0  # a band's level must swing this much with the music
    bandwidth_low_hz: float = 1000.0  # bandwidth is searched above this frequency
    lengths_max_rt60_s: float = 1.0  # longer decays hide where notes stop
    timing_max_rt60_s: float = 2.0   # longer decays blur onsets of repeated and soft notes
    soft_min_snr_db: float = 20.0    # below this, soft notes sink into the noise
    pitch_min_bandwidth_hz: float = 5000.0  # below this, high notes keep too few partials
    max_clipped_fraction: float = 0.001  # above this, distortion partials look like notes


CHECK_SETTINGS = CheckSettings()


@dataclass(frozen=True)
class Limit:
    """Kinds of finding a recording cannot support, and why.

    ``min_level_db``: only notes softer than this (dB relative to the take's music level)
    are affected; ``above_pitch``: only notes above this MIDI pitch; ``None``: all notes.
    """

    kinds: tuple[str, ...]
    reason: str
    min_level_db: float | None = None
    above_pitch: int | None = None


@dataclass(frozen=True)
class RecordingCheck:
    """What :func:`check_recording` measured (see the module docstring for each quantity).

    ``rt60_s`` is ``None`` when the take holds fewer than ``min_decays`` usable decays;
    ``n_decays`` says how many were used.
    """

    rt60_s: float | None
    noise_floor_db: float
    snr_db: float
    peak_dbfs: float
    clipped_fraction: float
    bandwidth_hz: float
    n_decays: int = 0
    limits: tuple[Limit, ...] = field(default=())

    def limited_kinds(self) -> frozenset[str]:
        """Every finding kind some limit names (for at least some notes)."""
        return frozenset(k for lim in self.limits for k in lim.kinds)


# --------------------------------------------------------------------------- levels

def _frames(y: np.ndarray, sr: int, frame_s: float, hop_s: float) -> np.ndarray:
    """Mean-square power of frames (n_frames,), float64."""
    n = max(1, int(round(frame_s * sr)))
    hop = max(1, int(round(hop_s * sr)))
    x = np.asarray(y, dtype=np.float64)
    if len(x) < n:
        x = np.pad(x, (0, n - len(x)))
    c = np.concatenate([[0.0], np.cumsum(x * x)])
    starts = np.arange(0, len(x) - n + 1, hop)
    return (c[starts + n] - c[starts]) / n


def noise_and_snr(y: np.ndarray, sr: int, *, settings: CheckSettings = CHECK_SETTINGS) -> tuple[float, float]:
    """Noise floor (dBFS) and SNR (dB) of a take.

    The floor is the ``noise_percentile`` of the frame powers (the quietest frames: lead-in,
    rests, the end); the signal power is the mean power above the floor of the frames at least
    ``active_margin_db`` above it. Digital silence gives a floor of -120 dBFS.
    """
    p = _frames(y, sr, settings.frame_s, settings.frame_s / 2)
    floor = max(float(np.percentile(p, settings.noise_percentile)), 1e-12)
    active = p > floor * 10 ** (settings.active_margin_db / 10)
    if not active.any():
        return 10 * np.log10(floor), 0.0
    signal = float(np.mean(p[active] - floor))
    return 10 * np.log10(floor), 10 * np.log10(max(signal, _TINY) / floor)


# --------------------------------------------------------------------------- reverberation

def _band_envelopes(y: np.ndarray, sr: int, settings: CheckSettings) -> np.ndarray:
    """Octave-band energies in dB (n_bands, n_frames) on a ``hop_s`` grid, 46 ms Hann windows."""
    n_fft = int(2 ** np.round(np.log2(0.046 * sr)))
    hop = max(1, int(round(settings.hop_s * sr)))
    x = np.asarray(y, dtype=np.float64)
    if len(x) < n_fft:
        x = np.pad(x, (0, n_fft - len(x)))
    n_frames = 1 + (len(x) - n_fft) // hop
    idx = np.arange(n_fft)[None, :] + hop * np.arange(n_frames)[:, None]
    spec = np.abs(np.fft.rfft(x[idx] * np.hanning(n_fft), axis=1)) ** 2
    freqs = np.fft.rfftfreq(n_fft, 1.0 / sr)
    rows = []
    for fc in settings.decay_bands_hz:
        sel = (freqs >= fc / np.sqrt(2)) & (freqs < fc * np.sqrt(2))
        if fc * np.sqrt(2) > sr / 2 or not sel.any():
            continue
        rows.append(spec[:, sel].sum(axis=1))
    if not rows:
        return np.empty((0, n_frames))
    k = max(1, int(settings.smooth_frames))
    energy = np.array([np.convolve(r, np.ones(k) / k, mode="same") for r in rows])
    return 10 * np.log10(np.maximum(energy, _TINY))


def _decay_times(env: np.ndarray, hop_s: float, settings: CheckSettings) -> list[float]:
    """Decay times (s, extrapolated to 60 dB) of the free decays into the floor of one band.

    A decay starts at a local maximum and runs while the level does not rise by more than
    ``decay_tolerance_db`` above its lowest point so far; only decays that reach the band's
    floor (plus ``decay_floor_margin_db``) count - a decay cut short by the next note may be a
    held note's own slow decay, not the room's. The fit (least squares on the dB envelope)
    covers the last ``min_drop_db`` above the floor margin, at least ``decay_skip_db`` below the
    decay's start: the tail of a release, past the direct sound's drop, as T20 is fitted on a
    decay curve. The floor is the band's 5th percentile, but at most ``dynamic_range_db`` below
    its peak (the quantization noise of a clean file is no room).
    """
    floor = max(float(np.percentile(env, 5.0)), float(env.max()) - settings.dynamic_range_db)
    stop = floor + settings.decay_floor_margin_db
    tol = settings.decay_tolerance_db
    out = []
    n = len(env)
    i = 1
    while i < n - 1:
        if not (env[i] >= env[i - 1] and env[i] > env[i + 1]):
            i += 1
            continue
        j, low = i, env[i]
        while j + 1 < n and env[j + 1] <= low + tol and env[j + 1] > stop:
            j += 1
            low = min(low, env[j])
        reached = j + 1 < n and env[j + 1] <= stop
        hi = min(env[i] - settings.decay_skip_db, stop + settings.min_drop_db)
        if reached and hi - stop >= settings.min_drop_db - 1e-9:
            seg = env[i: j + 1]
            sel = np.flatnonzero((seg <= hi) & (seg > stop))
            if len(sel) >= 4:
                t = sel * hop_s
                slope = np.polyfit(t, seg[sel], 1)[0]
                if slope < 0:
                    out.append(-60.0 / slope)
        i = max(j, i + 1)
    return out


def estimate_rt60(y: np.ndarray, sr: int, *, settings: CheckSettings = CHECK_SETTINGS) -> tuple[float | None, int]:
    """Reverberation time (s) from the free decays of a take, and the number of decays used.

    Decays are found in octave bands (``decay_bands_hz``); the estimate is the
    ``rt60_percentile`` of their decay times, since a room lets no sound die away faster than
    its own decay (the fastest observed decays are the room's). ``None`` with fewer than
    ``min_decays`` decays (a take with no clear release, e.g. held with the sustain pedal).
    """
    env = _band_envelopes(y, sr, settings)
    times: list[float] = []
    for row in env:
        times += _decay_times(row, settings.hop_s, settings)
    if len(times) < settings.min_decays:
        return None, len(times)
    return float(np.percentile(times, settings.rt60_percentile)), len(times)


# --------------------------------------------------------------------------- clipping, bandwidth

def clipped_fraction(y: np.ndarray, *, settings: CheckSettings = CHECK_SETTINGS) -> float:
    """Fraction of samples in flattened tops.

    A flattened top is a run of at least ``clip_min_run`` equal samples (to 1e-6 of the peak)
    at ``clip_level`` of the take's peak or above, on either polarity. It finds clipping below
    full scale too (a clipped stage followed by a gain change); a take with no flat runs scores
    0. Lossy codecs smear flat tops, so clipping before an AAC or MP3 stage is not seen.
    """
    x = np.asarray(y, dtype=np.float64)
    peak = float(np.max(np.abs(x))) if x.size else 0.0
    if peak <= 0 or x.size < settings.clip_min_run:
        return 0.0
    high = np.abs(x) >= settings.clip_level * peak
    flat = (np.abs(np.diff(x)) <= 1e-6 * peak) & high[1:] & high[:-1]
    edges = np.diff(np.concatenate([[0], flat.astype(np.int8), [0]]))
    starts, ends = np.flatnonzero(edges == 1), np.flatnonzero(edges == -1)
    runs = ends - starts + 1  # equal steps + 1 = samples in the run
    return float(np.sum(runs[runs >= settings.clip_min_run]) / x.size)


def estimate_bandwidth(y: np.ndarray, sr: int, *, settings: CheckSettings = CHECK_SETTINGS) -> float:
    """Highest frequency (Hz) up to which the music still moves the spectrum.

    Third-octave bands from ``bandwidth_low_hz`` to the Nyquist frequency; a band carries
    music when its level swings by at least ``bandwidth_range_db`` between its quiet (10th
    percentile) and loud (95th percentile) frames. Above a phone's band limit or a codec's
    cut-off only a steady floor is left, so the swing collapses. Returns the upper edge of the
    highest band that swings (``bandwidth_low_hz`` when none does).
    """
    n_fft = int(2 ** np.round(np.log2(0.046 * sr)))
    hop = n_fft // 2
    x = np.asarray(y, dtype=np.float64)
    if len(x) < n_fft:
        x = np.pad(x, (0, n_fft - len(x)))
    n_frames = 1 + (len(x) - n_fft) // hop
    idx = np.arange(n_fft)[None, :] + hop * np.arange(n_frames)[:, None]
    spec = np.abs(np.fft.rfft(x[idx] * np.hanning(n_fft), axis=1)) ** 2
    freqs = np.fft.rfftfreq(n_fft, 1.0 / sr)
    total = spec.sum(axis=1)
    loud = total > np.percentile(total, 50)  # swings are judged between loud frames and all frames
    best = settings.bandwidth_low_hz
    fc = settings.bandwidth_low_hz * 2 ** (1 / 6)
    while fc * 2 ** (1 / 6) <= sr / 2:
        sel = (freqs >= fc * 2 ** (-1 / 6)) & (freqs < fc * 2 ** (1 / 6))
        band = 10 * np.log10(np.maximum(spec[:, sel].sum(axis=1), _TINY * max(total.max(), _TINY)))
        swing = np.percentile(band[loud], 95) - np.percentile(band, 10)
        if swing >= settings.bandwidth_range_db:
            best = fc * 2 ** (1 / 6)
        fc *= 2 ** (1 / 3)
    return float(min(best, sr / 2))


# --------------------------------------------------------------------------- the check

def _hz_to_midi(f: float) -> int:
    return int(np.floor(69 + 12 * np.log2(f / 440.0)))


def recording_limits(rt60_s: float | None, snr_db: float, bandwidth_hz: float, clipped: float, *,
                     settings: CheckSettings = CHECK_SETTINGS) -> tuple[Limit, ...]:
    """The kinds of finding a recording with these measurements cannot support."""
    out = []
    if rt60_s is not None and rt60_s > settings.lengths_max_rt60_s:
        out.append(Limit(("held_short", "held_long"),
                         f"the room rings for about {rt60_s:.1f} s after each note, so where notes "
                         "stop cannot be heard; note lengths were not judged"))
    if rt60_s is not None and rt60_s > settings.timing_max_rt60_s:
        out.append(Limit(("extra", "missed"),
                         f"in this very reverberant room ({rt60_s:.1f} s) soft and repeated notes "
                         "blur into the ringing of earlier ones", min_level_db=-12.0))
    if snr_db < settings.soft_min_snr_db:
        out.append(Limit(("missed", "extra"),
                         f"background noise only {snr_db:.0f} dB below the music: soft notes "
                         "cannot be told from the noise", min_level_db=-(snr_db - 6.0)))
    if bandwidth_hz < settings.pitch_min_bandwidth_hz:
        top = _hz_to_midi(bandwidth_hz / 3.0)
        out.append(Limit(("wrong_pitch",),
                         f"the recording stops at about {bandwidth_hz / 1000:.1f} kHz, so high notes "
                         "keep too few overtones to tell octaves apart", above_pitch=top))
    if clipped > settings.max_clipped_fraction:
        out.append(Limit(("extra", "wrong_pitch"),
                         f"{100 * clipped:.1f} % of the samples are clipped; the distortion adds "
                         "overtones that look like notes"))
    return tuple(out)


def check_recording(y: np.ndarray, sr: int, *, settings: CheckSettings = CHECK_SETTINGS) -> RecordingCheck:
    """Measure what a take's recording can support before it is compared with its part.

    Parameters
    ----------
    y : np.ndarray (n_samples,)
        Mono floating-point audio, full scale 1.0 (as :func:`load_audio` returns it).
    sr : int
        Sample rate in Hz.
    settings : CheckSettings
        Thresholds and analysis sizes (:data:`CHECK_SETTINGS`).

    Returns
    -------
    RecordingCheck
        ``rt60_s`` (s, or ``None``), ``noise_floor_db`` (dBFS), ``snr_db`` (dB),
        ``peak_dbfs``, ``clipped_fraction``, ``bandwidth_hz`` (Hz), ``n_decays`` and
        ``limits`` (see :func:`recording_limits`).

    Raises
    ------
    TypeError, AudioError
        As :func:`validate_audio` (not a float array, not mono, too short, NaN or inf).

    Examples
    --------
    >>> import numpy as np
    >>> sr = 22050
    >>> t = np.arange(2 * sr) / sr
    >>> y = np.where(t < 1.0, 0.5 * np.sin(2 * np.pi * 440 * t), 0.0)
    >>> check = check_recording(y, sr)
    >>> round(check.peak_dbfs, 1)
    -6.0
    """
    validate_audio(y, sr)
    peak = float(np.max(np.abs(y)))
    peak_dbfs = 20 * np.log10(max(peak, _TINY))
    floor_db, snr = noise_and_snr(y, sr, settings=settings)
    rt60, n_decays = estimate_rt60(y, sr, settings=settings)
    bandwidth = estimate_bandwidth(y, sr, settings=settings)
    clipped = clipped_fraction(y, settings=settings)
    return RecordingCheck(
        rt60_s=None if rt60 is None else round(float(rt60), 3), noise_floor_db=round(float(floor_db), 2),
        snr_db=round(float(snr), 2), peak_dbfs=round(float(peak_dbfs), 2), clipped_fraction=float(clipped),
        bandwidth_hz=round(float(bandwidth), 1), n_decays=int(n_decays),
        limits=recording_limits(rt60, snr, bandwidth, clipped, settings=settings))
