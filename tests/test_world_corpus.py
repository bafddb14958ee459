"""Smoke test of the "world" corpus builder (fixtures/build_world.py, contract ../helpers/WORLD.md).

Builds three takes into a temporary folder (a transposing melody, a piano take with the sustain
pedal, a phone take) and checks the manifest against its contract and against outside readers:
the MIDI files read by mido (Standard MIDI File spec: a note-on with velocity 0 is a note-off),
the parts by music21, the written part by the MusicXML 4.0 XSD, the audio by soundfile / PyAV.
"""

from __future__ import annotations

import json
import shutil
import sys
from collections import Counter

import numpy as np
import pytest

from conftest import FIXTURES

TOOLS = ("fluidsynth", "espeak-ng", "ffmpeg")
SOUNDFONTS = ("/usr/share/sounds/sf2/FluidR3_GM.sf2", "/usr/share/sounds/sf2/sf_GMbank.sf2")
KINDS = {"wrong_pitch", "missed", "extra", "early", "late", "hesitation", "restart", "rushed",
         "dragged", "held_short", "held_long"}


def _missing() -> str | None:
    from pathlib import Path

    for tool in TOOLS:
        if shutil.which(tool) is None:
            return f"{tool} is not installed (Debian package {tool}); the corpus builder needs it"
    for sf in SOUNDFONTS:
        if not Path(sf).exists():
            return f"soundfont {sf} is absent (fluid-soundfont-gm / csound-soundfont)"
    for mod in ("pyroomacoustics", "av"):
        try:
            __import__(mod)
        except ImportError:
            return f"python package {mod} is not installed"
    return None


@pytest.fixture(scope="module")
def world(tmp_path_factory):
    reason = _missing()
    if reason:
        pytest.skip(reason)
    sys.path.insert(0, str(FIXTURES))
    import build_world

    catalog = {e.spec.name: e for e in build_world.world_pieces.catalog()}
    plans = build_world.plan_takes(list(catalog.values()))

    def length(p):
        s = catalog[p.piece].spec
        return s.end_beats * 60.0 / s.tempo_qpm

    def shortest(pred):
        return min((p for p in plans if pred(p)), key=length).id

    ids = [shortest(lambda p: catalog[p.piece].instrument in ("clarinet", "alto saxophone") and p.kinds),
           shortest(lambda p: p.condition == "pedal"),
           shortest(lambda p: p.condition == "phone")]
    out = tmp_path_factory.mktemp("world")
    build_world.build(out, jobs=1, only=ids)
    manifest = json.loads((out / "manifest.json").read_text())
    return out, manifest, ids


def _maps(path):
    rows = np.loadtxt(path, skiprows=1, ndmin=2)
    return rows


def _midi_notes(path):
    import mido

    count, now, sustain = 0, 0, []
    for msg in mido.MidiFile(str(path)):
        now += msg.time
        if msg.type == "note_on" and msg.velocity > 0:  # SMF: note-on with velocity 0 is a note-off
            count += 1
        if msg.type == "control_change" and msg.control == 64:
            sustain.append((now, msg.value))
    return count, sustain


def test_manifest_fields(world):
    # contract: ../helpers/WORLD.md (the fields every other helper reads)
    out, manifest, ids = world
    assert manifest["version"] == 1 and manifest["complete"] is True
    assert sorted(t["id"] for t in manifest["takes"]) == sorted(ids)
    for t in manifest["takes"]:
        assert t["family"] in {"piano_chorale", "piano_two_hand", "melody"}
        assert t["soundfont"] in {"fluid", "csound"}
        assert t["split"] in {"tuning", "heldout"}
        assert t["source"].split(":")[0] in {"music21", "invented"}
        assert t["correct"] == (not t["deviation_kinds"])
        for key in ("audio", "part", "played", "midi", "deviations"):
            assert (out / t["files"][key]).exists(), (t["id"], key)
        assert t["files"]["audio"].endswith(".m4a" if t["condition"] == "phone" else ".flac")
        if t["condition"] == "phone":
            assert t["split"] == "heldout"  # phone is one of the held-out-only conditions


def test_ground_truth_matches_midi(world):
    # note counts: the MAPS-style ground truth against the rendered MIDI read by mido (SMF spec)
    out, manifest, _ = world
    for t in manifest["takes"]:
        truth = _maps(out / t["files"]["played"])
        n_midi, sustain = _midi_notes(out / t["files"]["midi"])
        assert len(truth) == n_midi == t["notes_count"]
        assert np.all(truth[:, 1] > truth[:, 0])
        assert truth[:, 1].max() <= t["duration_s"]
        if t["condition"] == "pedal":
            assert sustain and sustain[0][1] == 127 and sustain[-1][1] == 0
            sounding = _maps(out / t["files"]["sounding"])
            assert len(sounding) == len(truth)
            assert np.all(sounding[:, 1] >= truth[:, 1] - 1e-6)
            assert np.any(sounding[:, 1] > truth[:, 1] + 0.05)  # the pedal holds some notes


def test_audio_duration(world):
    # durations: the file as decoded by soundfile (FLAC) or PyAV (AAC in .m4a)
    import soundfile as sf

    out, manifest, _ = world
    for t in manifest["takes"]:
        path = out / t["files"]["audio"]
        if path.suffix == ".flac":
            info = sf.info(str(path))
            assert info.samplerate == 22050 and info.channels == 1
            seconds = info.frames / info.samplerate
        else:
            import av

            with av.open(str(path)) as c:
                stream = c.streams.audio[0]
                assert stream.codec_context.name == "aac"
                seconds = float(stream.duration * stream.time_base)
            assert abs(t["condition_params"]["codec_offset_s"]) <= 0.002
        assert seconds == pytest.approx(t["duration_s"], abs=0.05)


def test_parts_parse_and_match_correct_pitches(world):
    # the parts read back through music21; a take's pitches differ from the part's only by its deviations
    from music21 import converter

    out, manifest, _ = world
    for t in manifest["takes"]:
        score = converter.parse(str(out / t["files"]["part"]))
        part_pitches = Counter(p.midi for n in score.stripTies().flatten().notes for p in n.pitches)
        played = Counter(int(p) for p in _maps(out / t["files"]["played"])[:, 2])
        devs = json.loads((out / t["files"]["deviations"]).read_text())
        assert {d["kind"] for d in devs} <= KINDS
        assert [d["kind"] for d in devs] == t["deviation_kinds"]
        if not {"wrong_pitch", "missed", "extra", "restart"} & set(t["deviation_kinds"]):
            assert played == part_pitches, t["id"]
        for d in devs:
            assert 0.0 < d["time"] < t["duration_s"]
            if d["kind"] in ("rushed", "dragged"):
                assert d["start_s"] < d["end_s"] and d["first_bar"] <= d["last_bar"]
                assert (d["tempo_factor"] > 1) == (d["kind"] == "rushed")


def test_written_part_is_valid_and_transposed(world, musicxml_schema):
    # MusicXML 4.0 XSD (../shared/standards); <transpose> chromatic = written -> sounding semitones
    from lxml import etree
    from music21 import converter

    out, manifest, _ = world
    takes = [t for t in manifest["takes"] if t["transposition"]]
    assert takes
    for t in takes:
        doc = etree.parse(str(out / t["files"]["part_written"]))
        assert musicxml_schema.validate(doc), musicxml_schema.error_log
        assert int(doc.findtext(".//transpose/chromatic")) == t["transposition"]
        assert etree.parse(str(out / t["files"]["part"])).find(".//transpose") is None
        written = [p.midi for n in converter.parse(str(out / t["files"]["part_written"])).flatten().notes
                   for p in n.pitches]
        concert = [p.midi for n in converter.parse(str(out / t["files"]["part"])).flatten().notes
                   for p in n.pitches]
        assert [w + t["transposition"] for w in written] == concert
