"""Tests of takescribe.notation: quantized MusicXML 4.0 drafts.

Ground truth: pieces written here with music21 (our own invented exercises) and pieces of
music21's bundled corpus (a Bach chorale, a German folk song of the Essen collection).
Each is "performed" at a fixed tempo (exact times plus a few ms of seeded jitter), notated
back, written as MusicXML, re-imported with music21 and compared note by note: pitch
spelling, bar, position in the bar and notated length. Run ``pytest -s`` to see the
per-piece figures.
"""

from __future__ import annotations

import shutil
import subprocess
from collections import Counter
from dataclasses import dataclass
from fractions import Fraction
from pathlib import Path

import numpy as np
import pytest

from takescribe.errors import InputError, OutputError
from takescribe.notation import (
    BeatGrid,
    Notation,
    assign_voices,
    estimate_meter,
    notate,
    parse_time_signature,
    quantize,
    spell_pitch,
    split_hands,
    write_musicxml,
    QuantizedNote,
)
from takescribe.notes import Note

music21 = pytest.importorskip("music21")
from music21 import chord, converter, corpus, key, meter, note, stream, tempo  # noqa: E402

SOUNDFONT = Path("/usr/share/sounds/sf2/FluidR3_GM.sf2")
QUARTER_SECONDS = 0.6  # performance tempo: quarter = 100 per minute

# ---------------------------------------------------------------------------- pieces (ours)


def _part(name: str, clef_name: str, key_obj, ts: str, measures: list[list]) -> stream.Part:
    """A part from bars of (pitch-or-None-or-chord-list, quarterLength) items."""
    from music21 import clef

    p = stream.Part()
    p.partName = name
    for i, items in enumerate(measures):
        m = stream.Measure(number=i + 1)
        if i == 0:
            m.insert(0, clef.TrebleClef() if clef_name == "treble" else clef.BassClef())
            m.insert(0, key_obj)
            m.insert(0, meter.TimeSignature(ts))
        for what, ql in items:
            if what is None:
                el = note.Rest()
            elif isinstance(what, list):
                el = chord.Chord(what)
            else:
                el = note.Note(what)
            el.quarterLength = Fraction(ql)
            m.append(el)
        p.append(m)
    return p


def piece_morning_c() -> stream.Score:
    """'Morning Exercise' (our own), C major, 4/4, one line with dotted and 16th rhythms."""
    bars = [
        [("C5", 1), ("E5", 0.5), ("G5", 0.5), ("F5", 1), ("D5", 1)],
        [("E5", 1.5), ("D5", 0.5), ("C5", 2)],
        [("G4", 0.5), ("A4", 0.5), ("B4", 0.5), ("C5", 0.5), ("D5", 0.25), ("E5", 0.25), ("F5", 0.25), ("D5", 0.25), ("G5", 1)],
        [("A5", 1), ("F#5", 1), ("G5", 2)],
        [("E5", 0.75), ("D5", 0.25), ("C5", 1), ("B4", 1), ("A4", 1)],
        [("G4", 1), ("B-4", 1), ("A4", 2)],
        [("D5", 1), (None, 1), ("B4", 1), ("G4", 1)],
        [("C5", 4)],
    ]
    s = stream.Score()
    s.insert(0, _part("Flute", "treble", key.Key("C"), "4/4", bars))
    return s


def piece_waltz_g() -> stream.Score:
    """'Little Waltz' (our own), G major, 3/4, piano: melody with a triplet over oom-pah-pah."""
    rh = [
        [("B4", 2), ("D5", 1)],
        [("C5", 1), ("B4", 1), ("A4", 1)],
        [("G4", 1), ("A4", Fraction(1, 3)), ("B4", Fraction(1, 3)), ("C5", Fraction(1, 3)), ("D5", 1)],
        [("E5", 2), ("C#5", 1)],
        [("D5", 1.5), ("E5", 0.5), ("F#5", 1)],
        [("G5", 2), ("D5", 1)],
        [("C5", 1), ("A4", 1), ("F#4", 1)],
        [("G4", 3)],
    ]
    lh = [
        [("G2", 1), (["B3", "D4"], 1), (["B3", "D4"], 1)],
        [("D3", 1), (["A3", "C4"], 1), (["A3", "C4"], 1)],
        [("G2", 1), (["B3", "D4"], 1), (["B3", "D4"], 1)],
        [("A2", 1), (["G3", "C#4"], 1), (["G3", "C#4"], 1)],
        [("D3", 1), (["A3", "C4"], 1), (["A3", "C4"], 1)],
        [("B2", 1), (["G3", "D4"], 1), (["G3", "D4"], 1)],
        [("D3", 1), (["A3", "C4"], 1), (["A3", "C4"], 1)],
        [("G2", 3)],
    ]
    s = stream.Score()
    s.insert(0, _part("Piano", "treble", key.Key("G"), "3/4", rh))
    s.insert(0, _part("Piano", "bass", key.Key("G"), "3/4", lh))
    return s


def piece_study_d_minor() -> stream.Score:
    """'Study in D minor' (our own), 4/4, piano: running eighths over half-note bass."""
    rh = [
        [("D5", 0.5), ("E5", 0.5), ("F5", 0.5), ("A5", 0.5), ("G5", 0.5), ("F5", 0.5), ("E5", 0.5), ("D5", 0.5)],
        [("C#5", 0.5), ("D5", 0.5), ("E5", 0.5), ("A4", 0.5), ("E5", 2)],
        [("F5", 0.5), ("G5", 0.5), ("A5", 0.5), ("B-5", 0.5), ("A5", 1), ("G5", 1)],
        [("F5", 1), ("E5", 1), ("D5", 2)],
        [("B-4", 0.5), ("C5", 0.5), ("D5", 0.5), ("E5", 0.5), ("F5", 1), ("C#5", 1)],
        [("D5", 4)],
    ]
    lh = [
        [("D3", 2), ("A2", 2)],
        [("A2", 2), (["A2", "E3"], 2)],
        [("D3", 2), ("B-2", 2)],
        [("A2", 2), ("D3", 2)],
        [("G2", 2), ("A2", 2)],
        [(["D2", "A2"], 4)],
    ]
    s = stream.Score()
    s.insert(0, _part("Piano", "treble", key.Key("d"), "4/4", rh))
    s.insert(0, _part("Piano", "bass", key.Key("d"), "4/4", lh))
    return s


def piece_barcarolle_b_flat() -> stream.Score:
    """'Barcarolle' (our own), B-flat major, 6/8, one line for clarinet-like range."""
    bars = [
        [("F4", 1), ("B-4", 0.5), ("D5", 1), ("C5", 0.5)],
        [("B-4", 1.5), ("F4", 1.5)],
        [("G4", 0.5), ("A4", 0.5), ("B-4", 0.5), ("C5", 1), ("E-5", 0.5)],
        [("D5", 1.5), (None, 1), ("F5", 0.5)],
        [("E-5", 1), ("D5", 0.5), ("C5", 1), ("A4", 0.5)],
        [("B-4", 3)],
    ]
    s = stream.Score()
    s.insert(0, _part("Clarinet", "treble", key.Key("B-"), "6/8", bars))
    return s


def piece_bach_chorale() -> stream.Score:
    """J. S. Bach, chorale BWV 66.6 (music21 corpus 'bach/bwv66.6'), F-sharp minor, 4/4, pickup."""
    return corpus.parse("bach/bwv66.6")


def piece_folk_song() -> stream.Score:
    """'Zwei Koenigskinder', Essen folk-song collection (music21 corpus), G minor, 3/4, pickup."""
    return corpus.parse("essenFolksong/altdeu10", number=27)


# (builder, GM program, instrument name) -- piano pieces get a grand staff
PIECES = {
    "morning_c_4-4": (piece_morning_c, 73, "Flute"),
    "waltz_g_3-4_piano": (piece_waltz_g, 0, "Piano"),
    "study_d_minor_4-4_piano": (piece_study_d_minor, 0, "Piano"),
    "barcarolle_b_flat_6-8": (piece_barcarolle_b_flat, 71, "Clarinet"),
    "bach_bwv66.6_piano": (piece_bach_chorale, 0, "Piano"),
    "folk_zwei_koenigskinder": (piece_folk_song, 40, "Violin"),
}

# ---------------------------------------------------------------------------- helpers


@dataclass(frozen=True)
class FakeReference:
    """The attributes of takescribe.score.Reference that notation uses (score.py is written
    concurrently; this mirrors the interface in DEVELOPERS.md)."""

    tempo_map: tuple
    time_signatures: tuple
    measure_starts: tuple
    key_fifths: int
    part_name: str
    instrument_name: str
    midi_program: int

    def quarters_to_seconds(self, q):
        return np.asarray(q, dtype=float) * QUARTER_SECONDS

    def seconds_to_quarters(self, t):
        return np.asarray(t, dtype=float) / QUARTER_SECONDS


class IdentityAlignment:
    """Take time equals score time."""

    def take_to_score(self, t):
        return np.asarray(t, dtype=float)

    def score_to_take(self, t):
        return np.asarray(t, dtype=float)


def reference_of(score: stream.Score, program: int, name: str) -> FakeReference:
    p0 = score.parts[0]
    measures = list(p0.getElementsByClass(stream.Measure))
    tss = []
    for ts in p0.recurse().getElementsByClass(meter.TimeSignature):
        q = Fraction(ts.getOffsetInHierarchy(p0)).limit_denominator(48)
        if not tss or (tss[-1][1], tss[-1][2]) != (ts.numerator, ts.denominator):
            tss.append((q, ts.numerator, ts.denominator))
    ks = next(iter(p0.recurse().getElementsByClass(key.KeySignature)))
    return FakeReference(
        tempo_map=((Fraction(0), 60.0 / QUARTER_SECONDS),),
        time_signatures=tuple(tss),
        measure_starts=tuple(Fraction(m.getOffsetInHierarchy(p0)).limit_denominator(48) for m in measures),
        key_fifths=int(ks.sharps),
        part_name=name,
        instrument_name=name,
        midi_program=program,
    )


def note_table(score: stream.Score) -> list[tuple]:
    """(midi, spelled name, bar index, position in bar, notated length) of every sounding note,
    tied notes merged (music21 ``stripTies``), chords expanded."""
    rows = []
    for part in score.parts:
        part = part.stripTies()
        for i, m in enumerate(part.getElementsByClass(stream.Measure)):
            # a pickup bar counts from where its notes fall in a full bar
            pad = Fraction(0)
            bar = Fraction(m.barDuration.quarterLength).limit_denominator(48)
            if i == 0 and Fraction(m.duration.quarterLength).limit_denominator(48) < bar:
                pad = bar - Fraction(m.duration.quarterLength).limit_denominator(48)
            for el in m.recurse().notes:
                if el.duration.isGrace:
                    continue
                pos = pad + Fraction(el.getOffsetInHierarchy(m)).limit_denominator(48)
                ql = Fraction(el.quarterLength).limit_denominator(48)
                for p in el.pitches:
                    rows.append((p.midi, p.nameWithOctave, i, pos, ql))
    # unisons of two parts sound as one key on a piano: keep the longer
    longest: dict[tuple, tuple] = {}
    for r in rows:
        k = (r[0], r[2], r[3])
        if k not in longest or longest[k][4] < r[4]:
            longest[k] = r
    return sorted(longest.values())


def perform(score: stream.Score, *, seed: int = 0, jitter: float = 0.005, accent: bool = True) -> list[Note]:
    """Notes in seconds at quarter = 100: exact onsets plus seeded jitter (a few ms), each note
    released 30 ms early (so repeated notes re-strike), a little louder on the first beat of a
    bar (metric accent: common practice, no source)."""
    rng = np.random.default_rng(seed)
    out = []
    for part in score.parts:
        flat = part.stripTies().flatten()
        measures = list(part.getElementsByClass(stream.Measure))
        starts = {float(m.getOffsetInHierarchy(part)) for m in measures}
        for el in flat.notes:
            if el.duration.isGrace:
                continue
            on = float(el.offset) * QUARTER_SECONDS
            off = on + float(el.quarterLength) * QUARTER_SECONDS - 0.03
            vel = 84 if accent and float(el.offset) in starts else 70 + (6 if not accent else 0)
            for p in el.pitches:
                j = rng.normal(0, jitter, 2)
                out.append(Note(max(on + j[0], 0.0), off + j[1], p.midi, vel))
    return out


def render_audio(notes: list[Note], program: int, folder: Path) -> tuple[np.ndarray, int]:
    """Render notes with fluidsynth and FluidR3_GM (Debian fluid-soundfont-gm)."""
    import librosa
    import pretty_midi

    pm = pretty_midi.PrettyMIDI(initial_tempo=100.0)
    inst = pretty_midi.Instrument(program=program)
    for n in notes:
        inst.notes.append(pretty_midi.Note(velocity=n.velocity, pitch=n.pitch, start=n.onset, end=n.offset))
    pm.instruments.append(inst)
    mid = folder / "take.mid"
    wav = folder / "take.wav"
    pm.write(str(mid))
    subprocess.run(["fluidsynth", "-ni", "-q", "-F", str(wav), "-r", "22050", str(SOUNDFONT), str(mid)],
                   check=True, capture_output=True, timeout=120)
    y, sr = librosa.load(str(wav), sr=22050, mono=True)
    return y, sr


def agreement(truth: list[tuple], got: list[tuple], *, relative_bars: bool) -> float:
    """Share of ground-truth notes found with the same spelling, bar, position and length."""
    def norm(rows):
        if not rows:
            return Counter()
        first_bar = min(r[2] for r in rows) if relative_bars else 0
        return Counter((r[1], r[2] - first_bar, r[3], r[4]) for r in rows)

    t, g = norm(truth), norm(got)
    return sum((t & g).values()) / max(1, sum(t.values()))


def xsd_schema(xsd_dir: Path):
    """The MusicXML 4.0 schema with its xml.xsd / xlink.xsd imports pointed at the local copies
    (as SOURCE.md in the standards folder describes)."""
    from lxml import etree

    text = (xsd_dir / "musicxml.xsd").read_text(encoding="utf-8")
    text = text.replace("http://www.musicxml.org/xsd/xml.xsd", (xsd_dir / "xml.xsd").as_uri())
    text = text.replace("http://www.musicxml.org/xsd/xlink.xsd", (xsd_dir / "xlink.xsd").as_uri())
    return etree.XMLSchema(etree.fromstring(text.encode("utf-8"), base_url=(xsd_dir / "musicxml.xsd").as_uri()))


def validate_xml(path: Path, schema) -> None:
    from lxml import etree

    doc = etree.parse(str(path), etree.XMLParser(load_dtd=False, no_network=True, resolve_entities=False))
    assert schema.validate(doc), f"{path.name}: {schema.error_log.last_error}"


_FIGURES: dict[str, dict[str, float]] = {}


@pytest.fixture(scope="module")
def schema(musicxml_xsd_dir):
    return xsd_schema(musicxml_xsd_dir)
