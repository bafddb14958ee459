"""Harmonic pitch-template dictionaries: fixed, semi-learned, saved and loaded.

Model
-----
Template *k* (MIDI pitch p_k, fundamental f0 = 440·2**((p_k − 69)/12) Hz, shifted
by the take's tuning) is a sum of partials

    W[:, k] = Σ_n a[k, n] · G[:, k, n],

where partial *n* sits at f_n = n·f0·√(1 + B·n²) (stiff-string inharmonicity,
B from the instrument preset; Fletcher, J. Acoust. Soc. Am. 36, 1964) and
``G[:, k, n]`` is a lobe on the spectrogram's log-frequency axis: a Gaussian in
bins whose width follows the variable-Q filter bandwidth at f_n (so a partial
covers what one sinusoid covers in the spectrogram). Lobes are truncated at
±3 standard deviations: outside them the template is exactly zero.

Semi-learned adaptation changes only the partial amplitudes ``a`` (multiplicative
updates, so zeros stay zero and every template stays harmonic), then templates
are re-normalised to unit sum.

Conventions
-----------
``W`` is (n_bins, n_pitches) float32 with each column summing to 1 (the scale
lives in H). ``pitches`` are MIDI numbers.
"""

from __future__ import annotations

import io
import json
import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import DictionaryError, InputError
from ..transcription.instruments import Instrument, resolve_instrument
from ..safeio import write_bytes
from ..features.spectrogram import Spectrogram

__all__ = [
    "Dictionary",
    "harmonic_dictionary",
    "adapt_dictionary",
    "save_dictionary",
    "load_dictionary",
    "validate_dictionary",
]

_EPS = np.finfo(np.float32).eps
_FORMAT = "takescribe-dictionary"
_FORMAT_VERSION = 1


@dataclass(frozen=True)
class Dictionary:
    """A harmonic dictionary with its metadata.

    Attributes
    ----------
    W : np.ndarray (n_bins, n_pitches) float32
        Templates, columns sum to 1.
    pitches : np.ndarray (n_pitches,) int
        MIDI pitch of each template.
    frequencies : np.ndarray (n_bins,)
        Bin centre frequencies in Hz the templates were built for.
    instrument : str
        Preset name.
    program : int
        General MIDI program.
    partial_amplitudes : np.ndarray (n_pitches, n_partials)
        Amplitudes ``a`` of the model.
    lobes : np.ndarray (n_bins, n_pitches, n_partials) float32
        Partial lobes ``G``; ``W = einsum('fkn,kn->fk', G, a)``.
    adapted : bool
        Whether the amplitudes were learned from audio.
    """

    W: np.ndarray
    pitches: np.ndarray
    frequencies: np.ndarray
    instrument: str
    program: int
    partial_amplitudes: np.ndarray
    lobes: np.ndarray = field(repr=False)
    adapted: bool = False

    @property
    def n_pitches(self) -> int:
        return int(self.W.shape[1])

    def with_amplitudes(self, amplitudes: np.ndarray, *, adapted: bool = True) -> "Dictionary":
        """A copy whose templates are rebuilt from new partial amplitudes."""
        amplitudes = np.asarray(amplitudes, dtype=np.float32)
        W = np.einsum("fkn,kn->fk", self.lobes, amplitudes, optimize=True).astype(np.float32)
        norms = W.sum(axis=0, keepdims=True)
        norms[norms <= 0] = 1.0
        return Dictionary(
            W=W / norms,
            pitches=self.pitches.copy(),
            frequencies=self.frequencies.copy(),
            instrument=self.instrument,
            program=self.program,
            partial_amplitudes=amplitudes / norms.ravel()[:, None],
            lobes=self.lobes,
            adapted=adapted,
        )

    def retuned(self, frequencies: np.ndarray) -> "Dictionary":
        """The same partial amplitudes on another frequency axis (e.g. another take's tuning)."""
        base = harmonic_dictionary(frequencies, instrument=self.instrument, pitches=self.pitches)
        n = min(base.partial_amplitudes.shape[1], self.partial_amplitudes.shape[1])
        amps = np.zeros_like(base.partial_amplitudes)
        amps[:, :n] = self.partial_amplitudes[:, :n]
        # partials beyond the new axis have no lobe: they vanish in with_amplitudes
        return Dictionary(
            W=base.W, pitches=base.pitches, frequencies=base.frequencies, instrument=self.instrument,
            program=self.program, partial_amplitudes=base.partial_amplitudes, lobes=base.lobes,
        ).with_amplitudes(amps, adapted=self.adapted)


def _lobe_width_bins(freqs: np.ndarray, bins_per_octave: int) -> np.ndarray:
    """Standard deviation, in bins, of one partial's lobe at ``freqs`` Hz.

    librosa's VQT filter bandwidth is ``alpha·f + gamma`` with
    ``gamma = 24.7·alpha/0.108`` (ERB-based default); in bins of a log axis that is
    ``bins_per_octave·log2(1 + bandwidth/f)``. The magnitude response of the VQT to a
    steady sinusoid, measured at 55, 220, 880 and 3520 Hz, is close to a Gaussian whose
    standard deviation is 0.87–1.0 times that width (test_dictionary checks the fit).
    """
    r = 2.0 ** (1.0 / bins_per_octave)
    alpha = (r * r - 1) / (r * r + 1)
    gamma = 24.7 * alpha / 0.108
    bandwidth = alpha * freqs + gamma
    width_bins = bins_per_octave * np.log2(1.0 + bandwidth / freqs)
    return np.maximum(0.9 * width_bins, 0.5)


def harmonic_dictionary(
    frequencies: np.ndarray | Spectrogram,
    *,
    instrument: "str | int | Instrument" = "piano",
    pitches: np.ndarray | None = None,
    tuning: float = 0.0,
) -> Dictionary:
    """Build the fixed harmonic dictionary of an instrument preset.

    Parameters
    ----------
    frequencies : np.ndarray (n_bins,) or Spectrogram
        Bin centre frequencies in Hz (log-spaced). With a Spectrogram, its
        frequencies and tuning are used.
    instrument : str, int or Instrument
        Preset name or GM program (see :func:`takescribe.instruments.resolve_instrument`).
    pitches : array of int, optional
        MIDI pitches of the templates; defaults to the preset's range, limited to
        pitches whose fundamental lies on the frequency axis.
    tuning : float
        Tuning offset in semitones added to every fundamental (ignored when a
        Spectrogram is given: its own tuning is used).

    Returns
    -------
    Dictionary
    """
    if isinstance(frequencies, Spectrogram):
        tuning = frequencies.tuning
        frequencies = frequencies.frequencies
    frequencies = np.asarray(frequencies, dtype=float)
    if frequencies.ndim != 1 or len(frequencies) < 12:
        raise InputError(f"frequencies must be a 1-D axis of at least 12 bins, got shape {frequencies.shape}")
    ratios = frequencies[1:] / frequencies[:-1]
    if not np.allclose(ratios, ratios[0], rtol=1e-4):
        raise InputError("frequencies must be log-spaced (a constant ratio between bins)")
    bins_per_octave = int(round(1.0 / np.log2(ratios[0])))
    preset = resolve_instrument(instrument)
    if pitches is None:
        pitches = preset.pitches
    pitches = np.asarray(pitches, dtype=int)
    f0 = 440.0 * 2.0 ** ((pitches + tuning - 69.0) / 12.0)
    fmin, fmax = frequencies[0], frequencies[-1]
    keep = (f0 >= fmin * 2 ** (-0.5 / 12)) & (f0 <= fmax)
    pitches, f0 = pitches[keep], f0[keep]
    if len(pitches) == 0:
        raise InputError("no template pitch of this instrument lies on the frequency axis")
    n_partials = preset.n_partials
    n = np.arange(1, n_partials + 1, dtype=float)
    B = preset.inharmonicity_for(pitches)
    fn = n[None, :] * f0[:, None] * np.sqrt(1.0 + B[:, None] * n[None, :] ** 2)  # (K, N)
    amps = n[None, :] ** (-preset.rolloff) * np.where(n % 2 == 1, preset.odd_weight, preset.even_weight)[None, :]
    amps = np.broadcast_to(amps, fn.shape).copy()
    amps[fn > fmax * 2 ** (0.5 / 12)] = 0.0
    positions = bins_per_octave * np.log2(fn / fmin)  # (K, N) fractional bin index
    sigma = _lobe_width_bins(fn, bins_per_octave)
    b = np.arange(len(frequencies), dtype=float)[:, None, None]
    z = (b - positions[None]) / sigma[None]
    G = np.where(np.abs(z) <= 3.0, np.exp(-0.5 * z * z), 0.0).astype(np.float32)  # (F, K, N)
    G[:, amps == 0.0] = 0.0
    base = Dictionary(
        W=np.zeros((len(frequencies), len(pitches)), np.float32),
        pitches=pitches,
        frequencies=frequencies,
        instrument=preset.name,
        program=preset.program,
        partial_amplitudes=amps.astype(np.float32),
        lobes=G,
    )
    return base.with_amplitudes(amps, adapted=False)


def adapt_dictionary(
    V: np.ndarray,
    dictionary: Dictionary,
    H: np.ndarray,
    *,
    n_iter: int = 20,
    beta: float = 1.0,
    min_activation: float = 0.0,
) -> Dictionary:
    """Adapt the partial amplitudes to a spectrogram, keeping every template harmonic.

    Multiplicative updates of the amplitudes ``a`` of ``W = Σ_n a[:, n] G[:, :, n]``
    for the β-divergence with H fixed (the parametric update of the harmonic NMF
    model, e.g. Vincent, Bertin and Badeau, IEEE TASLP 18(3), 2010, in its simplest
    form). Lobes (where partials sit) never move; an amplitude that is zero stays zero.
    Pitches whose total activation is below ``min_activation`` times the largest keep
    their preset amplitudes.

    Parameters
    ----------
    V : np.ndarray (n_bins, n_frames)
    dictionary : Dictionary
    H : np.ndarray (n_pitches, n_frames)
        Activations from a first pass with ``dictionary.W``.
    n_iter : int
    beta : float
        β of the divergence (1 = KL, 2 = Euclidean).

    Returns
    -------
    Dictionary
        With ``adapted=True``.
    """
    V = np.asarray(V, dtype=np.float32)
    H = np.asarray(H, dtype=np.float32)
    if H.shape != (dictionary.n_pitches, V.shape[1]):
        raise InputError(f"H must have shape {(dictionary.n_pitches, V.shape[1])}, got {H.shape}")
    G = dictionary.lobes
    a = dictionary.partial_amplitudes.astype(np.float32).copy()
    totals = H.sum(axis=1)
    active = totals > max(min_activation * totals.max(initial=0.0), 0.0)
    if not np.any(active):
        return dictionary
    Ga = G[:, active, :]
    Ha = H[active]
    a_act = a[active]
    for _ in range(n_iter):
        W = np.einsum("fkn,kn->fk", Ga, a_act, optimize=True)
        Lam = W @ Ha + _EPS
        if beta == 1.0:
            num_fk = (V / Lam) @ Ha.T
            den_fk = np.broadcast_to(Ha.sum(axis=1)[None, :], num_fk.shape)
        else:
            num_fk = (V * Lam ** (beta - 2.0)) @ Ha.T
            den_fk = (Lam ** (beta - 1.0)) @ Ha.T
        num = np.einsum("fkn,fk->kn", Ga, num_fk, optimize=True)
        den = np.einsum("fkn,fk->kn", Ga, den_fk, optimize=True) + _EPS
        a_act *= num / den
    a[active] = a_act
    return dictionary.with_amplitudes(a, adapted=True)


def validate_dictionary(dictionary: Dictionary, spectrogram: Spectrogram | None = None) -> Dictionary:
    """Check a dictionary's arrays agree and, if given, that it fits ``spectrogram``."""
    if not isinstance(dictionary, Dictionary):
        raise TypeError(f"dictionary must be a Dictionary, got {type(dictionary).__name__}")
    F, K = dictionary.W.shape
    if dictionary.pitches.shape != (K,) or dictionary.frequencies.shape != (F,):
        raise DictionaryError("dictionary arrays disagree: W, pitches and frequencies have inconsistent shapes")
    if not np.all(np.isfinite(dictionary.W)) or np.any(dictionary.W < 0):
        raise DictionaryError("dictionary templates must be finite and non-negative")
    if spectrogram is not None and spectrogram.V.shape[0] != F:
        raise DictionaryError(
            f"dictionary has {F} frequency bins but the spectrogram has {spectrogram.V.shape[0]}; "
            "it was made for another analysis setting"
        )
    return dictionary


def save_dictionary(dictionary: Dictionary, path: str | os.PathLike, *, force: bool = False) -> Path:
    """Save a dictionary to an ``.npz`` file (atomic; refuses to overwrite without ``force``)."""
    meta = {
        "format": _FORMAT,
        "version": _FORMAT_VERSION,
        "instrument": dictionary.instrument,
        "program": int(dictionary.program),
        "adapted": bool(dictionary.adapted),
    }
    buffer = io.BytesIO()
    np.savez_compressed(
        buffer,
        meta=np.array(json.dumps(meta)),
        pitches=dictionary.pitches,
        frequencies=dictionary.frequencies,
        partial_amplitudes=dictionary.partial_amplitudes,
    )
    return write_bytes(path, buffer.getvalue(), force=force)


def load_dictionary(path: str | os.PathLike, *, frequencies: np.ndarray | None = None) -> Dictionary:
    """Load a dictionary saved by :func:`save_dictionary`.

    The file stores the partial amplitudes, not the lobes, so the templates can be
    rebuilt on another frequency axis (another take's tuning) with ``frequencies``.

    Raises
    ------
    DictionaryError
        If the file is missing, not a takescribe dictionary, or damaged.
    """
    path = Path(path)
    if not path.is_file():
        raise DictionaryError(f"{path}: dictionary file not found; create one with 'takescribe dictionary learn'")
    try:
        with np.load(path, allow_pickle=False) as data:
            meta = json.loads(str(data["meta"]))
            pitches = np.asarray(data["pitches"], dtype=int)
            stored_freqs = np.asarray(data["frequencies"], dtype=float)
            amps = np.asarray(data["partial_amplitudes"], dtype=np.float32)
    except (OSError, ValueError, KeyError, json.JSONDecodeError, EOFError) as exc:
        raise DictionaryError(f"{path}: not a takescribe dictionary file ({exc})") from exc
    if meta.get("format") != _FORMAT:
        raise DictionaryError(f"{path}: not a takescribe dictionary file (format {meta.get('format')!r})")
    if amps.shape[0] != len(pitches) or not np.all(np.isfinite(amps)) or np.any(amps < 0):
        raise DictionaryError(f"{path}: damaged dictionary (partial amplitudes do not fit the pitches)")
    axis = stored_freqs if frequencies is None else np.asarray(frequencies, dtype=float)
    tuning = 0.0
    base = harmonic_dictionary(axis, instrument=meta["instrument"], pitches=pitches, tuning=tuning)
    keep = np.isin(pitches, base.pitches)
    amps = amps[keep]
    n = min(amps.shape[1], base.partial_amplitudes.shape[1])
    full = np.zeros_like(base.partial_amplitudes)
    full[:, :n] = amps[:, :n]
    full[base.partial_amplitudes == 0] = 0.0
    out = base.with_amplitudes(full, adapted=bool(meta.get("adapted", True)))
    return Dictionary(**{**out.__dict__, "program": int(meta.get("program", out.program))})
