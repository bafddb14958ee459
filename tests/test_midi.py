"""Tests of takescribe.export.midi: Standard MIDI File writing and reading.

Outside references: the Standard MIDI File 1.0 specification (MMA) for the
byte layout and the tempo unit (microseconds per quarter note); mido's own
playback iterator (``for msg in MidiFile``, which applies tempo changes from
the merged tracks) and pretty_midi as independent readers.
"""

from __future__ import annotations

import io
import struct

import mido
import numpy as np
import pretty_midi
import pytest

from takescribe.errors import NoteListError, OutputError
from takescribe.export.midi import (
    MidiTrack,
    midi_bytes,
    read_midi_notes,
    read_midi_tempo_map,
    read_midi_time_signatures,
    write_midi,
)
from takescribe.notes import Note, sort_notes

TEMPO_MAP = ((0.0, 120.0), (1.7, 96.0), (3.1, 144.0), (4.4, 72.0))


def random_tracks(seed: int, n_tracks: int = 3) -> list[MidiTrack]:
    """Invented parts: notes of one pitch never overlap within a track."""
    rng = np.random.default_rng(seed)
    tracks = []
    for t in range(n_tracks):
        notes = []
        for pitch in rng.choice(np.arange(40, 90), size=6, replace=False):
            time = float(rng.uniform(0, 0.5))
            for _ in range(int(rng.integers(1, 6))):
                length = float(rng.uniform(0.05, 0.8))
                notes.append(Note(round(time, 4), round(time + length, 4), int(pitch), int(rng.integers(1, 128))))
                time += length + float(rng.uniform(0.0, 0.4))
        tracks.append(MidiTrack(f"part {t}", notes, program=int(rng.integers(0, 128))))
    return tracks


def mido_playback_notes(path) -> list[tuple[float, float, int, int]]:
    """Notes as mido's playback iterator times them (delta seconds, all tracks merged)."""
    now = 0.0
    open_notes: dict[tuple[int, int], list] = {}
    out = []
    for msg in mido.MidiFile(path):
        now += msg.time
        if msg.type == "note_on" and msg.velocity > 0:
            open_notes.setdefault((msg.channel, msg.note), []).append((now, msg.velocity))
        elif msg.type in ("note_on", "note_off"):
            on, velocity = open_notes[(msg.channel, msg.note)].pop(0)
            out.append((on, now, msg.note, velocity))
    return sorted(out)


def assert_same_notes(ours: list[Note], theirs, tolerance=1e-3):
    theirs = sorted(theirs, key=lambda n: (n[2], n[0]))
    ours = sorted(ours, key=lambda n: (n.pitch, n.onset))
    assert len(ours) == len(theirs)
    for a, (on, off, pitch, velocity) in zip(ours, theirs):
        assert a.pitch == pitch and a.velocity == velocity
        assert abs(a.onset - on) <= tolerance and abs(a.offset - off) <= tolerance


@pytest.mark.parametrize("midi_type", [0, 1])
def test_round_trip_with_tempo_changes(tmp_path, midi_type):
    for seed in range(5):
        tracks = random_tracks(seed)
        path = write_midi(tmp_path / f"take{seed}.mid", tracks, tempo_map=TEMPO_MAP, midi_type=midi_type)
        expected = sort_notes(n for t in tracks for n in t.notes)
        got = read_midi_notes(path)
        # half a tick at the slowest tempo (72 bpm, 480 ticks) is 0.87 ms: within 1 ms
        assert_same_notes(got, [(n.onset, n.offset, n.pitch, n.velocity) for n in expected])
        # independent readers agree with ours on every note to 1 ms
        assert_same_notes(got, mido_playback_notes(path))
        pm = pretty_midi.PrettyMIDI(str(path))
        assert_same_notes(got, [(n.start, n.end, n.pitch, n.velocity) for i in pm.instruments for n in i.notes])


def test_header_bytes_follow_smf_spec(tmp_path):
    tracks = random_tracks(1, n_tracks=2)
    # SMF 1.0: "MThd", 32-bit length 6, then 16-bit format, ntrks, division (big-endian)
    one = write_midi(tmp_path / "one.mid", tracks, midi_type=1, ticks_per_beat=480).read_bytes()
    assert one[:14] == b"MThd" + struct.pack(">IHHH", 6, 1, 3, 480)  # conductor + 2 parts
    assert one[14:18] == b"MTrk"
    zero = write_midi(tmp_path / "zero.mid", tracks, midi_type=0, ticks_per_beat=960).read_bytes()
    assert zero[:14] == b"MThd" + struct.pack(">IHHH", 6, 0, 1, 960)


def absolute_events(track):
    now, out = 0, []
    for msg in track:
        now += msg.time
        out.append((now, msg))
    return out


def test_seconds_to_ticks_through_tempo_map(tmp_path):
    # SMF tempo is microseconds per quarter note: 120 bpm = 500000 us, 60 bpm = 1000000 us.
    # 480 ticks per quarter: 2.0 s at 120 bpm = 1920 ticks; 3.0 s = 1920 + 1.0 s at 60 bpm = 2400 ticks.
    path = write_midi(
        tmp_path / "t.mid",
        [MidiTrack("a", [Note(1.0, 3.0, 60)])],
        tempo_map=((0.0, 120.0), (2.0, 60.0)),
    )
    midi = mido.MidiFile(path)
    conductor = absolute_events(midi.tracks[0])
    assert [(t, m.tempo) for t, m in conductor if m.type == "set_tempo"] == [(0, 500000), (1920, 1000000)]
    part = absolute_events(midi.tracks[1])
    assert [(t, m.type) for t, m in part if m.type.startswith("note")] == [(960, "note_on"), (2400, "note_off")]
    assert read_midi_tempo_map(path) == ((0.0, 120.0), (2.0, 60.0))


def test_time_signatures_round_trip(tmp_path):
    path = write_midi(
        tmp_path / "ts.mid",
        [MidiTrack("a", [Note(0.0, 1.0, 60)])],
        tempo_map=((0.0, 90.0),),
        time_signatures=((0.0, 3, 4), (2.0, 6, 8)),
    )
    # 90 bpm is stored as 666667 us per quarter (SMF tempo is whole microseconds), so 2 s reads as 2.000001 s
    got = read_midi_time_signatures(path)
    assert [(n, d) for _, n, d in got] == [(3, 4), (6, 8)]
    assert [t for t, _, _ in got] == pytest.approx([0.0, 2.0], abs=1e-5)
    # pretty_midi reads the same signatures
    pm = pretty_midi.PrettyMIDI(str(path))
    assert [(round(ts.time, 4), ts.numerator, ts.denominator) for ts in pm.time_signature_changes] == [
        (0.0, 3, 4), (2.0, 6, 8)
    ]


def test_event_order_at_equal_ticks_and_no_double_note_on(tmp_path):
    notes = [
        Note(0.0, 0.5, 64), Note(0.0, 0.5, 60), Note(0.5, 1.0, 62), Note(0.5, 1.0, 60),
        Note(0.8, 1.5, 67), Note(1.0, 1.2, 67),  # same key overlapping: first must be cut at 1.0
        Note(2.0, 2.5, 70), Note(2.0, 3.0, 70),  # same start: merged into the longer
    ]
    path = write_midi(tmp_path / "o.mid", [MidiTrack("a", notes)])
    events = absolute_events(mido.MidiFile(path).tracks[1])
    notes_only = [(t, 0 if m.type == "note_off" else 1, m.note) for t, m in events if m.type.startswith("note")]
    # at each tick: note-offs before note-ons, each by pitch
    assert notes_only == sorted(notes_only)
    down: set[int] = set()
    for _, is_on, pitch in notes_only:
        if is_on:
            assert pitch not in down, "note-on for a key that is still down"
            down.add(pitch)
        else:
            down.discard(pitch)
    got = read_midi_notes(path)
    assert Note(0.8, 1.0, 67) in got and Note(2.0, 3.0, 70) in got and len(got) == 7


def test_channels_skip_percussion(tmp_path):
    tracks = [MidiTrack(f"p{i}", [Note(0.0, 1.0, 60 + i)]) for i in range(10)]
    path = write_midi(tmp_path / "c.mid", tracks)
    channels = [
        m.channel for tr in mido.MidiFile(path).tracks[1:] for m in tr if m.type == "program_change"
    ]
    # General MIDI: channel 10 (index 9) is percussion
    assert channels == [0, 1, 2, 3, 4, 5, 6, 7, 8, 10]
    with pytest.raises(ValueError, match="percussion"):
        MidiTrack("drums?", [], channel=9)
    with pytest.raises(ValueError, match="no free pitched channel"):
        write_midi(tmp_path / "x.mid", [MidiTrack(f"p{i}", []) for i in range(16)])


def test_refuses_overwrite_without_force(tmp_path):
    path = write_midi(tmp_path / "a.mid", [MidiTrack("a", [Note(0.0, 1.0, 60)])])
    with pytest.raises(OutputError, match="already exists"):
        write_midi(path, [MidiTrack("a", [Note(0.0, 2.0, 60)])])
    write_midi(path, [MidiTrack("a", [Note(0.0, 2.0, 60)])], force=True)
    assert read_midi_notes(path) == [Note(0.0, 2.0, 60)]


def test_bad_options():
    with pytest.raises(ValueError, match="start at 0.0"):
        write_midi("unused.mid", [], tempo_map=((1.0, 120.0),))
    with pytest.raises(ValueError, match="power of two"):
        write_midi("unused.mid", [], time_signatures=((0.0, 3, 5),))
    with pytest.raises(ValueError, match="midi_type"):
        write_midi("unused.mid", [], midi_type=2)


def save(tmp_path, name, tracks, *, midi_type=1, ticks_per_beat=480) -> str:
    midi = mido.MidiFile(type=midi_type, ticks_per_beat=ticks_per_beat)
    for messages in tracks:
        midi.tracks.append(mido.MidiTrack(messages))
    path = tmp_path / name
    midi.save(path)
    return path


def on(note, time, velocity=64, channel=0):
    return mido.Message("note_on", note=note, velocity=velocity, time=time, channel=channel)


def off(note, time, channel=0):
    return mido.Message("note_off", note=note, velocity=0, time=time, channel=channel)


def test_reading_rules(tmp_path):
    path = save(tmp_path, "rules.mid", [
        [mido.MetaMessage("set_tempo", tempo=500000, time=0)],
        [
            on(60, 0), on(60, 240),  # overlapping same key: first-in, first-out
            mido.Message("note_on", note=60, velocity=0, time=240),  # velocity 0 = note-off (SMF spec)
            off(60, 480),
            on(72, 0),  # never closed: ends with the track
            mido.MetaMessage("end_of_track", time=960),
        ],
    ])
    # 480 ticks per quarter at 500000 us per quarter: 1 tick = 1/960 s
    assert read_midi_notes(path) == [
        Note(0.0, 0.5, 60, 64), Note(0.25, 1.0, 60, 64), Note(1.0, 2.0, 72, 64)
    ]


def test_tempo_in_a_non_conductor_track(tmp_path):
    path = save(tmp_path, "tempo.mid", [
        [mido.MetaMessage("track_name", name="conductor", time=0)],
        [on(60, 0), off(60, 960), on(62, 0), off(62, 960)],
        [mido.MetaMessage("set_tempo", tempo=1_000_000, time=960)],  # 60 bpm from beat 2 on
    ])
    # 960 ticks at 120 bpm = 1 s; next 960 ticks at 60 bpm = 2 s; mido's player agrees
    expected = [(0.0, 1.0, 60, 64), (1.0, 3.0, 62, 64)]
    assert mido_playback_notes(path) == expected
    assert_same_notes(read_midi_notes(path), expected, tolerance=1e-9)
    assert read_midi_tempo_map(path) == ((0.0, 120.0), (1.0, 60.0))


def test_type0_file(tmp_path):
    path = save(tmp_path, "zero.mid", [[
        mido.MetaMessage("set_tempo", tempo=750000, time=0),  # 80 bpm
        on(64, 0, channel=3), on(67, 0, channel=4), off(64, 480, channel=3), off(67, 0, channel=4),
    ]], midi_type=0)
    assert read_midi_notes(path) == [Note(0.0, 0.75, 64, 64), Note(0.0, 0.75, 67, 64)]


def test_sustain_pedal(tmp_path):
    pedal = lambda value, time, channel=0: mido.Message(  # noqa: E731
        "control_change", control=64, value=value, time=time, channel=channel
    )
    path = save(tmp_path, "pedal.mid", [[
        on(60, 0), pedal(127, 240), off(60, 240),  # released under the pedal at 0.5 s
        on(64, 0), off(64, 240),  # also under the pedal
        on(60, 240),  # same key struck again at 1.0 s: the held 60 ends here
        pedal(0, 240),  # pedal up at 1.25 s
        off(60, 240),
        on(67, 0, channel=1), off(67, 240, channel=1),  # other channel: pedal does not apply
    ]], midi_type=0)
    assert read_midi_notes(path) == [
        Note(0.0, 0.5, 60, 64), Note(0.5, 0.75, 64, 64), Note(1.0, 1.5, 60, 64), Note(1.5, 1.75, 67, 64)
    ]
    assert read_midi_notes(path, sustain=True) == [
        Note(0.0, 1.0, 60, 64), Note(0.5, 1.25, 64, 64), Note(1.0, 1.5, 60, 64), Note(1.5, 1.75, 67, 64)
    ]


def test_no_notes_gives_empty_list(tmp_path):
    path = save(tmp_path, "empty.mid", [[mido.MetaMessage("set_tempo", tempo=500000, time=0)]])
    assert read_midi_notes(path) == []


def test_corrupt_files_raise_note_list_error(tmp_path):
    good = write_midi(tmp_path / "good.mid", [MidiTrack("a", [Note(0.0, 1.0, 60)])]).read_bytes()
    truncated = tmp_path / "truncated.mid"
    truncated.write_bytes(good[:-6])
    with pytest.raises(NoteListError, match="truncated.mid.*truncated"):
        read_midi_notes(truncated)
    text = tmp_path / "notes.mid"
    text.write_text("OnsetTime\tOffsetTime\tMidiPitch\n")
    with pytest.raises(NoteListError, match="notes.mid: not a Standard MIDI File"):
        read_midi_notes(text)
    # a data byte where a status byte is needed at the start of a track: running status without a status
    start = good.index(b"MTrk", 14) + 8
    bad = bytearray(good)
    bad[start:start + 4] = b"\x00\x3c\x40\x00"
    running = tmp_path / "running.mid"
    running.write_bytes(bytes(bad))
    with pytest.raises(NoteListError, match="running.mid: corrupt MIDI data"):
        read_midi_notes(running)
    with pytest.raises(NoteListError, match="missing.mid: no such MIDI file"):
        read_midi_notes(tmp_path / "missing.mid")
    with pytest.raises(NoteListError, match="truncated.mid"):
        read_midi_tempo_map(truncated)


def test_performed_draft_carries_the_takes_meter_and_tempo_changes():
    """The performed-timing draft of a 3/4 take that slows down carries 3/4 and the tempo
    changes of its beat grid, so bar lines fall on the take's downbeats (pretty_midi's
    reading of the written file gives the bar times; issue #16 item 5)."""
    from takescribe.notation.grid import grid_from_times
    from takescribe.notation.model import performed_conductor

    beat_times = np.concatenate([0.5 * np.arange(7), 3.0 + 0.75 * np.arange(1, 7)])  # 120 then 80 per minute
    grid = grid_from_times(beat_times, num=3, den=4, downbeat_index=0)
    tempo_map, time_signatures = performed_conductor(grid)
    assert time_signatures[0][1:] == (3, 4)
    assert [round(b) for _, b in tempo_map] == [120, 80]
    notes = [Note(t, t + 0.3, 60) for t in beat_times[:-1]]
    data = midi_bytes([MidiTrack("draft", tuple(notes))], tempo_map=tempo_map, time_signatures=time_signatures)
    pm = pretty_midi.PrettyMIDI(io.BytesIO(data))
    assert (pm.time_signature_changes[0].numerator, pm.time_signature_changes[0].denominator) == (3, 4)
    downbeats = pm.get_downbeats()
    np.testing.assert_allclose(downbeats[:4], beat_times[[0, 3, 6, 9]], atol=0.01)
