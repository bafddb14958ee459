"""Sub-harmonic check of a melodic draft: is a note at pitch *p* really a lower note?

Double reeds and other winds with a weak fundamental (oboe, bassoon) make a harmonic
dictionary explain a note at *q* with the template of one of its partials, *p = q + 12*,
*q + 19* or *q + 28* (2nd, 3rd, 5th partial): the templates of *q* expect a strong
fundamental that is not there. The audio still tells them apart: a note at *q* has
partials that *p* has not (for *q = p − 12*, its odd partials: *p − 12*, *p + 7*,
*p + 16*, ...). For each note of a one-line draft, the median spectrum over the note is
read at those partials; when, for one divisor *h*, they hold at least ``ratio`` of the
energy of *p*'s own first partials, and ``contrast`` times what the other divisors' own
partials hold (so a broadband noise or a ringing previous note does not count), the note
is moved to *q*. Half of what sounded just before the note (the previous note ringing in
the room) is taken off the note's spectrum first.

Measured on the tuning split of the world corpus (melodies, 57 takes, 1,200 draft notes):
128 of the 145 notes placed on a partial of the played note were moved to the played
pitch, no right note was moved (5 without taking off the previous note's tail: room takes).
"""

from __future__ import annotations

import dataclasses

import numpy as np

from ..notes import Note

__all__ = ["subharmonic_scores", "correct_subharmonics", "DIVISORS"]

#: Partials a weak-fundamental note is taken for: 2nd (octave), 3rd (twelfth), 4th, 5th.
DIVISORS = (2, 3, 4, 5)
#: Frames before the onset read as the previous note's tail: from 6 to 2 frames before (about 58 ms).
BEFORE_FRAMES = (6, 2)


def _energy(spectrum: np.ndarray, semitones: np.ndarray, positions: list[float]) -> np.ndarray:
    """Peak of ``spectrum`` within one bin of each position (MIDI pitch units; outside: left out)."""
    step = float(semitones[1] - semitones[0]) if len(semitones) > 1 else 1.0
    out = []
    for s in positions:
        i = int(round((s - semitones[0]) / step))
        if 1 <= i < len(spectrum) - 1:
            out.append(spectrum[i - 1:i + 2].max())
    return np.asarray(out, float)


def subharmonic_scores(spectrum: np.ndarray, pitch: int, semitones: np.ndarray, *, lowest: int,
                       n_partials: int = 8) -> dict[int, float]:
    """For each divisor *h*: energy at the partials of *q = pitch − 12·log2 h* (rounded) that are
    not partials of ``pitch``, over the energy of ``pitch``'s first four partials.

    Parameters
    ----------
    spectrum : np.ndarray (n_bins,)
        Magnitude spectrum on the log-frequency axis ``semitones`` (MIDI pitch of each bin).
    pitch : int
    semitones : np.ndarray (n_bins,)
        Evenly spaced.
    lowest : int
        Lowest pitch of the instrument: candidates below it are NaN.
    n_partials : int
        Partials of *q* read (the 1st to the ``n_partials``-th, multiples of *h* left out).
    """
    own = _energy(spectrum, semitones, [pitch + 12 * np.log2(k) for k in range(1, 5)])
    scores = {}
    for h in DIVISORS:
        q = pitch - int(round(12 * np.log2(h)))
        extra = _energy(spectrum, semitones, [q + 12 * np.log2(k) for k in range(1, n_partials + 1) if k % h])
        ok = q >= lowest and own.size and own.mean() > 0 and extra.size
        scores[h] = float(extra.mean() / own.mean()) if ok else float("nan")
    return scores


def _lower_pitch(scores: dict[int, float], pitch: int, ratio: float, contrast: float) -> int | None:
    valid = {h: v for h, v in scores.items() if np.isfinite(v)}
    if not valid:
        return None
    best = max(valid, key=valid.get)
    # the 2nd and 4th divisors share partials (q4's even partials are q2's): not a contrast
    others = [v for h, v in valid.items() if h != best and {h, best} != {2, 4}]
    floor = float(np.median(others)) if others else 0.0
    if valid[best] >= ratio and valid[best] >= contrast * floor:
        return pitch - int(round(12 * np.log2(best)))
    return None


def correct_subharmonics(notes: list[Note], V: np.ndarray, frequencies: np.ndarray, frame_times: np.ndarray, *,
                         lowest: int, ratio: float, contrast: float, before: float = 0.0) -> list[Note]:
    """Move each note of a one-line draft that sits on a partial of a lower played note to that note.

    Parameters
    ----------
    notes : list of Note
    V : np.ndarray (n_bins, n_frames)
        Magnitude spectrogram on the log-frequency axis ``frequencies`` (Hz).
    frame_times : np.ndarray (n_frames,)
        Seconds.
    lowest : int
        Lowest pitch the instrument plays (templates of the dictionary).
    ratio, contrast : float
        See the module docstring; ``ratio`` 0 disables the check.
    before : float
        This share of the median spectrum of the frames just before the note (what still rings
        from the previous note: a room's tail) is taken off the note's spectrum first.
    """
    if ratio <= 0 or not notes:
        return list(notes)
    semitones = 69.0 + 12.0 * np.log2(np.asarray(frequencies, float) / 440.0)
    semitones -= semitones[0] - round(float(semitones[0]))  # bins are centred on the take's tuning
    out = []
    for n in notes:
        a, b = np.searchsorted(frame_times, [n.onset, n.offset])
        a = min(int(a), V.shape[1] - 1)
        spectrum = np.median(V[:, a:max(int(b), a + 1)], axis=1)
        if before > 0 and a >= BEFORE_FRAMES[1]:
            tail = np.median(V[:, a - BEFORE_FRAMES[0]:a - BEFORE_FRAMES[1] + 1], axis=1)
            spectrum = np.maximum(spectrum - before * tail, 0.0)
        lower = _lower_pitch(subharmonic_scores(spectrum, n.pitch, semitones, lowest=lowest), n.pitch,
                             ratio, contrast)
        out.append(n if lower is None else dataclasses.replace(n, pitch=lower))
    return out
