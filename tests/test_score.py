"""Tests for takescribe.reference.part: reference parts from MusicXML and MIDI.

Outside references: music21 (its bundled corpus and its own reading of the
same files), pretty_midi (note times of a MIDI file), the Standard MIDI File
specification (defaults: 120 bpm, 4/4), the MusicXML 4.0 schema (root
elements score-partwise / score-timewise).
"""

from __future__ import annotations

import tracemalloc
import zipfile

import mido
import numpy as np
import pytest
from music21 import bar, chord, corpus, instrument, key, meter, note, stream, tempo
from music21 import tie as m21tie

from takescribe.errors import ScoreError
from takescribe.notes import Note
from takescribe.reference.part import (
    MAX_XML_BYTES,
    Reference,
    ScoreWarning,
    list_parts,
    load_reference,
    validate_reference,
)


def _music21_pitch_count(parts) -> int:
    """Sounding notes (one per chord pitch, ties merged) counted by music21 itself."""
    total = 0
    for p in parts:
        for el in p.stripTies().flatten().notes:
            total += len(el.pitches)
    return total


# --------------------------------------------------------------------------
# music21 corpus
# --------------------------------------------------------------------------
def test_bach_chorale_parts_and_note_counts():
    path = corpus.getWork("bach/bwv66.6")
    score = corpus.parse("bach/bwv66.6")
    # music21's reading of the same file is the reference
    assert list_parts(path) == [p.partName for p in score.parts]
    expanded = score.expandRepeats()
    for i, p in enumerate(expanded.parts):
        ref = load_reference(path, part=i)
        assert len(ref.notes) == _music21_pitch_count([p])
        assert ref.part_name == p.partName
    ref = load_reference(path, part="ALTO")  # names are case-insensitive
    assert ref.part_name == "Alto"
    assert load_reference(path, part="2").part_name == "Tenor"


def test_bach_chorale_order_index_and_seconds():
    ref = load_reference(corpus.getWork("bach/bwv66.6"), part="Soprano")
    keys = [(n.onset, n.pitch) for n in ref.notes]
    assert keys == sorted(keys)
    assert [n.index for n in ref.notes] == list(range(len(ref.notes)))
    # a constant tempo: seconds are quarters * 60 / bpm (definition of bpm)
    (q0, bpm), = ref.tempo_map
    for n in ref.notes:
        assert n.onset == pytest.approx(n.onset_quarters * 60 / bpm)
    # music21 reads the key as F# minor: three sharps
    assert ref.key_fifths == 3 and ref.mode == "minor"
    notes = ref.to_notes()
    assert all(isinstance(n, Note) and n.velocity == 80 for n in notes)
    assert validate_reference(ref) is ref


def test_default_part_warns_when_several():
    with pytest.warns(ScoreWarning, match="using the first"):
        ref = load_reference(corpus.getWork("bach/bwv66.6"))
    assert ref.part_name == "Soprano"


def test_piano_keeps_both_staves_and_expands_repeats():
    path = corpus.getWork("verdi/laDonnaEMobile")
    score = corpus.parse("verdi/laDonnaEMobile")
    assert list_parts(path) == ["Piano"]
    ref = load_reference(path)
    assert {n.staff for n in ref.notes} == {1, 2}
    expanded = score.expandRepeats()
    assert len(ref.notes) == _music21_pitch_count(expanded.parts)
    # repeats expanded: more bars in performance order than printed
    assert len(ref.measure_starts) - 1 == len(expanded.parts[0].getElementsByClass(stream.Measure))
    assert len(ref.measure_starts) - 1 > len(score.parts[0].getElementsByClass(stream.Measure))


# --------------------------------------------------------------------------
# a MusicXML piece of our own with ties, a repeat, a tempo change, a chord and a grace note
# --------------------------------------------------------------------------
def _our_piece() -> stream.Score:
    part = stream.Part()
    part.partName = "Flute"
    part.insert(0, instrument.Flute())
    m1 = stream.Measure(number=1)
    m1.append([meter.TimeSignature("4/4"), key.KeySignature(1), tempo.MetronomeMark(number=60)])
    e_start = note.Note("E5", quarterLength=2)
    e_start.tie = m21tie.Tie("start")
    m1.append([note.Note("C5", quarterLength=1), note.Note("D5", quarterLength=1), e_start])
    m2 = stream.Measure(number=2)
    e_stop = note.Note("E5", quarterLength=1)
    e_stop.tie = m21tie.Tie("stop")
    m2.append([e_stop, note.Note("F#5", quarterLength=1), chord.Chord(["G4", "B4"], quarterLength=2)])
    m2.leftBarline = bar.Repeat(direction="start")
    m2.rightBarline = bar.Repeat(direction="end")
    m3 = stream.Measure(number=3)
    m3.insert(0, tempo.MetronomeMark(number=120))
    grace = note.Note("A5").getGrace()
    m3.append([grace, note.Note("G5", quarterLength=4)])
    part.append([m1, m2, m3])
    score = stream.Score()
    score.insert(0, part)
    return score


@pytest.fixture(scope="module")
def our_piece_paths(tmp_path_factory):
    folder = tmp_path_factory.mktemp("piece")
    score = _our_piece()
    xml = score.write("musicxml", fp=folder / "piece.musicxml")
    mxl = score.write("mxl", fp=folder / "packed.mxl")
    return xml, mxl


def test_our_piece_ties_repeats_tempo_grace(our_piece_paths):
    xml, _ = our_piece_paths
    ref = load_reference(xml)
    got = [(n.spelling, n.onset_quarters, n.duration_quarters, n.measure, n.measure_label, n.is_grace)
           for n in ref.notes]
    g = 0.125  # GRACE_QUARTERS, taken from the start of the following G5
    # Expected layout worked out by hand from the MusicXML we wrote: bar 2 is played twice,
    # the tie E5 (bar 1) -> E5 (bar 2) is one note the first time; the second time round
    # the tied-over E5 starts alone at the repeat.
    assert got == [
        ("C5", 0.0, 1.0, 1, "1", False),
        ("D5", 1.0, 1.0, 1, "1", False),
        ("E5", 2.0, 3.0, 1, "1", False),
        ("F#5", 5.0, 1.0, 2, "2", False),
        ("G4", 6.0, 2.0, 2, "2", False),
        ("B4", 6.0, 2.0, 2, "2", False),
        ("E5", 8.0, 1.0, 3, "2", False),
        ("F#5", 9.0, 1.0, 3, "2", False),
        ("G4", 10.0, 2.0, 3, "2", False),
        ("B4", 10.0, 2.0, 3, "2", False),
        ("A5", 12.0, g, 4, "3", True),
        ("G5", 12.0 + g, 4.0 - g, 4, "3", False),
    ]
    # 60 bpm: one quarter per second; from bar 3 (quarter 12), 120 bpm: half a second
    assert ref.tempo_map == ((0.0, 60.0), (12.0, 120.0))
    assert ref.notes[3].onset == pytest.approx(5.0)
    assert ref.notes[-1].onset == pytest.approx(12.0 + g * 0.5)
    assert ref.notes[-1].offset == pytest.approx(14.0)
    assert ref.duration == pytest.approx(14.0)
    assert ref.quarters_to_seconds(np.array([0.0, 12.0, 16.0])) == pytest.approx([0.0, 12.0, 14.0])
    q = np.linspace(0, 16, 33)
    assert ref.seconds_to_quarters(ref.quarters_to_seconds(q)) == pytest.approx(q)
    assert ref.measure_starts == (0.0, 4.0, 8.0, 12.0, 16.0)
    assert ref.measure_beat(5.0) == (2, 2.0)
    assert ref.notes[3].beat == 2.0
    assert ref.key_fifths == 1
    assert ref.time_signatures == ((0.0, 4, 4),)
    # music21 maps Flute to General MIDI program 73 (0-based; GM "Flute" is program 74 1-based)
    assert ref.midi_program == 73


def test_mxl_round_trip_equals_plain_musicxml(our_piece_paths):
    xml, mxl = our_piece_paths
    a, b = load_reference(xml), load_reference(mxl)
    assert a.notes == b.notes
    assert a.tempo_map == b.tempo_map and a.measure_starts == b.measure_starts


def test_unknown_part_lists_the_parts(our_piece_paths):
    xml, _ = our_piece_paths
    with pytest.raises(ScoreError, match=r"no part named 'Oboe'; the parts are 0: 'Flute'"):
        load_reference(xml, part="Oboe")
    with pytest.raises(ScoreError, match="no part number 3"):
        load_reference(xml, part=3)
    with pytest.raises(TypeError, match="part must be"):
        load_reference(xml, part=1.5)


def test_pickup_bar_counts_beats_from_the_end():
    # bwv66.6 starts with a one-quarter pickup in 4/4 (music21's reading of the corpus file)
    ref = load_reference(corpus.getWork("bach/bwv66.6"), part=0)
    assert ref.notes[0].measure == 1 and ref.notes[0].measure_label == "0"
    assert ref.notes[0].beat == 4.0
    first_full = next(n for n in ref.notes if n.measure == 2)
    assert first_full.beat == 1.0


# --------------------------------------------------------------------------
# hostile and broken files
# --------------------------------------------------------------------------
_BILLION_LAUGHS = b"""<?xml version="1.0"?>
<!DOCTYPE score-partwise [
 <!ENTITY lol "lol">
 <!ENTITY lol2 "&lol;&lol;&lol;&lol;&lol;&lol;&lol;&lol;&lol;&lol;">
 <!ENTITY lol3 "&lol2;&lol2;&lol2;&lol2;&lol2;&lol2;&lol2;&lol2;&lol2;&lol2;">
 <!ENTITY lol4 "&lol3;&lol3;&lol3;&lol3;&lol3;&lol3;&lol3;&lol3;&lol3;&lol3;">
 <!ENTITY lol5 "&lol4;&lol4;&lol4;&lol4;&lol4;&lol4;&lol4;&lol4;&lol4;&lol4;">
 <!ENTITY lol6 "&lol5;&lol5;&lol5;&lol5;&lol5;&lol5;&lol5;&lol5;&lol5;&lol5;">
 <!ENTITY lol7 "&lol6;&lol6;&lol6;&lol6;&lol6;&lol6;&lol6;&lol6;&lol6;&lol6;">
 <!ENTITY lol8 "&lol7;&lol7;&lol7;&lol7;&lol7;&lol7;&lol7;&lol7;&lol7;&lol7;">
 <!ENTITY lol9 "&lol8;&lol8;&lol8;&lol8;&lol8;&lol8;&lol8;&lol8;&lol8;&lol8;">
]>
<score-partwise version="4.0"><part-list><score-part id="P1"><part-name>&lol9;</part-name></score-part></part-list>
<part id="P1"/></score-partwise>
"""

_EXTERNAL_ENTITY = b"""<?xml version="1.0"?>
<!DOCTYPE score-partwise [<!ENTITY secret SYSTEM "file:///etc/passwd">]>
<score-partwise version="4.0"><part-list><score-part id="P1"><part-name>&secret;</part-name></score-part></part-list>
<part id="P1"/></score-partwise>
"""


@pytest.mark.parametrize("payload", [_BILLION_LAUGHS, _EXTERNAL_ENTITY], ids=["billion-laughs", "external-entity"])
def test_xml_attacks_are_refused(tmp_path, payload):
    path = tmp_path / "attack.musicxml"
    path.write_bytes(payload)
    with pytest.raises(ScoreError, match="attack.musicxml: refused: the XML declares entities"):
        load_reference(path)


def test_zip_bomb_is_refused_without_big_memory(tmp_path):
    path = tmp_path / "bomb.mxl"
    container = (b'<?xml version="1.0"?><container><rootfiles>'
                 b'<rootfile full-path="score.xml"/></rootfiles></container>')
    with zipfile.ZipFile(path, "w", compression=zipfile.ZIP_DEFLATED) as zf:
        zf.writestr("META-INF/container.xml", container)
        with zf.open("score.xml", "w", force_zip64=True) as member:
            block = b"<" + b" " * (1 << 20)
            for _ in range(MAX_XML_BYTES // len(block) + 8):
                member.write(block)
    assert path.stat().st_size < 1_000_000  # it really is a bomb: small on disk
    tracemalloc.start()
    try:
        with pytest.raises(ScoreError, match="larger than 50 MB"):
            load_reference(path)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert peak < 16 * 1024 * 1024


def test_damaged_archive_is_a_score_error(tmp_path):
    path = tmp_path / "damaged.mxl"
    with zipfile.ZipFile(path, "w", compression=zipfile.ZIP_STORED) as zf:
        zf.writestr("score.xml", b"<score-partwise/>" * 100)
    data = bytearray(path.read_bytes())
    data[60] ^= 0xFF  # inside the stored member: its CRC-32 no longer matches
    path.write_bytes(bytes(data))
    with pytest.raises(ScoreError, match="damaged.mxl"):
        load_reference(path)


def test_mxl_member_names_with_dotdot_are_refused(tmp_path):
    path = tmp_path / "evil.mxl"
    with zipfile.ZipFile(path, "w") as zf:
        zf.writestr("../../evil.xml", b"<score-partwise/>")
    with pytest.raises(ScoreError, match="unsafe member"):
        load_reference(path)


def test_not_xml_and_not_musicxml(tmp_path):
    junk = tmp_path / "junk.xml"
    junk.write_bytes(b"\x00\x01 this is not xml")
    with pytest.raises(ScoreError, match="junk.xml: not well-formed XML"):
        load_reference(junk)
    html = tmp_path / "page.xml"
    html.write_bytes(b"<html><body>hello</body></html>")
    # MusicXML 4.0 schema: the document element is score-partwise or score-timewise
    with pytest.raises(ScoreError, match=r"page.xml: XML but not MusicXML \(root element <html>"):
        load_reference(html)
    with pytest.raises(ScoreError, match="no such file"):
        load_reference(tmp_path / "missing.musicxml")
    other = tmp_path / "part.pdf"
    other.write_bytes(b"%PDF")
    with pytest.raises(ScoreError, match="unknown reference format .pdf"):
        load_reference(other)


def test_part_without_notes(tmp_path):
    part = stream.Part()
    part.partName = "Silent"
    m = stream.Measure(number=1)
    m.append([meter.TimeSignature("3/4"), note.Rest(quarterLength=3)])
    part.append(m)
    score = stream.Score()
    score.insert(0, part)
    path = score.write("musicxml", fp=tmp_path / "silent.musicxml")
    with pytest.raises(ScoreError, match="part 'Silent' has no notes"):
        load_reference(path)


# --------------------------------------------------------------------------
# MIDI
# --------------------------------------------------------------------------
def _write_midi(path, *, notes=True):
    mid = mido.MidiFile(type=1, ticks_per_beat=480)
    conductor = mido.MidiTrack()
    conductor.append(mido.MetaMessage("set_tempo", tempo=mido.bpm2tempo(90), time=0))
    conductor.append(mido.MetaMessage("time_signature", numerator=3, denominator=4, time=0))
    conductor.append(mido.MetaMessage("key_signature", key="Bb", time=0))
    conductor.append(mido.MetaMessage("set_tempo", tempo=mido.bpm2tempo(60), time=480 * 6))
    mid.tracks.append(conductor)
    for name, base, program in (("Violin", 67, 40), ("Cello", 48, 42)):
        tr = mido.MidiTrack()
        tr.append(mido.MetaMessage("track_name", name=name, time=0))
        tr.append(mido.Message("program_change", program=program, time=0))
        if notes:
            for k in range(9):
                tr.append(mido.Message("note_on", note=base + k % 5, velocity=70, time=0))
                tr.append(mido.Message("note_off", note=base + k % 5, velocity=0, time=480))
        mid.tracks.append(tr)
    mid.save(path)
    return path


def test_midi_parts_times_and_bars_match_pretty_midi(tmp_path):
    import pretty_midi

    path = _write_midi(tmp_path / "duo.mid")
    assert list_parts(path) == ["Violin", "Cello"]
    ref = load_reference(path, part="cello")
    pm = pretty_midi.PrettyMIDI(str(path))
    # pretty_midi's own tempo handling is the reference for seconds
    expected = sorted((n.start, n.end, n.pitch) for n in pm.instruments[1].notes)
    got = [(n.onset, n.offset, n.pitch) for n in ref.notes]
    assert np.allclose(np.array(got), np.array(expected))
    assert ref.midi_program == 42 and ref.part_name == "Cello"
    assert ref.time_signatures == ((0.0, 3, 4),)
    # SMF stores microseconds per quarter, so 90 bpm is 666667 us: close to, not exactly, 90
    assert np.allclose(ref.tempo_map, ((0.0, 90.0), (6.0, 60.0)), rtol=1e-5)
    assert ref.key_fifths == -2 and ref.notes[3].spelling == "Eb3"
    # 3/4: quarter 7 is bar 3, beat 2
    n7 = next(n for n in ref.notes if n.onset_quarters == 7.0)
    assert (n7.measure, n7.beat) == (3, 2.0)
    assert ref.measure_starts[:4] == (0.0, 3.0, 6.0, 9.0)


def test_midi_without_notes_and_corrupt_midi(tmp_path):
    empty = _write_midi(tmp_path / "empty.mid", notes=False)
    with pytest.raises(ScoreError, match="empty.mid: the MIDI file has no"):
        load_reference(empty)
    bad = tmp_path / "bad.mid"
    bad.write_bytes(b"MThd\x00\x00\x00\x06\x00\x01\x00\x02\x01\xe0MTrk\xff\xff")
    with pytest.raises(ScoreError, match="bad.mid: not a readable Standard MIDI File"):
        load_reference(bad)


def test_midi_defaults_follow_the_smf_specification(tmp_path):
    # SMF 1.0: without Set Tempo the tempo is 120 bpm; without Time Signature, 4/4
    mid = mido.MidiFile(type=0, ticks_per_beat=96)
    tr = mido.MidiTrack()
    tr.append(mido.Message("note_on", note=60, velocity=64, time=0))
    tr.append(mido.Message("note_off", note=60, velocity=0, time=96 * 5))
    mid.tracks.append(tr)
    path = tmp_path / "plain.mid"
    mid.save(path)
    ref = load_reference(path)
    assert ref.tempo_map == ((0.0, 120.0),) and ref.time_signatures == ((0.0, 4, 4),)
    assert ref.notes[0].offset == pytest.approx(2.5)
    assert ref.part_name == "Track 1" and ref.measure_starts == (0.0, 4.0, 8.0)
    assert isinstance(ref, Reference)


# --------------------------------------------------------------------------
# score-timewise (MusicXML 4.0 allows either document element)
# --------------------------------------------------------------------------
def _partwise_to_timewise(data: bytes) -> bytes:
    """Regroup a score-partwise document measure by measure (test helper, checked by the XSD)."""
    import lxml.etree as LET

    root = LET.fromstring(data)
    out = LET.Element("score-timewise", dict(root.attrib))
    parts = root.findall("part")
    for child in root:
        if child.tag != "part":
            out.append(child)
    for k, first_measure in enumerate(parts[0].findall("measure")):
        measure = LET.SubElement(out, "measure", dict(first_measure.attrib))
        for part in parts:
            holder = LET.SubElement(measure, "part", {"id": part.get("id")})
            holder.extend(list(part.findall("measure")[k]))
    return LET.tostring(out, xml_declaration=True, encoding="UTF-8")


def test_timewise_reads_like_partwise(our_piece_paths, tmp_path, musicxml_schema):
    import lxml.etree as LET

    from takescribe.reference.part import _timewise_to_partwise

    xml, _ = our_piece_paths
    timewise = _partwise_to_timewise(xml.read_bytes())
    schema = musicxml_schema
    # the MusicXML 4.0 schema accepts the hand-made timewise file and our partwise rewrite of it
    assert schema.validate(LET.fromstring(timewise)), schema.error_log.last_error
    import xml.etree.ElementTree as ET

    rewritten = _timewise_to_partwise(ET.fromstring(timewise))  # the stdlib tree defusedxml hands over
    assert schema.validate(LET.fromstring(rewritten.encode("utf-8"))), schema.error_log.last_error
    path = tmp_path / "timewise.musicxml"
    path.write_bytes(timewise)
    a, b = load_reference(xml), load_reference(path)
    assert a.notes == b.notes and a.tempo_map == b.tempo_map


# --------------------------------------------------------------------------
# damaged files found by tests/benchmarks/fuzz_readers.py: each is a ScoreError naming the file
# --------------------------------------------------------------------------
_TINY_PART = (b'<?xml version="1.0" encoding="UTF-8"?><score-partwise version="4.0"><part-list>'
              b'<score-part id="P1"><part-name>Flute</part-name></score-part></part-list><part id="P1">'
              b'<measure number="1"><attributes><divisions>1</divisions><time><beats>3</beats>'
              b'<beat-type>4</beat-type></time></attributes><note><pitch><step>G</step><octave>4</octave>'
              b'</pitch><duration>3</duration><type>half</type><dot/></note></measure></part></score-partwise>')


def _tiny_mxl(compression=zipfile.ZIP_DEFLATED) -> bytearray:
    import io

    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", compression=compression) as zf:
        zf.writestr("score.musicxml", _TINY_PART)
    return bytearray(buffer.getvalue())


def _headers(data: bytearray) -> tuple[int, int]:
    # ZIP APPNOTE (PKWARE .ZIP File Format Specification) 4.3.7 and 4.3.12: the local file header
    # starts "PK\x03\x04", the central directory header "PK\x01\x02"
    return data.find(b"PK\x03\x04"), data.find(b"PK\x01\x02")


def test_tiny_mxl_reads(tmp_path):
    path = tmp_path / "tiny.mxl"
    path.write_bytes(bytes(_tiny_mxl()))
    assert [n.pitch for n in load_reference(path).notes] == [67]  # G4 = MIDI 67 (ISO 16 A4 = 69)


def _damage(data: bytearray, how: str) -> bytearray:
    local, central = _headers(data)
    if how == "local-signature":
        data[local:local + 4] = b"XXXX"  # the central directory still lists the member
    elif how == "encrypted":
        # APPNOTE 4.4.4: general purpose bit 0 marks an encrypted member (local +6, central +8)
        data[local + 6] |= 1
        data[central + 8] |= 1
    elif how == "compression-method":
        # APPNOTE 4.4.5: method 1 is "shrunk", which Python's zipfile does not unpack (local +8, central +10)
        data[local + 8] = data[central + 10] = 1
    elif how == "zip-version":
        # APPNOTE 4.4.3: version needed to extract, 7.3 here (central +6)
        data[central + 6] = 73
    elif how == "deflate-stream":
        start = local + 30 + len("score.musicxml")
        data[start:start + 8] = b"\xff" * 8  # reserved block type 3 (RFC 1951, 3.2.3)
    elif how == "truncated":
        del data[central + 10:]
    elif how == "member-name":
        data[local + 30] ^= 0x20  # the local name no longer matches the central directory
    return data


@pytest.mark.parametrize("how, message", [
    ("local-signature",
     "damaged.mxl: not a readable compressed MusicXML .* damaged .*BadZipFile.*re-export it as MusicXML"),
    ("encrypted", "damaged.mxl: the .mxl archive is password-protected"),
    ("compression-method", "damaged.mxl: the .mxl archive uses a zip feature that cannot be unpacked here"),
    ("zip-version", "damaged.mxl: the .mxl archive uses a zip feature .*zip file version 7.3"),
    ("deflate-stream", "damaged.mxl: not a readable compressed MusicXML .* damaged .*error"),
    ("truncated", "damaged.mxl: not a readable compressed MusicXML"),
    ("member-name", "damaged.mxl: not a readable compressed MusicXML .* damaged"),
])
def test_damaged_mxl_archives_are_score_errors(tmp_path, how, message):
    path = tmp_path / "damaged.mxl"
    path.write_bytes(bytes(_damage(_tiny_mxl(), how)))
    with pytest.raises(ScoreError, match=message) as caught:
        load_reference(path)
    assert "\n" not in str(caught.value)  # the command line prints errors on one line


def test_mxl_read_error_names_the_file(tmp_path, monkeypatch):
    path = tmp_path / "part.mxl"
    path.write_bytes(bytes(_tiny_mxl()))

    def failing_read(self, *args, **kwargs):
        raise OSError(5, "Input/output error")

    monkeypatch.setattr(zipfile.ZipExtFile, "read", failing_read)
    with pytest.raises(ScoreError, match="part.mxl: not a readable compressed MusicXML .*Input/output error"):
        load_reference(path)


def _midi_bytes(meta: bytes, *, ticks_per_quarter: int = 96, note_ticks: int = 96) -> bytes:
    """A one-track SMF (format 0) with ``meta`` events first, then one note (SMF 1.0 layout, from memory)."""
    def vlq(value):
        out = [value & 0x7F]
        value >>= 7
        while value:
            out.insert(0, 0x80 | (value & 0x7F))
            value >>= 7
        return bytes(out)

    track = meta + b"\x00\x90\x3c\x40" + vlq(note_ticks) + b"\x80\x3c\x00" + b"\x00\xff\x2f\x00"
    header = b"MThd" + (6).to_bytes(4, "big") + (0).to_bytes(2, "big") + (1).to_bytes(2, "big")
    header += ticks_per_quarter.to_bytes(2, "big")
    return header + b"MTrk" + len(track).to_bytes(4, "big") + track


def test_midi_builder_reads(tmp_path):
    path = tmp_path / "plain.mid"
    # SMF 1.0 Time Signature meta event FF 58 04 nn dd cc bb: nn/2**dd, here 6/8
    path.write_bytes(_midi_bytes(b"\x00\xff\x58\x04\x06\x03\x18\x08"))
    ref = load_reference(path)
    assert ref.time_signatures == ((0.0, 6, 8),) and ref.notes[0].pitch == 60


@pytest.mark.parametrize("numerator, power, shown", [(3, 237, "3/2\\*\\*237"), (0, 2, "0/4"), (145, 2, "145/4"),
                                                      (3, 7, "3/128")])
def test_midi_impossible_time_signature_is_refused(tmp_path, numerator, power, shown):
    # SMF 1.0: the denominator is stored as a power of two; a damaged byte of 237 once made every bar
    # 2**-235 quarters long and the bar grid grew until memory ran out
    path = tmp_path / "meter.mid"
    path.write_bytes(_midi_bytes(bytes([0, 0xFF, 0x58, 4, numerator, power, 24, 8])))
    with pytest.raises(ScoreError, match=f"meter.mid: impossible time signature {shown}"):
        load_reference(path)


def test_midi_too_many_bars_is_refused(tmp_path):
    # the longest SMF delta time is 0x0FFFFFFF ticks (SMF 1.0 variable-length quantity, four bytes);
    # at one tick per quarter the note would end 268 million quarters in: refused by the span limit
    # (takescribe.limits) before any bar grid is laid out
    path = tmp_path / "long.mid"
    path.write_bytes(_midi_bytes(b"", ticks_per_quarter=1, note_ticks=0x0FFFFFFF))
    with pytest.raises(ScoreError, match=r"long.mid: the parts last 37282.7 hours .* at most 3 hours are read"):
        load_reference(path)


def _track(events: list) -> bytes:
    """One SMF track chunk from (delta, message bytes) pairs, ended by End of Track."""
    body = b"".join(mido_varlen(delta) + data for delta, data in events) + b"\x00\xff\x2f\x00"
    return b"MTrk" + len(body).to_bytes(4, "big") + body


def mido_varlen(value: int) -> bytes:
    # SMF 1.0 variable-length quantity: 7 bits a byte, high bit set on all but the last
    out = [value & 0x7F]
    value >>= 7
    while value:
        out.append(0x80 | (value & 0x7F))
        value >>= 7
    return bytes(reversed(out))


def test_one_midi_reader_for_parts_and_note_lists(tmp_path):
    """#14/#17: the part reader and the note-list reader give the same notes from one file.

    The file uses running status (SMF 1.0: a repeated status byte may be left out), a note-on of
    velocity 0 as a note-off (MIDI 1.0 Detailed Specification 4.2), a drum on channel 10
    (General MIDI Level 1: percussion, left out) and a note never released (closed at End of Track).
    """
    from takescribe.export.midi import read_midi_notes

    track = _track([
        (0, b"\x90\x3c\x50"), (480, b"\x3c\x00"),  # C4, released by running-status velocity 0
        (0, b"\x99\x24\x64"), (240, b"\x89\x24\x00"),  # a bass drum on channel 10
        (0, b"\x90\x40\x50"), (960, b"\xb0\x07\x64"),  # E4, never released; the track goes on 960 ticks
    ])
    path = tmp_path / "one.mid"
    path.write_bytes(b"MThd" + (6).to_bytes(4, "big") + (0).to_bytes(2, "big") + (1).to_bytes(2, "big")
                     + (480).to_bytes(2, "big") + track)
    with pytest.warns(UserWarning) as caught:
        as_list = read_midi_notes(path)
        as_part = load_reference(path).to_notes()
    messages = " ".join(str(w.message) for w in caught)
    assert "channel 10" in messages and "never released" in messages
    # 120 bpm (SMF default): 480 ticks = 0.5 s; E4 from tick 720 (0.75 s) to End of Track at tick 1680 (1.75 s)
    assert [(n.onset, n.offset, n.pitch) for n in as_list] == [(0.0, 0.5, 60), (0.75, 1.75, 64)]
    assert [(n.onset, n.offset, n.pitch) for n in as_part] == [(n.onset, n.offset, n.pitch) for n in as_list]


def test_part_over_the_measure_limit_is_refused_at_once(tmp_path):
    # music21's reader slows with the square of a part's length (10,000 measures took 5 minutes):
    # the limit is checked on the safe XML tree before music21 sees the file
    from takescribe.limits import LIMITS

    measure = '<measure number="1"><note><pitch><step>C</step><octave>4</octave></pitch><duration>1</duration></note></measure>'
    text = ('<?xml version="1.0"?><score-partwise version="4.0"><part-list><score-part id="P1"><part-name>F</part-name>'
            '</score-part></part-list><part id="P1">' + measure * (LIMITS.max_part_measures + 1) + "</part></score-partwise>")
    path = tmp_path / "long.musicxml"
    path.write_text(text)
    with pytest.raises(ScoreError, match=f"long.musicxml: {LIMITS.max_part_measures + 1} measures in one part.*"
                                         f"at most {LIMITS.max_part_measures} a part"):
        load_reference(path)


def test_midi_zero_tempo_is_refused(tmp_path):
    # SMF 1.0 Set Tempo FF 51 03 tttttt: microseconds per quarter note; 0 would be an infinite tempo
    path = tmp_path / "tempo.mid"
    path.write_bytes(_midi_bytes(b"\x00\xff\x51\x03\x00\x00\x00"))
    with pytest.raises(ScoreError, match="tempo.mid: a Set Tempo event of 0 microseconds"):
        load_reference(path)


def test_musicxml_bar_of_too_many_beats_is_refused(tmp_path):
    # music21 needs about half a minute for a 1000-beat bar (measured), so such a bar is refused first;
    # a composite "3+2" (MusicXML 4.0 <beats> is a string) still reads
    path = tmp_path / "wide.musicxml"
    path.write_bytes(_TINY_PART.replace(b"<beats>3</beats>", b"<beats>1000</beats>"))
    with pytest.raises(ScoreError, match=r"wide.musicxml: a time signature of more than 64 beats \(<beats>1000"):
        load_reference(path)
    path.write_bytes(_TINY_PART.replace(b"<beats>3</beats>", b"<beats>2+1</beats>"))
    assert load_reference(path).notes[0].pitch == 67


def test_music21_error_text_is_kept_on_one_line(tmp_path):
    # a damaged <type> whose text holds a line break: music21 quotes it in its exception
    path = tmp_path / "broken.musicxml"
    path.write_bytes(_TINY_PART.replace(b"<type>half</type>", b"<type>ha\n\nlf</type>"))
    with pytest.raises(ScoreError, match="broken.musicxml: music21 could not read") as caught:
        load_reference(path)
    assert "\n" not in str(caught.value)


@pytest.mark.parametrize("per_minute", ["0", "-60"])
def test_musicxml_tempo_mark_that_is_not_positive_is_ignored(tmp_path, per_minute):
    # music21's getQuarterBPM divides by the mark's number, so 0 per minute raised ZeroDivisionError
    mark = (f'<direction><direction-type><metronome><beat-unit>quarter</beat-unit><per-minute>{per_minute}'
            '</per-minute></metronome></direction-type></direction>').encode()
    path = tmp_path / "still.musicxml"
    path.write_bytes(_TINY_PART.replace(b"</attributes>", b"</attributes>" + mark))
    with pytest.warns(ScoreWarning, match="still.musicxml: ignoring a tempo mark"):
        ref = load_reference(path)
    # without a usable mark the written tempo is 120 quarter notes per minute (SMF 1.0 default, module docs)
    assert ref.tempo_map == ((0.0, 120.0),)
    assert ref.notes[0].offset == pytest.approx(1.5)
