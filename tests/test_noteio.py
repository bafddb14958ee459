"""Tests of takescribe.export.noteio: MAPS-style note lists and the read_notes dispatcher.

The MAPS layout (header ``OnsetTime OffsetTime MidiPitch``, one note per line,
seconds and MIDI numbers) is that of the MAPS dataset (Emiya et al., IEEE TASLP
2010); mir_eval.io.load_valued_intervals reads the same columns and is used
below as an outside reader of what we write.
"""

from __future__ import annotations

import tempfile
from pathlib import Path

import mir_eval
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from takescribe.errors import InputError, NoteListError, OutputError
from takescribe.export.midi import MidiTrack, write_midi
from takescribe.export.noteio import format_maps, parse_maps, read_maps, read_notes, write_maps
from takescribe.notes import Note, sort_notes

MAPS_EXAMPLE = "OnsetTime\tOffsetTime\tMidiPitch\n0.500000\t1.250000\t60\n1.000000\t1.500000\t64\n"


def random_notes(seed: int, n: int = 200) -> list[Note]:
    rng = np.random.default_rng(seed)
    onsets = rng.uniform(0, 120, n)
    durations = rng.uniform(0.002, 3.0, n)
    return [Note(float(a), float(a + d), int(p)) for a, d, p in zip(onsets, durations, rng.integers(21, 109, n))]


def test_round_trip_to_1ms(tmp_path):
    for seed in range(5):
        notes = random_notes(seed)
        path = write_maps(notes, tmp_path / f"notes{seed}.txt")
        back = read_maps(path)
        expected = sort_notes(notes)
        assert [n.pitch for n in back] == [n.pitch for n in expected]
        np.testing.assert_allclose([n.onset for n in back], [n.onset for n in expected], rtol=0, atol=1e-3)
        np.testing.assert_allclose([n.offset for n in back], [n.offset for n in expected], rtol=0, atol=1e-3)


def test_written_file_layout_and_outside_reader(tmp_path):
    path = write_maps([Note(1.0, 1.5, 64), Note(0.5, 1.25, 60)], tmp_path / "a.txt")
    assert path.read_text(encoding="utf-8") == MAPS_EXAMPLE
    # mir_eval's reader of (onset, offset, value) text, skipping our header line
    body = tmp_path / "body.txt"
    body.write_text("".join(MAPS_EXAMPLE.splitlines(keepends=True)[1:]))
    intervals, values = mir_eval.io.load_valued_intervals(str(body))
    np.testing.assert_array_equal(intervals, [[0.5, 1.25], [1.0, 1.5]])
    np.testing.assert_array_equal(values, [60, 64])


def test_refuses_overwrite_without_force(tmp_path):
    path = write_maps([Note(0.0, 1.0, 60)], tmp_path / "a.txt")
    with pytest.raises(OutputError, match="already exists"):
        write_maps([Note(0.0, 2.0, 60)], path)
    write_maps([Note(0.0, 2.0, 60)], path, force=True)
    assert read_maps(path) == [Note(0.0, 2.0, 60)]


def test_tolerant_reading():
    text = (
        "\ufeffOnsetTime OffsetTime MidiPitch extra\r\n"
        "\r\n"
        "0.5  1.25\t60\t0.8\t(comment column)\r\n"
        "# a comment line\r\n"
        "1,1.5,64\r"
        "2.0\t2.5\t67.0\n"
        "\n"
    )
    assert parse_maps(text) == [Note(0.5, 1.25, 60), Note(1.0, 1.5, 64), Note(2.0, 2.5, 67)]
    assert parse_maps("0.5\t1.0\t60\n") == [Note(0.5, 1.0, 60)]  # no header
    assert parse_maps("OnsetTime\tOffsetTime\tMidiPitch\n") == []


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("OnsetTime\tOffsetTime\tMidiPitch\n0.5\t1.0\n", "line 2: expected 3 columns"),
        ("h\n0.5\t1.0\t60\n0.5\tx\t60\n", "line 3: OffsetTime 'x' is not a number"),
        ("h\n\n1.0\t0.5\t60\n", "line 3: OffsetTime 0.5 is not after OnsetTime 1.0"),
        ("h\n0.5\t1.0\t60.5\n", "line 2: MidiPitch must be a whole number"),
        ("h\n0.5\t1.0\t440\n", "line 2: MidiPitch.*looks like Hz"),
        ("h\n-0.5\t1.0\t60\n", "line 2: OnsetTime -0.5 is negative"),
        ("h\n0.5\tinf\t60\n", "line 2: OffsetTime must be finite"),
        ("h\nOnsetTime\tOffsetTime\tMidiPitch\n", "line 2: OnsetTime 'OnsetTime' is not a number"),
    ],
)
def test_errors_name_file_and_line(text, message):
    with pytest.raises(NoteListError, match=f"notes.txt, {message}"):
        parse_maps(text, source="notes.txt")


def test_read_errors_name_the_file(tmp_path):
    with pytest.raises(NoteListError, match="missing.txt: no such note list"):
        read_maps(tmp_path / "missing.txt")
    binary = tmp_path / "binary.txt"
    binary.write_bytes(b"\xff\xfe\x00\x01")
    with pytest.raises(NoteListError, match="binary.txt: not UTF-8 text"):
        read_maps(binary)
    bad = tmp_path / "bad.csv"
    bad.write_text("onset,offset,pitch\n0.1,0.2,60\n0.3,oops,61\n")
    with pytest.raises(NoteListError, match="bad.csv, line 3"):
        read_notes(bad)


FUZZ_DIR = Path(tempfile.mkdtemp(prefix="takescribe-fuzz-"))

number_text = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
    st.integers(-200, 300).map(str),
    st.sampled_from(["", "nan", "-0", "1e400", "60.0", "0x10", "1_0", "OnsetTime"]),
)
line_text = st.lists(number_text, min_size=0, max_size=5).flatmap(
    lambda fields: st.sampled_from(["\t", " ", ",", " , "]).map(lambda sep: sep.join(fields))
)
maps_like = st.lists(st.one_of(line_text, st.text(max_size=20)), max_size=8).flatmap(
    lambda lines: st.sampled_from(["\n", "\r\n", "\r"]).map(lambda end: end.join(lines))
)


def check_outcome(path: Path) -> None:
    try:
        notes = read_maps(path)
    except NoteListError as exc:
        assert str(path) in str(exc)
        return
    assert isinstance(notes, list) and all(isinstance(n, Note) for n in notes)


@settings(max_examples=500, derandomize=True, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(text=st.one_of(st.text(), maps_like))
def test_fuzz_text_gives_notes_or_note_list_error(text):
    path = FUZZ_DIR / "fuzz.txt"
    path.write_bytes(text.encode("utf-8", "surrogatepass"))
    check_outcome(path)


@settings(max_examples=200, derandomize=True, deadline=None)
@given(data=st.binary(max_size=200))
def test_fuzz_bytes_gives_notes_or_note_list_error(data):
    path = FUZZ_DIR / "fuzz.tsv"
    path.write_bytes(data)
    check_outcome(path)


@settings(max_examples=150, derandomize=True, deadline=None)
@given(
    notes=st.lists(
        st.tuples(
            st.floats(0, 1e4, allow_nan=False), st.floats(0.001, 100, allow_nan=False), st.integers(0, 127)
        ).map(lambda t: Note(t[0], t[0] + t[1], t[2])),
        max_size=20,
    )
)
def test_round_trip_property(notes):
    back = parse_maps(format_maps(notes))
    expected = sort_notes(notes)
    assert [n.pitch for n in back] == [n.pitch for n in expected]
    assert all(abs(a.onset - b.onset) <= 1e-3 and abs(a.offset - b.offset) <= 1e-3 for a, b in zip(back, expected))


def test_read_notes_dispatch(tmp_path):
    notes = [Note(0.0, 0.5, 60, 100), Note(0.5, 1.0, 62, 90)]
    text = write_maps(notes, tmp_path / "n.tsv")
    assert read_notes(text) == [Note(0.0, 0.5, 60), Note(0.5, 1.0, 62)]  # MAPS has no velocity
    midi = write_midi(tmp_path / "n.mid", [MidiTrack("melody", notes)])
    assert read_notes(midi) == notes
    assert read_notes(midi, part="melody") == [Note(0.0, 0.5, 60), Note(0.5, 1.0, 62)]
    with pytest.raises(NoteListError, match=r"n.wav: unknown note-list format \.wav"):
        read_notes(tmp_path / "n.wav")
    with pytest.raises(InputError, match="no parts"):
        read_notes(text, part="melody")


def test_read_notes_musicxml():
    from music21 import corpus

    from takescribe.reference.part import load_reference

    # music21's bundled corpus: Bach chorale BWV 66.6, soprano part
    path = Path(str(corpus.getWork("bach/bwv66.6")))
    notes = read_notes(path, part="Soprano")
    assert notes == load_reference(path, part="Soprano").to_notes()
    soprano = corpus.parse("bach/bwv66.6").parts[0].flatten().notes
    # every written soprano note is there, as music21 reads it (ties merged by the reader)
    assert {n.pitch for n in notes} == {p.midi for n in soprano for p in n.pitches}
