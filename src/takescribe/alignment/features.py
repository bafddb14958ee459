"""The alignment's features: chroma and decaying onset chroma of the take and of the part.

See :mod:`takescribe.alignment.align` (Method, step 1) for what they are and why.
"""

from __future__ import annotations

import numpy as np
import scipy.fft
import scipy.sparse
from scipy.ndimage import maximum_filter1d

from ..audio.load import frames_segment, release_samples
from ..pitch import PIANO_HIGHEST, PIANO_LOWEST
from ..reference.part import Reference
from .settings import SETTINGS

__all__ = ["take_features", "reference_features", "LOWEST_PITCH", "HIGHEST_PITCH"]

LOWEST_PITCH, HIGHEST_PITCH = PIANO_LOWEST, PIANO_HIGHEST


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
    release = SETTINGS.release_seconds
    harmonics = np.arange(1, SETTINGS.rendered_partials + 1)
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
            env = (np.exp(-t / SETTINGS.envelope_seconds) * np.where(t > held, np.exp(-(t - held) / release), 1.0)
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
    sounding = total > ref * 10 ** (SETTINGS.silence_db / 10)
    classes = [(np.arange(energy_chroma.shape[0]) + LOWEST_PITCH) % 12 == c for c in range(12)]
    step = 8192  # frames at a time: the compressed energies never exist for the whole take at once
    folded = np.zeros((12, n_frames), dtype=np.float32)
    for a in range(0, n_frames, step):
        logc = np.log1p(SETTINGS.compression * energy_chroma[:, a:a + step] / ref)
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
        logo = np.log1p(SETTINGS.compression * energy_onset[:, a:a + step] / ref_o)
        rise = np.maximum(0.0, np.diff(logo, axis=1, prepend=previous))
        previous = logo[:, -1:]
        for c in range(12):
            onset[c, a:a + step] = rise[classes[c]].sum(axis=0)
    onorm = np.linalg.norm(onset, axis=0)
    local = maximum_filter1d(onorm, size=max(3, int(2 * SETTINGS.local_norm_seconds * frame_rate) | 1))
    floor = SETTINGS.onset_floor * float(np.percentile(onorm, 99)) if onorm.size else 0.0
    onset = onset / np.maximum(local, max(floor, 1e-12))[None, :]
    n_decay = max(2, int(round(SETTINGS.onset_decay_seconds * frame_rate)))
    weights = np.sqrt(np.linspace(1.0, 0.0, n_decay, endpoint=False))
    decayed = onset.copy()
    for k in range(1, n_decay):
        decayed[:, k:] = np.maximum(decayed[:, k:], onset[:, :-k] * weights[k])
    floor = float(np.percentile(total, 5))
    above_floor = total > SETTINGS.noise_margin * floor if floor < ref * 10 ** (SETTINGS.noise_floor_db / 10) else np.ones_like(sounding)
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
