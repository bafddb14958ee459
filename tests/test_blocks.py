"""Blockwise transcription of long takes: the same notes as one pass over the whole take."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings as hsettings, strategies as st

from takescribe.audio.load import load_audio
from takescribe.transcription.blocks import block_layout, transcribe_long
from takescribe.errors import InputError
from takescribe.features.spectrogram import ANALYSIS_SR, HOP_LENGTH
from takescribe.transcription.blind import settings_for

CORPUS = Path(__file__).resolve().parents[1] / "fixtures" / "corpus"
FRAME = HOP_LENGTH / ANALYSIS_SR


def _long_take(name: str, seconds: float) -> np.ndarray:
    y, sr = load_audio(CORPUS / "tuning" / f"{name}.flac", sr=ANALYSIS_SR)
    return np.tile(y, int(np.ceil(seconds * sr / len(y))))


def _assert_same_notes(blocked, single):
    # "same notes; onsets (and offsets) within one analysis frame"
    assert len(blocked) == len(single)
    assert [n.pitch for n in blocked] == [n.pitch for n in single]
    onsets = np.array([[a.onset, b.onset] for a, b in zip(blocked, single)])
    offsets = np.array([[a.offset, b.offset] for a, b in zip(blocked, single)])
    assert np.max(np.abs(onsets[:, 0] - onsets[:, 1])) <= FRAME + 1e-9
    assert np.max(np.abs(offsets[:, 0] - offsets[:, 1])) <= FRAME + 1e-9


@pytest.mark.parametrize("name, program, seconds", [("piano_alberti", 0, 180.0), ("melody_flute_jig", 73, 75.0)])
def test_blocks_equal_one_pass(name, program, seconds):
    # A corpus piece repeated to a long take: blocks of 60 s (or 25 s) with 5 s of context must give
    # the notes of a single block covering the whole take; fewer iterations keep the test fast
    # (the equality does not depend on them).
    y = _long_take(name, seconds)
    quick = settings_for(program).__class__(**{**settings_for(program).__dict__, "n_iter": 12, "adapt_iter": 4})
    block = 60.0 if seconds > 120 else 25.0
    blocked = transcribe_long(y, ANALYSIS_SR, instrument=program, settings=quick, block_seconds=block)
    single = transcribe_long(y, ANALYSIS_SR, instrument=program, settings=quick, block_seconds=1e6)
    assert blocked.timings["n_blocks"] == int(np.ceil(len(y) / ANALYSIS_SR / block))
    assert single.timings["n_blocks"] == 1
    assert len(single.notes) > 0
    _assert_same_notes(blocked.notes, single.notes)
    # no note is duplicated at a block edge: (pitch, onset) pairs are unique
    assert len({(n.pitch, round(n.onset, 4)) for n in blocked.notes}) == len(blocked.notes)


def test_a_take_spilled_to_a_file_gives_the_same_notes(tmp_path):
    # load_take keeps a long take in a temporary file and the blocks release its pages as they
    # go: the notes must be those of the same take held in memory.
    import soundfile as sf

    from takescribe.jobs.pipeline import load_take

    y = _long_take("piano_alberti", 170.0)
    path = tmp_path / "long.wav"
    sf.write(path, y, ANALYSIS_SR, subtype="FLOAT")
    spilled, sr = load_take(path)
    assert not spilled.flags.writeable  # longer than LONG_TAKE_SECONDS: mapped from a file
    held, _ = load_audio(path, sr=ANALYSIS_SR)
    quick = settings_for(0).__class__(**{**settings_for(0).__dict__, "n_iter": 12, "adapt_iter": 4})
    a = transcribe_long(spilled, sr, instrument=0, settings=quick)
    b = transcribe_long(held, sr, instrument=0, settings=quick)
    assert len(a.notes) > 0
    assert a.notes == b.notes
    np.testing.assert_array_equal(spilled, held)


@pytest.mark.parametrize("name, program", [("piano_alberti", 0), ("melody_cello_song", 42)])
def test_informed_blocks_agree_with_one_pass(name, program):
    # Score-informed in blocks must use the same prior as informed_transcription (mask, dual
    # threshold, expected onsets and repeats, ghost exemption): the drafts agree note for note
    # up to the differences of one shared adaptation and normalisation (measured 0.999 onset F
    # of one against the other on a 3-minute piano take).
    from takescribe.alignment.align import align_reference
    from takescribe.evaluation.metrics import evaluate_notes
    from takescribe.transcription.informed import informed_transcription
    from takescribe.reference.part import load_reference

    y, sr = load_audio(CORPUS / "tuning" / f"{name}.flac", sr=ANALYSIS_SR)
    reference = load_reference(CORPUS / "tuning" / f"{name}.musicxml")
    alignment = align_reference(y, sr, reference, warn=False)
    blocked = transcribe_long(y, sr, reference=reference, alignment=alignment, instrument=program,
                              block_seconds=6.0, overlap_seconds=3.0)
    single = informed_transcription(y, sr, reference, alignment=alignment, instrument=program)
    assert blocked.timings["n_blocks"] >= 2
    assert evaluate_notes(single.notes, blocked.notes)["onset.f_measure"] >= 0.95


@given(n_frames=st.integers(1, 5000), core=st.integers(1, 800), context=st.integers(0, 300))
@hsettings(max_examples=200, deadline=None)
def test_layout_tiles_the_take(n_frames, core, context):
    # property: cores tile [0, n_frames) in order without gaps or overlaps, contexts stay inside the take
    layout = block_layout(n_frames, core, context)
    assert layout[0][1] == 0 and layout[-1][2] == n_frames
    for (s0, c0, c1, s1), nxt in zip(layout, layout[1:] + [None]):
        assert 0 <= s0 <= c0 < c1 <= s1 <= n_frames
        assert c0 - s0 <= context and s1 - c1 <= context
        if nxt is not None:
            assert nxt[1] == c1


@pytest.mark.parametrize(
    "kwargs, message",
    [({"block_seconds": 0.0}, "block_seconds must be > 0"), ({"overlap_seconds": 1.0}, "overlap_seconds must be >= 2"),
     ({"adapt_seconds": -1.0}, "adapt_seconds must be > 0")],
)
def test_bad_options_name_the_problem(kwargs, message):
    with pytest.raises(InputError, match=message):
        transcribe_long(np.zeros(ANALYSIS_SR, np.float32), ANALYSIS_SR, **kwargs)


def test_stereo_is_refused():
    with pytest.raises(InputError, match="mono"):
        transcribe_long(np.zeros((2, ANALYSIS_SR), np.float32), ANALYSIS_SR)


def test_silence_warns_and_gives_no_notes():
    with pytest.warns(UserWarning, match="silent"):
        result = transcribe_long(np.zeros(5 * ANALYSIS_SR, np.float32), ANALYSIS_SR, block_seconds=2.0,
                                 overlap_seconds=2.0)
    assert result.notes == []


def test_a_note_across_a_block_edge_is_neither_split_nor_doubled():
    # a synthetic 440 Hz tone (A4 = MIDI 69, ISO 16) from 1.0 to 4.0 s across a block edge at 2.0 s
    sr = ANALYSIS_SR
    t = np.arange(int(6.0 * sr)) / sr
    tone = sum(0.3 / h * np.sin(2 * np.pi * 440.0 * h * t) for h in (1, 2, 3))
    y = (tone * ((t >= 1.0) & (t < 4.0))).astype(np.float32)
    result = transcribe_long(y, sr, instrument="flute", block_seconds=2.0, overlap_seconds=2.0)
    assert [n.pitch for n in result.notes] == [69]
    note = result.notes[0]
    assert abs(note.onset - 1.0) < 0.1 and abs(note.offset - 4.0) < 0.15


@pytest.mark.parametrize("mask_penalty", [0.0, 0.5])
def test_engine_column_slabs_equal_one_thread(monkeypatch, mask_penalty):
    # The property blocks rely on (frames independent once W is fixed) also lets the engine split
    # the frames into slabs, one thread each: the result must be that of the one-thread loop.
    from takescribe.transcription import nmf

    rng = np.random.default_rng(3)
    W = (rng.random((60, 8)) + 0.05).astype(np.float32)
    V = (W @ (rng.random((8, 1500)) * (rng.random((8, 1500)) > 0.6)) + 0.01).astype(np.float32)
    mask = (rng.random((8, 1500)) > 0.3).astype(np.float32)
    runs = {}
    for threads in (1, 2, 3):
        monkeypatch.setattr(nmf, "_engine_threads", lambda n_frames, threads=threads: threads)
        runs[threads] = nmf.decompose(V, W, n_iter=40, tol=1e-3, mask=mask, mask_penalty=mask_penalty)
    for threads in (2, 3):
        assert runs[threads].n_iter == runs[1].n_iter and runs[threads].converged == runs[1].converged
        np.testing.assert_allclose(runs[threads].H, runs[1].H, rtol=1e-5, atol=1e-9)
        np.testing.assert_allclose(runs[threads].costs, runs[1].costs, rtol=1e-6)


def _tiled_part(name: str, period: float, seconds: float):
    """The corpus piece's part repeated every ``period`` seconds, and an alignment that says the
    take follows it (the take is the piece's rendering repeated, so score time is take time)."""
    import dataclasses

    from takescribe.alignment.align import Alignment
    from takescribe.reference.part import load_reference

    reference = load_reference(CORPUS / "tuning" / f"{name}.musicxml")
    notes = []
    for k in range(int(np.ceil(seconds / period))):
        notes += [dataclasses.replace(n, onset=n.onset + k * period, offset=n.offset + k * period, index=len(notes) + i)
                  for i, n in enumerate(reference.notes) if n.onset + k * period < seconds]
    alignment = Alignment(score_times=np.array([0.0, seconds]), take_times=np.array([0.0, seconds]), confidence=1.0)
    return dataclasses.replace(reference, notes=tuple(notes)), alignment


def test_a_four_minute_take_keeps_its_faint_notes_in_blocks():
    # "To check by ear" evidence of a long take (issue #14): blocks of 60 s keep, block by block,
    # the faint notes a single pass over the whole take finds (same notes, onsets within one
    # frame); and they agree with the one-pass informed transcription's faint_notes on the same
    # take (onset F >= 0.9, mir_eval conventions: the adaptation and normalisation are shared
    # differently). A piano piece, so the restrikes of struck keys are part of the evidence.
    from takescribe.evaluation.metrics import evaluate_notes
    from takescribe.transcription.informed import faint_notes, informed_transcription

    y, sr = load_audio(CORPUS / "tuning" / "piano_alberti.flac", sr=ANALYSIS_SR)
    period = len(y) / sr
    y = _long_take("piano_alberti", 240.0)[: 240 * sr]
    reference, alignment = _tiled_part("piano_alberti", period, len(y) / sr)
    quick = settings_for(0).__class__(**{**settings_for(0).__dict__, "n_iter": 8, "adapt_iter": 4})
    options = dict(reference=reference, alignment=alignment, instrument=0, settings=quick)
    blocked = transcribe_long(y, sr, block_seconds=60.0, **options)
    single = transcribe_long(y, sr, block_seconds=1e6, **options)
    assert blocked.timings["n_blocks"] == 4 and single.timings["n_blocks"] == 1
    blocked_faint = faint_notes(blocked, reference, alignment)
    assert len(blocked_faint) > 10
    _assert_same_notes(blocked_faint, faint_notes(single, reference, alignment))
    one_pass = informed_transcription(y, sr, reference, alignment=alignment, instrument=0, settings=quick)
    agreement = evaluate_notes(faint_notes(one_pass, reference, alignment), blocked_faint)
    assert agreement["onset.f_measure"] >= 0.9
