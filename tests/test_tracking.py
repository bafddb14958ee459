"""Note tracking, step by step (takescribe.transcription.tracking and .onsets).

Where an outside reference exists the step is checked against it: librosa's spectral-flux onset
strength (pitch novelty), librosa's local minima (valleys), librosa's onset detection (note
onsets of struck notes), a loop-based Viterbi decoder written from Rabiner's tutorial (melodic
decoding), and the harmonic series (the partials the ghost filter looks at). The invented
activations below are our own constructions (hop 10 ms unless said).
"""

from __future__ import annotations

import dataclasses

import librosa
import numpy as np
import pytest

from takescribe.errors import InputError
from takescribe.transcription.onsets import repeat_valleys
from takescribe.transcription.settings import MELODIC_SETTINGS, POLYPHONIC_SETTINGS, TrackingSettings
from takescribe.transcription.tracking import (activations_to_notes, monophonic_activations, pitch_novelty,
                                                suppress_harmonic_ghosts)
from takescribe.notes import Note

MELODIC = MELODIC_SETTINGS.tracking
# the melodic levels with none of the melodic special tests (each test below adds the one it checks)
PLAIN = TrackingSettings(onset_threshold=MELODIC.onset_threshold, offset_threshold=MELODIC.offset_threshold,
                         release_ratio=MELODIC.release_ratio, reonset_rise=MELODIC.reonset_rise,
                         reonset_dip=MELODIC.reonset_dip, min_fall=None)


def _plain(**changes) -> TrackingSettings:
    return dataclasses.replace(PLAIN, **changes)


# ----------------------------------------------------------------------------- steps against outside references


def test_pitch_novelty_is_librosa_spectral_flux_summed_over_each_template_band():
    # reference: librosa.onset.onset_strength_multi (lag 1, no max filter, no centring) on the
    # same log-compressed spectrogram, summed over bands; a template that is 1 on a band of bins
    # weighs exactly those bins.
    rng = np.random.default_rng(0)
    V = rng.random((40, 300)).astype(np.float32) ** 4
    bands = [slice(0, 6), slice(6, 17), slice(17, 40)]
    W = np.zeros((40, len(bands)), np.float32)
    for k, band in enumerate(bands):
        W[band, k] = 1.0
    ours = pitch_novelty(V, W, compression=100.0, scale=1.0)
    L = np.log1p(V * np.float32(100.0 / V.max()))
    theirs = np.vstack([librosa.onset.onset_strength_multi(S=L[band], lag=1, max_size=1, aggregate=np.sum,
                                                           center=False, detrend=False) for band in bands])
    np.testing.assert_allclose(ours, theirs, rtol=1e-4, atol=1e-5)


def test_repeat_valleys_with_no_depth_condition_are_librosas_local_minima():
    # reference: librosa.util.localmin (x[i] < x[i-1] and x[i] <= x[i+1]). With dip 1, no rise
    # and a one-frame window every interior local minimum is a valley and starts at its floor.
    rng = np.random.default_rng(1)
    for _ in range(20):
        seg = rng.random(200)
        ours = repeat_valleys(seg, np.ones(200, bool), np.zeros(200), 1.0, 1)
        theirs = np.nonzero(librosa.util.localmin(seg))[0]
        assert ours == [int(i) for i in theirs if 0 < i < len(seg) - 1]


def _viterbi_loop(prob: np.ndarray, transition: np.ndarray) -> np.ndarray:
    """Most likely state path, by the textbook recursion (Rabiner 1989, eq. 32-35), uniform start, in logs."""
    n_states, T = prob.shape
    log_t = np.log(transition)
    score = np.log(prob[:, 0]) - np.log(n_states)
    back = np.zeros((n_states, T), int)
    for t in range(1, T):
        cand = score[:, None] + log_t
        back[:, t] = np.argmax(cand, axis=0)
        score = cand[back[:, t], np.arange(n_states)] + np.log(prob[:, t])
    path = [int(np.argmax(score))]
    for t in range(T - 1, 0, -1):
        path.append(int(back[path[-1], t]))
    return np.array(path[::-1])


def test_melodic_decoding_keeps_the_viterbi_path_of_a_loop_decoder():
    rng = np.random.default_rng(2)
    Hn = rng.random((5, 120)) ** 3
    Hn[2, 30:70] += 1.0  # a held note, so the path has something to follow
    kept = monophonic_activations(Hn, silence_level=0.1, stay_probability=0.96)
    scores = np.vstack([np.full((1, 120), 0.1), Hn])
    prob = scores / scores.sum(axis=0, keepdims=True)
    transition = np.full((6, 6), 0.04 / 5)
    np.fill_diagonal(transition, 0.96)
    path = _viterbi_loop(prob, transition)
    expected = np.zeros_like(Hn)
    frames = np.nonzero(path > 0)[0]
    expected[path[frames] - 1, frames] = Hn[path[frames] - 1, frames]
    np.testing.assert_array_equal(kept, expected)
    assert (np.count_nonzero(kept, axis=0) <= 1).all()


def test_struck_note_onsets_agree_with_librosa_onset_detection():
    # Struck notes (instant attack, exponential decay), one pitch, at invented times; reference:
    # librosa.onset.onset_detect on the activation's positive difference (its peak picking). The
    # two agree within one frame (11.6 ms at this hop).
    hop = 256 / 22050
    times = np.arange(600) * hop
    starts = [0.3, 1.1, 1.9, 2.5, 3.6, 4.4, 5.5]
    a = sum(np.where(times >= s, np.exp(-(times - s) / 0.15), 0.0) * (0.6 + 0.4 * (i % 2)) for i, s in enumerate(starts))
    s = dataclasses.replace(POLYPHONIC_SETTINGS.tracking, onset_shift=0.0)
    ours = np.array([n.onset for n in activations_to_notes(a[None, :], np.array([60]), times, settings=s)])
    envelope = np.concatenate([[0.0], np.maximum(np.diff(a), 0.0)])
    theirs = librosa.onset.onset_detect(onset_envelope=envelope, sr=22050, hop_length=256, units="time",
                                        backtrack=False)
    assert len(ours) == len(theirs) == len(starts)
    assert np.max(np.abs(ours - theirs)) <= hop + 1e-9
    assert np.max(np.abs(ours - np.array(starts))) <= hop + 1e-9


def test_ghost_filter_intervals_are_the_2nd_3rd_and_4th_partials():
    # the harmonic series: partials 2, 3, 4 of f lie 12, 19 and 24 semitones above it (19.02,
    # rounded to the nearest key); librosa.hz_to_midi gives the same keys
    for pitch in (36, 48, 57):
        f = librosa.midi_to_hz(pitch)
        assert [int(np.round(librosa.hz_to_midi(n * f))) - pitch for n in (2, 3, 4)] == [12, 19, 24]
    loud, ghost, real = Note(1.0, 2.0, 48, 100), Note(1.02, 1.5, 67, 40), Note(1.02, 1.5, 64, 40)
    kept = suppress_harmonic_ghosts([loud, ghost, real], ratio=0.7)
    assert kept == [loud, real]  # 67 = 48 + 19 dropped; 64 (a major third, no low partial) kept


# ----------------------------------------------------------------------------- properties


def test_notes_do_not_depend_on_the_order_of_the_pitch_rows():
    rng = np.random.default_rng(4)
    times = np.arange(400) * 0.01
    H = np.zeros((6, 400))
    for k in range(6):
        for start in rng.choice(380, size=4, replace=False):
            H[k, start: start + 15] += rng.random() + 0.3
    pitches = np.arange(50, 56)
    order = rng.permutation(6)
    for s, poly in ((POLYPHONIC_SETTINGS.tracking, True), (MELODIC, False)):
        assert (activations_to_notes(H, pitches, times, settings=s, polyphonic=poly)
                == activations_to_notes(H[order], pitches[order], times, settings=s, polyphonic=poly))


def test_silence_and_tiny_inputs_give_no_notes():
    times = np.arange(50) * 0.01
    assert activations_to_notes(np.zeros((3, 50)), np.array([60, 61, 62]), times) == []
    assert activations_to_notes(np.ones((2, 1)), np.array([60, 61]), times[:1]) == []


def test_bad_inputs_name_the_problem():
    times = np.arange(20) * 0.01
    with pytest.raises(InputError, match="MIDI"):
        activations_to_notes(np.ones((1, 20)), np.array([440.0 * 2]), times)
    with pytest.raises(InputError, match="frame_times"):
        activations_to_notes(np.ones((1, 20)), np.array([60]), times[:10])
    with pytest.raises(InputError, match="part_repeats"):
        activations_to_notes(np.ones((2, 20)), np.array([60, 61]), times, part_repeats=np.zeros((1, 20), bool))


# ----------------------------------------------------------------------------- repeated notes of one pitch
# Two slow swells like two bow strokes. The rise after the valley (0.03 per frame) is too slow
# for the rise-after-dip test, so without the part's hint the two strokes stay one note.


def _strokes(valley: float, *, n_frames: int = 220, second: float = 0.9):
    times = np.arange(n_frames) * 0.01
    knots = [(0, 0.0), (10, 0.0), (30, 1.0), (95, 1.0), (110, valley), (130, second), (190, second), (200, 0.0),
             (n_frames - 1, 0.0)]
    H = np.interp(np.arange(n_frames), *zip(*knots))[None, :]
    return H, np.array([50]), times


def _zone(H, lo=90, hi=130):
    zone = np.zeros(H.shape, dtype=bool)
    zone[:, lo:hi] = True
    return zone


def test_expected_repeat_splits_two_bow_strokes_at_the_valley():
    H, pitches, times = _strokes(0.3)
    assert len(activations_to_notes(H, pitches, times, settings=PLAIN, polyphonic=False)) == 1
    notes = activations_to_notes(H, pitches, times, settings=PLAIN, polyphonic=False, part_repeats=_zone(H))
    assert len(notes) == 2
    # the second note starts on the fall into the valley (between the first stroke's end at
    # 0.95 s and the valley at 1.10 s), and the first note ends there
    assert 0.95 <= notes[1].onset <= 1.10
    assert notes[0].offset == pytest.approx(notes[1].onset)


def test_expected_repeat_keeps_a_held_note_whole():
    # the score is a prior, not a cage: a shallow swell (a held note's bow-pressure change)
    # under the expected repeat stays one note, and so does a deep valley away from the hint
    H, pitches, times = _strokes(0.7)
    assert len(activations_to_notes(H, pitches, times, settings=PLAIN, polyphonic=False, part_repeats=_zone(H))) == 1
    H, pitches, times = _strokes(0.3)
    zone = _zone(H, 150, 180)
    assert len(activations_to_notes(H, pitches, times, settings=PLAIN, polyphonic=False, part_repeats=zone)) == 1


def test_a_deep_valley_splits_a_melodic_note_without_the_part():
    # Without a part, only a deep valley (down to valley_dip of the swells around it) is a new
    # stroke; the part's expected repeat eases the split down to reonset_dip.
    s = _plain(valley_dip=MELODIC.valley_dip)
    for valley, expected in ((0.3, 2), (0.6, 1)):
        H, pitches, times = _strokes(valley)
        assert len(activations_to_notes(H, pitches, times, settings=s, polyphonic=False)) == expected, valley
    H, pitches, times = _strokes(0.42)  # 0.47 of the swell after it: only with the part's hint
    assert len(activations_to_notes(H, pitches, times, settings=s, polyphonic=False)) == 1
    assert len(activations_to_notes(H, pitches, times, settings=s, polyphonic=False, part_repeats=_zone(H))) == 2


def test_a_reattack_at_full_strength_splits_a_shallow_valley_where_the_part_repeats():
    # A tongued or re-bowed repeat dips only a little but comes back at full strength; the
    # modulation of a held note dips as much and comes back lower.
    assert MELODIC.reonset_dip < 0.65 <= MELODIC.repeat_dip
    s = _plain(valley_dip=MELODIC.valley_dip, repeat_dip=MELODIC.repeat_dip)
    H, pitches, times = _strokes(0.65, second=1.0)
    notes = activations_to_notes(H, pitches, times, settings=s, polyphonic=False, part_repeats=_zone(H))
    assert len(notes) == 2
    assert 0.95 <= notes[1].onset <= 1.10  # between the fall's start and the valley's floor
    assert len(activations_to_notes(H, pitches, times, settings=s, polyphonic=False)) == 1
    H, pitches, times = _strokes(0.65, second=0.9)  # comes back lower: a held note's modulation
    assert len(activations_to_notes(H, pitches, times, settings=s, polyphonic=False, part_repeats=_zone(H))) == 1


def test_a_narrow_notch_at_a_written_repeat_is_a_new_note_and_a_wide_swell_is_not():
    # a note that comes back lower after a valley of 0.55 (of the swells on both sides): 40 ms
    # wide at half depth it is the short gap of a tongued repeat; 200 ms wide, a held note's swell
    s = _plain(valley_dip=MELODIC.valley_dip, repeat_dip=MELODIC.repeat_dip, notch_width=MELODIC.notch_width)
    times = np.arange(220) * 0.01
    for half_width, expected in ((2, 2), (10, 1)):
        knots = [(0, 0), (10, 0), (20, 1.0), (110 - 2 * half_width, 1.0), (110, 0.5), (110 + 2 * half_width, 0.9),
                 (190, 0.9), (200, 0), (219, 0)]
        H = np.interp(np.arange(220), *zip(*knots))[None]
        notes = activations_to_notes(H, np.array([50]), times, settings=s, polyphonic=False, part_repeats=_zone(H))
        assert len(notes) == expected, half_width


def test_a_rise_in_two_stages_is_one_note_and_a_rise_after_a_fall_is_two():
    # a bowed note whose attack comes in two stages (bow noise, then the string speaking)
    # doubles its level within a few frames without falling first: min_fall keeps it whole
    times = np.arange(220) * 0.01
    two_stage = np.interp(np.arange(220), [0, 10, 20, 40, 44, 190, 200, 219], [0, 0, .3, .36, .8, .8, 0, 0])[None]
    with_fall = _plain(min_fall=MELODIC.min_fall)
    assert len(activations_to_notes(two_stage, np.array([50]), times, settings=PLAIN, polyphonic=False)) == 2
    assert len(activations_to_notes(two_stage, np.array([50]), times, settings=with_fall, polyphonic=False)) == 1
    fall_rise = np.interp(np.arange(220), [0, 10, 20, 60, 70, 74, 190, 200, 219], [0, 0, .8, .8, .3, .8, .8, 0, 0])[None]
    assert len(activations_to_notes(fall_rise, np.array([50]), times, settings=with_fall, polyphonic=False)) == 2


def test_an_attack_in_two_stages_with_a_dip_is_one_melodic_note():
    # a first swell to 0.4 dips to 0.3 and the tone then rises to 0.8 within 0.12 s of the start
    # (bow noise, then the string); two notes of equal strength 0.4 s apart are still two notes
    times = np.arange(220) * 0.01
    base = _plain(min_fall=MELODIC.min_fall)
    staged_settings = dataclasses.replace(base, stage_window=MELODIC.stage_window)
    staged = np.interp(np.arange(220), [0, 10, 18, 22, 26, 190, 200, 219], [0, 0, .4, .3, .8, .8, 0, 0])[None]
    assert len(activations_to_notes(staged, np.array([50]), times, settings=base, polyphonic=False)) == 2
    notes = activations_to_notes(staged, np.array([50]), times, settings=staged_settings, polyphonic=False)
    assert len(notes) == 1 and notes[0].onset <= 0.16
    repeated = np.interp(np.arange(220), [0, 10, 16, 50, 56, 60, 190, 200, 219], [0, 0, .8, .8, .2, .8, .8, 0, 0])[None]
    assert len(activations_to_notes(repeated, np.array([50]), times, settings=staged_settings, polyphonic=False)) == 2


def test_attack_zone_places_a_slow_swell_at_its_attack():
    # a swell rising over 0.5 s to its peak crosses 30 % of it ~0.15 s after the bow started
    # it; a modest novelty peak (below novelty_snap) marks the start at 0.12 s
    times = np.arange(120) * 0.01
    H = np.interp(np.arange(120), [0, 10, 60, 100, 110, 119], [0, 0.05, 1.0, 1.0, 0, 0])[None, :]
    novelty = np.zeros_like(H)
    novelty[0, 12] = 0.4
    s = _plain(novelty_snap=MELODIC.novelty_snap, zone_snap=MELODIC.zone_snap)
    zones = np.zeros(H.shape, dtype=bool)

    def onset(zones):
        return activations_to_notes(H, np.array([50]), times, settings=s, polyphonic=False, novelty=novelty,
                                    part_starts=zones)[0].onset

    assert onset(None) > 0.2  # the attack-fraction crossing of the slow swell
    assert onset(zones) == onset(None)  # the part does not start the pitch here: no change
    zones[0, 5:20] = True
    assert onset(zones) == pytest.approx(0.12)


def test_struck_notes_need_an_attack():
    # Common practice, no source: a struck or plucked string reaches its loudest at once, so an
    # activation that swells over a quarter of a second is shared partial energy drifting to
    # this template, not a new stroke.
    hop = 256 / 22050
    times = np.arange(200) * hop
    stroke = np.where(times >= 0.5, np.exp(-(times - 0.5) / 0.6), 0.0)  # a stroke at 0.5 s, decaying
    swell = np.clip((times - 1.2) / 0.5, 0.0, 1.0) * (times < 2.2)  # rises 1.2 -> 1.7 s, stops at 2.2 s
    H = np.vstack([stroke, 0.6 * swell])
    s = POLYPHONIC_SETTINGS.tracking
    kept = activations_to_notes(H, np.array([48, 60]), times, settings=dataclasses.replace(s, max_rise=None))
    assert sorted(n.pitch for n in kept) == [48, 60]  # without the test, both
    checked = activations_to_notes(H, np.array([48, 60]), times, settings=s)
    assert [n.pitch for n in checked] == [48]
    assert checked[0].onset - s.onset_shift == pytest.approx(0.5, abs=2 * hop)
