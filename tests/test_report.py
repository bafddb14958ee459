"""Tests of takescribe.report.practice: the files of a practice report and their formats.

Outside references: the MusicXML 4.0 XSD (W3C Music Notation Community Group, via the
``musicxml_schema`` fixture), music21's MusicXML reader, Python's html.parser and json,
libsndfile (soundfile) for the embedded audio.
"""

from __future__ import annotations

import base64
import io
import json
import re
import sys
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from lxml import etree

sys.path.insert(0, str(Path(__file__).resolve().parent))
from test_compare import FakeAlignment, _restart_take, _single_line, study  # noqa: E402

from takescribe.comparison.compare import KINDS, compare_notes  # noqa: E402
from takescribe.errors import OutputError  # noqa: E402
from takescribe.notes import Note  # noqa: E402
from takescribe.report.practice import KIND_STYLES, annotate_musicxml, write_report  # noqa: E402


def _comparison_with_everything():
    """A take with a wrong, a missed, an extra, a late, a held-short note, a hesitation and a restart."""
    ref = study(n_measures=12)
    back_k = next(k for k, n in enumerate(ref.notes) if n.measure == 8)
    stop_k = next(k for k, n in enumerate(ref.notes) if n.measure == 9 and n.beat >= 3.0)
    played, shift = _restart_take(ref, stop_k, back_k)
    singles = _single_line(ref)
    k_wrong, k_missed, k_late, k_short = singles[3], singles[7], singles[11], singles[14]
    edited = []
    for n in played:
        if abs(n.onset - ref.notes[k_wrong].onset) < 1e-9 and n.pitch == ref.notes[k_wrong].pitch:
            n = Note(n.onset, n.offset, n.pitch + 1)
        elif abs(n.onset - ref.notes[k_missed].onset) < 1e-9 and n.pitch == ref.notes[k_missed].pitch:
            continue
        elif abs(n.onset - ref.notes[k_late].onset) < 1e-9 and n.pitch == ref.notes[k_late].pitch:
            n = Note(n.onset + 0.2, n.offset + 0.2, n.pitch)
        elif abs(n.onset - ref.notes[k_short].onset) < 1e-9 and n.pitch == ref.notes[k_short].pitch:
            n = Note(n.onset, n.onset + 0.25 * (n.offset - n.onset), n.pitch)
        edited.append(n)
    pause_at = ref.notes[singles[20]].onset
    edited = [Note(n.onset + 1.0, n.offset + 1.0, n.pitch) if n.onset >= pause_at - 1e-9 else n for n in edited]
    edited.append(Note(3.3, 3.5, 88))
    end = ref.notes[-1].offset
    s_back = ref.notes[back_k].onset
    path_s = [0, pause_at, pause_at, s_back, s_back, end]
    path_t = [0, pause_at, pause_at + 1.0, s_back + 1.0, s_back + 1.0 + shift, end + 1.0 + shift]
    result = compare_notes(ref, FakeAlignment(path_s, path_t), edited)
    return ref, result


@pytest.fixture(scope="module")
def everything():
    return _comparison_with_everything()


def test_the_synthetic_take_has_every_kind(everything):
    _, result = everything
    counts = result.summary["counts"]
    for kind in ("wrong_pitch", "missed", "extra", "late", "held_short", "hesitation", "restart"):
        assert counts[kind] >= 1, (kind, counts)


def test_files_written_and_refused_without_force(tmp_path, everything):
    ref, result = everything
    folder = tmp_path / "out" / "report"
    midi = b"MThd\x00\x00\x00\x06\x00\x00\x00\x01\x01\xe0MTrk\x00\x00\x00\x04\x00\xff\x2f\x00"  # SMF 1.0: empty type-0 file
    written = write_report(folder, result, ref, draft_midi_bytes=midi)
    assert set(written) == {"report.html", "findings.json", "annotated.musicxml", "take.mid"}
    for path in written.values():
        assert path.is_file() and path.stat().st_size > 0
    assert (folder / "take.mid").read_bytes() == midi
    with pytest.raises(OutputError, match="already exist"):
        write_report(folder, result, ref)
    write_report(folder, result, ref, force=True)
    assert not any(p.name.endswith(".partial") for p in folder.iterdir())


def test_findings_json_schema(tmp_path, everything):
    ref, result = everything
    write_report(tmp_path, result, ref)
    doc = json.loads((tmp_path / "findings.json").read_text(encoding="utf-8"))
    assert doc["schema"] == "takescribe-findings/1"
    assert set(doc["summary"]["counts"]) == set(KINDS)
    for f in doc["findings"]:
        for key in ("id", "kind", "measure", "beat", "time", "expected_pitch", "played_pitch", "deviation",
                    "reference_index", "played_index", "linked_to", "text"):
            assert key in f
    restart = next(f for f in doc["findings"] if f["kind"] == "restart")
    assert all(restart[k] is not None for k in ("from_time", "to_time", "from_measure", "to_measure"))
    assert any(f["linked_to"] == restart["id"] for f in doc["findings"])


def test_annotated_musicxml_validates_and_reimports(tmp_path, everything, musicxml_schema):
    ref, result = everything
    write_report(tmp_path, result, ref)
    data = (tmp_path / "annotated.musicxml").read_bytes()
    document = etree.fromstring(data)
    schema = musicxml_schema
    # MusicXML 4.0 XSD (W3C Music Notation Community Group): the file must be valid
    assert schema.validate(document), schema.error_log.filter_from_errors()[:5]
    # every kind with a notehead shows up with its colour and shape
    heads = {(h.text, h.get("color")) for h in document.iter("notehead")}
    for kind in ("wrong_pitch", "missed", "late", "held_short"):
        assert (KIND_STYLES[kind].notehead, KIND_STYLES[kind].colour) in heads
    words = " ".join(t.text or "" for t in document.iter("words"))
    assert "+E6" in words and "restart: back to bar 8" in words
    # music21 reads it back with the same number of notes as the part
    import music21

    score = music21.converter.parse(data, format="musicxml").stripTies()
    pitches = sorted(p.midi for n in score.recurse().notes for p in n.pitches)
    assert pitches == sorted(n.pitch for n in ref.notes)


def test_annotated_musicxml_from_a_real_file(tmp_path, musicxml_schema):
    """Annotate a MusicXML file written by music21 (our own little tune) and validate it."""
    import music21

    from takescribe.reference.part import load_reference

    tune = music21.converter.parse("tinyNotation: 4/4 c4 d8 e8 f4 g4 a4 g4 e4 c4 d2 r2", makeNotation=True)
    source = tmp_path / "tune.musicxml"
    tune.write("musicxml", fp=str(source))
    ref = load_reference(source)
    played = [Note(n.onset, n.offset, n.pitch + (2 if k == 3 else 0)) for k, n in enumerate(ref.notes) if k != 5]
    result = compare_notes(ref, None, played)
    assert {f.kind for f in result.findings} == {"wrong_pitch", "missed"}
    data = annotate_musicxml(result, ref)
    assert musicxml_schema.validate(etree.fromstring(data))
    marked = [n for n in etree.fromstring(data).iter("note") if n.get("color")]
    assert len(marked) == 2


class _Collector(HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags: list = []
        self.references: list = []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        for name, value in attrs:
            if name in ("src", "href", "xlink:href", "data", "action", "poster") and value:
                self.references.append(value)


def test_html_is_self_contained_with_piano_roll_and_table(tmp_path, everything):
    ref, result = everything
    take = tmp_path / "take.flac"
    sr = 8000
    sf.write(take, (0.1 * np.sin(2 * np.pi * 440 * np.arange(sr) / sr)).astype(np.float32), sr)
    write_report(tmp_path / "r", result, ref, take_path=take)
    page = (tmp_path / "r" / "report.html").read_text(encoding="utf-8")
    parser = _Collector()
    parser.feed(page)
    assert parser.tags.count("svg") >= 3  # piano-roll rows, tempo curve, legend and table markers
    assert "table" in parser.tags and page.count("<tr") == len(result.findings) + 1
    assert "not a grade" in page and "on this computer only" in page
    # nothing is fetched from elsewhere: every src/href is a data: URI or an in-page anchor
    assert parser.references, "the audio should be embedded"
    for ref_value in parser.references:
        assert ref_value.startswith(("data:", "#")), ref_value
    assert not re.search(r"""(src|href)\s*=\s*["']?\s*(https?:)?//""", page)
    assert "@import" not in page and "url(http" not in page
    # the embedded audio decodes back to the take (libsndfile)
    uri = next(r for r in parser.references if r.startswith("data:audio/"))
    audio, audio_sr = sf.read(io.BytesIO(base64.b64decode(uri.split(",", 1)[1])))
    assert audio_sr == sr and len(audio) == sr
    for f in result.findings:
        assert f"#{f.id} " in page


def test_large_take_is_embedded_smaller(tmp_path, everything, monkeypatch):
    import takescribe.report.practice as report

    ref, result = everything
    take = tmp_path / "take.wav"
    sr = 22050
    sf.write(take, (0.1 * np.sin(2 * np.pi * 220 * np.arange(3 * sr) / sr)).astype(np.float32), sr)
    monkeypatch.setattr(report, "MAX_EMBED_BYTES", take.stat().st_size // 4)
    mime, data = report._embedded_audio(take)
    assert len(data) < take.stat().st_size // 4
    audio, audio_sr = sf.read(io.BytesIO(data))
    assert audio_sr <= 16000 and abs(len(audio) / audio_sr - 3.0) < 0.05


def test_annotated_two_staff_fixture_validates(tmp_path, musicxml_schema):
    """A committed piano part (two staves, chords) annotated from its deviation take."""
    from takescribe.export.noteio import read_notes
    from takescribe.reference.part import load_reference

    folder = Path(__file__).resolve().parents[1] / "fixtures" / "deviations"
    score, take = folder / "dev_piano_march.musicxml", folder / "dev_piano_march_pitch.txt"
    if not (score.exists() and take.exists()):
        pytest.skip(f"deviation fixtures not built in {folder}")
    ref = load_reference(score)
    result = compare_notes(ref, None, read_notes(take))
    data = annotate_musicxml(result, ref)
    document = etree.fromstring(data)
    schema = musicxml_schema
    assert schema.validate(document), schema.error_log.filter_from_errors()[:5]
    # both staves are kept, and every finding on a note of the part is marked on that note
    assert len(document.findall(".//note")) >= len(ref.notes)
    marked = {f.reference_index for f in result.findings if f.reference_index is not None and f.kind != "restart"}
    assert len([n for n in document.iter("note") if n.get("color")]) == len(marked) > 0


@pytest.mark.parametrize("beat, shown", [(1.0, "1"), (3.5, "3½"), (2.25, "2¼"), (4.75, "4¾"), (1 + 1 / 3, "1⅓"),
                                         (2.98, "3"), (3.41, "3.4"), (None, "")])
def test_beats_are_shown_as_musicians_count_them(beat, shown):
    # Common practice, no source: positions inside a beat are read as halves, quarters and
    # thirds (triplets) of it; anything else is shown to one decimal.
    from takescribe.report.practice import _format_beat

    assert _format_beat(beat) == shown
