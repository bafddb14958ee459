"""Consistency of the committed rendered fixtures (fixtures/corpus, fixtures/deviations).

The fixtures are rebuilt by ``fixtures/build_corpus.py``; these checks make sure what is
committed agrees with itself and with outside readers: the MusicXML parses with music21,
the MIDI files read with mido (Standard MIDI File spec), the FLAC files with soundfile.
"""

from __future__ import annotations

import json
from collections import Counter
from pathlib import Path

import mido
import numpy as np
import pytest
import soundfile as sf

FIXTURES = Path(__file__).resolve().parents[1] / "fixtures"
CORPUS = FIXTURES / "corpus"
DEVIATIONS = FIXTURES / "deviations"
MAPS_HEADER = "OnsetTime\tOffsetTime\tMidiPitch"
KINDS = {"wrong_pitch", "missed", "extra", "early", "late", "hesitation", "restart"}
ENTRY_KEYS = {"name", "split", "category", "instrument_program", "instrument_name", "soundfont",
              "tempo_bpm", "tuning_hz", "latency_s", "duration_s", "notes_count", "files"}

pytestmark = pytest.mark.skipif(not (CORPUS / "index.json").exists(),
                                reason="fixtures/corpus not built (python fixtures/build_corpus.py)")


def read_maps(path: Path) -> np.ndarray:
    """Rows (onset, offset, pitch) of a MAPS-style file, checking its layout on the way."""
    lines = path.read_text(encoding="utf-8").splitlines()
    assert lines[0] == MAPS_HEADER, f"{path}: header"
    rows = []
    for i, line in enumerate(lines[1:], start=2):
        cols = line.split("\t")
        assert len(cols) == 3, f"{path}:{i}: expected 3 tab-separated columns"
        assert len(cols[0].split(".")[1]) >= 4 and len(cols[1].split(".")[1]) >= 4, f"{path}:{i}: decimals"
        onset, offset, pitch = float(cols[0]), float(cols[1]), int(cols[2])
        assert 0 <= onset < offset, f"{path}:{i}: onset/offset"
        assert 0 <= pitch <= 127, f"{path}:{i}: pitch"
        rows.append((onset, offset, pitch))
    arr = np.array(rows, dtype=float).reshape(-1, 3)
    keys = list(zip(arr[:, 0], arr[:, 2]))
    assert keys == sorted(keys), f"{path}: not sorted by onset then pitch"
    return arr


def read_midi(path: Path) -> np.ndarray:
    """(onset, offset, pitch) from a MIDI file; mido turns ticks into seconds with the tempo
    meta events, as the Standard MIDI File spec defines."""
    active: dict[tuple[int, int], list[float]] = {}
    notes = []
    now = 0.0
    for msg in mido.MidiFile(path):
        now += msg.time
        if msg.type == "note_on" and msg.velocity > 0:
            active.setdefault((msg.channel, msg.note), []).append(now)
        elif msg.type in ("note_off", "note_on"):
            start = active[(msg.channel, msg.note)].pop(0)
            notes.append((start, now, msg.note))
    assert not any(active.values()), f"{path}: notes left on"
    return np.array(sorted(notes, key=lambda r: (r[0], r[2])), dtype=float).reshape(-1, 3)


def score_notes(path: Path) -> list[tuple[int, float, int]]:
    """(measure, beat, pitch) of every sounding pitch in a MusicXML file, ties merged (music21)."""
    from music21 import converter

    score = converter.parse(str(path)).stripTies()
    out = []
    for n in score.recurse().notes:
        for p in n.pitches:
            out.append((int(n.measureNumber), float(n.beat), int(p.midi)))
    return out


def latency_table(folder: Path) -> dict[tuple[str, int, int], float]:
    rows = json.loads((folder / "latencies.json").read_text(encoding="utf-8"))["latencies"]
    return {(r["soundfont"], r["program"], r["pitch"]): r["latency_s"] for r in rows}


def midi_on_audio_time_line(midi: np.ndarray, entry: dict, table: dict) -> np.ndarray:
    """The MIDI notes moved as the build moves them: by latency(pitch) - the audio trim."""
    shift = np.array([table[(entry["soundfont"], entry["instrument_program"], int(p))] for p in midi[:, 2]])
    out = midi.copy()
    out[:, :2] += (shift - entry["latency_s"])[:, None]
    return out[np.lexsort((out[:, 2], out[:, 0]))]


@pytest.fixture(scope="module")
def index() -> list[dict]:
    return json.loads((CORPUS / "index.json").read_text(encoding="utf-8"))


@pytest.fixture(scope="module")
def dev_index() -> list[dict]:
    return json.loads((DEVIATIONS / "index.json").read_text(encoding="utf-8"))


def test_index_entries_complete_and_files_exist(index):
    names = [e["name"] for e in index]
    assert len(names) == len(set(names))
    for e in index:
        assert ENTRY_KEYS <= set(e), e["name"]
        assert e["split"] in ("tuning", "heldout") and e["category"] in ("piano", "melody", "adverse")
        assert set(e["files"]) == {"audio", "notes", "midi", "score"}
        for rel in e["files"].values():
            assert (CORPUS / rel).is_file(), f"{e['name']}: missing {rel}"
            assert rel.startswith(e["split"] + "/")


def test_splits_balanced_and_both_soundfonts_used(index):
    counts = Counter((e["category"], e["split"]) for e in index)
    for cat in ("piano", "melody", "adverse"):
        total = counts[(cat, "tuning")] + counts[(cat, "heldout")]
        assert abs(counts[(cat, "tuning")] - counts[(cat, "heldout")]) <= max(1, total // 4), cat
    for split in ("tuning", "heldout"):
        assert {e["soundfont"] for e in index if e["split"] == split} == {"FluidR3_GM", "sf_GMbank"}
    # the task asks for at least five melody instruments
    assert len({e["instrument_program"] for e in index if e["category"] == "melody"}) >= 5


def test_maps_files_match_the_rendered_midi(index):
    table = latency_table(CORPUS)
    for e in index:
        truth = read_maps(CORPUS / e["files"]["notes"])
        assert len(truth) == e["notes_count"], e["name"]
        midi = midi_on_audio_time_line(read_midi(CORPUS / e["files"]["midi"]), e, table)
        assert midi.shape == truth.shape, e["name"]
        assert np.array_equal(midi[:, 2], truth[:, 2]), e["name"]
        # one MIDI tick is at most 60 / (40 qpm * 1920) = 0.8 ms; the text keeps 6 decimals
        assert np.abs(midi[:, :2] - truth[:, :2]).max() < 1e-3, e["name"]


def test_flac_format_and_duration_cover_the_notes(index):
    for e in index:
        info = sf.info(str(CORPUS / e["files"]["audio"]))
        assert (info.samplerate, info.channels, info.subtype, info.format) == (22050, 1, "PCM_16", "FLAC")
        truth = read_maps(CORPUS / e["files"]["notes"])
        assert info.duration >= truth[:, 1].max(), e["name"]
        assert info.duration == pytest.approx(e["duration_s"], abs=1e-3)


def test_flac_is_not_silent_where_notes_sound(index):
    # energy in the first 100 ms after each of a few onsets exceeds the energy before the first note
    for e in index[:: max(1, len(index) // 6)]:
        y, sr = sf.read(str(CORPUS / e["files"]["audio"]))
        truth = read_maps(CORPUS / e["files"]["notes"])
        lead = y[: int(truth[0, 0] * sr) - int(0.02 * sr)]
        first = y[int(truth[0, 0] * sr): int((truth[0, 0] + 0.1) * sr)]
        assert np.sqrt(np.mean(first ** 2)) > 10 * np.sqrt(np.mean(lead ** 2) + 1e-12), e["name"]


def test_musicxml_note_count_and_marks_match(index):
    from music21 import converter, key, meter, tempo

    for e in index:
        path = CORPUS / e["files"]["score"]
        score = converter.parse(str(path))
        count = sum(len(n.pitches) for n in score.stripTies().recurse().notes)
        assert count == e["notes_count"], f"{e['name']}: MusicXML {count} vs MIDI {e['notes_count']}"
        assert score.recurse().getElementsByClass(meter.TimeSignature)
        assert score.recurse().getElementsByClass(key.KeySignature)
        marks = score.recurse().getElementsByClass(tempo.MetronomeMark)
        assert marks and marks[0].number == pytest.approx(e.get("score_tempo_bpm", e["tempo_bpm"]))


def test_latencies_recorded_consistently(index):
    table = latency_table(CORPUS)
    # a note-on is heard after it is sent, and well within one 50 ms onset tolerance
    # (mir_eval.transcription's default onset_tolerance)
    assert all(0.0 < v < 0.05 for v in table.values())
    for e in index:
        pitches = read_maps(CORPUS / e["files"]["notes"])[:, 2].astype(int)
        lat = [table[(e["soundfont"], e["instrument_program"], p)] for p in pitches]
        # the audio is trimmed by the median latency of the piece's notes, to a 44.1 kHz sample
        assert e["latency_s"] == pytest.approx(np.median(lat), abs=1.5 / 44100), e["name"]


def _ngrams(pitches: np.ndarray, n: int = 8) -> set[tuple]:
    seq = tuple(int(p) for p in pitches)
    return {seq[i:i + n] for i in range(len(seq) - n + 1)}


def test_splits_hold_different_music(index):
    tuning = [e for e in index if e["split"] == "tuning"]
    heldout = [e for e in index if e["split"] == "heldout"]
    assert not {e["source"] for e in tuning} & {e["source"] for e in heldout}
    grams = {e["name"]: _ngrams(read_maps(CORPUS / e["files"]["notes"])[:, 2]) for e in index}
    for h in heldout:
        for t in tuning:
            shared = grams[h["name"]] & grams[t["name"]]
            # a re-render of the same music shares every 8-note pitch sequence; different
            # music may share a scale fragment or two, never half of them
            assert len(shared) < 0.5 * max(1, min(len(grams[h["name"]]), len(grams[t["name"]]))), \
                (h["name"], t["name"])


# ---------------------------------------------------------------------------- deviations

def test_deviation_takes_files_and_formats(dev_index):
    table = latency_table(DEVIATIONS)
    assert len({e["piece"] for e in dev_index}) >= 5
    assert {e["instrument_program"] for e in dev_index} >= {0}
    assert len({e["instrument_program"] for e in dev_index if e["instrument_program"] != 0}) >= 3
    for e in dev_index:
        for rel in e["files"].values():
            assert (DEVIATIONS / rel).is_file(), rel
        truth = read_maps(DEVIATIONS / e["files"]["notes"])
        assert len(truth) == e["notes_count"]
        midi = midi_on_audio_time_line(read_midi(DEVIATIONS / e["files"]["midi"]), e, table)
        assert np.abs(midi[:, :2] - truth[:, :2]).max() < 1e-3 and np.array_equal(midi[:, 2], truth[:, 2])
        info = sf.info(str(DEVIATIONS / e["files"]["audio"]))
        assert (info.samplerate, info.channels, info.subtype) == (22050, 1, "PCM_16")
        assert info.duration >= truth[:, 1].max()


def test_every_deviation_kind_and_both_tempo_changes_present(dev_index):
    kinds = Counter()
    for e in dev_index:
        for d in json.loads((DEVIATIONS / e["files"]["deviations"]).read_text(encoding="utf-8")):
            kinds[d["kind"]] += 1
    assert set(kinds) == KINDS
    sizes = set()
    for e in dev_index:
        for d in json.loads((DEVIATIONS / e["files"]["deviations"]).read_text(encoding="utf-8")):
            if d["kind"] == "wrong_pitch":
                sizes.add(abs(d["deviation"]))
    assert sizes == {1, 2, 12}
    assert {e["tempo_factor"] for e in dev_index} == {0.7, 1.0, 1.3}


def test_deviations_agree_with_take_and_score(dev_index):
    scores = {}
    for e in dev_index:
        score_path = DEVIATIONS / e["files"]["score"]
        if score_path not in scores:
            scores[score_path] = score_notes(score_path)
        notated = scores[score_path]
        truth = read_maps(DEVIATIONS / e["files"]["notes"])
        devs = json.loads((DEVIATIONS / e["files"]["deviations"]).read_text(encoding="utf-8"))
        assert [d["time"] for d in devs] == sorted(d["time"] for d in devs)
        if e["take"] == "correct" or e["tempo_factor"] != 1.0:
            assert devs == [] and len(truth) == len(notated), e["name"]
        first, last = truth[:, 0].min(), truth[:, 1].max()
        spans = []
        for d in devs:
            assert d["kind"] in KINDS and d["measure"] >= 1 and d["beat"] >= 1
            pts = [d["time"]] + [d[k] for k in ("from_time", "to_time", "resume_time") if k in d]
            spans.append((min(pts), max(pts)))
            assert first + 1.0 <= min(pts) and max(pts) <= last - 1.0, (e["name"], d)
            if d["expected_pitch"] is not None:
                # the expected note is in the reference at that measure and beat (music21 numbering)
                assert any(m == d["measure"] and abs(b - d["beat"]) < 1e-3 and p == d["expected_pitch"]
                           for m, b, p in notated), (e["name"], d)
            starts = truth[np.abs(truth[:, 0] - d["time"]) < 2e-3]
            if d["kind"] in ("wrong_pitch", "extra", "early", "late"):
                assert d["played_pitch"] in starts[:, 2], (e["name"], d)
            if d["kind"] == "wrong_pitch":
                assert d["deviation"] == d["played_pitch"] - d["expected_pitch"]
            if d["kind"] in ("early", "late"):
                assert d["played_pitch"] == d["expected_pitch"]
                assert 0.12 <= abs(d["deviation"]) <= 0.35 and (d["deviation"] < 0) == (d["kind"] == "early")
            if d["kind"] == "missed":
                near = truth[np.abs(truth[:, 0] - d["time"]) < 0.05]
                assert d["expected_pitch"] not in near[:, 2], (e["name"], d)
            if d["kind"] == "hesitation":
                assert 1.0 <= d["deviation"] <= 2.0
                assert d["resume_time"] == pytest.approx(d["time"] + d["deviation"], abs=1e-3)
                # nothing starts during the pause
                assert not np.any((truth[:, 0] > d["time"] + 0.05) & (truth[:, 0] < d["resume_time"] - 0.05))
            if d["kind"] == "restart":
                assert d["from_time"] < d["replay_time"] < d["to_time"]
                assert d["deviation"] == pytest.approx(d["to_time"] - d["from_time"], abs=1e-3)
        spans.sort()
        assert all(b[0] - a[1] >= 1.0 for a, b in zip(spans, spans[1:])), e["name"]


def test_deviation_take_note_counts(dev_index):
    by_piece: dict[str, dict[str, dict]] = {}
    for e in dev_index:
        by_piece.setdefault(e["piece"], {})[e["take"]] = e
    for piece, takes in by_piece.items():
        n = takes["correct"]["notes_count"]
        devs = json.loads((DEVIATIONS / takes["notes"]["files"]["deviations"]).read_text(encoding="utf-8"))
        k = Counter(d["kind"] for d in devs)
        assert takes["notes"]["notes_count"] == n - k["missed"] + k["extra"], piece
        # a replayed bar adds its notes again: exactly the notes of that measure in the score
        devs = json.loads((DEVIATIONS / takes["pitch"]["files"]["deviations"]).read_text(encoding="utf-8"))
        (restart,) = [d for d in devs if d["kind"] == "restart"]
        notated = score_notes(DEVIATIONS / takes["pitch"]["files"]["score"])
        in_bar = sum(1 for m, _, _ in notated if m == restart["measure"])
        assert takes["pitch"]["notes_count"] == n + in_bar, piece


def test_scores_valid_against_musicxml_4_schema(index, dev_index, musicxml_schema):
    from lxml import etree

    # reference: the official MusicXML 4.0 XSD (shared standards folder, see conftest)
    schema = musicxml_schema
    parser = etree.XMLParser(no_network=True, load_dtd=False, resolve_entities=False)
    paths = {CORPUS / e["files"]["score"] for e in index} | {DEVIATIONS / e["files"]["score"] for e in dev_index}
    for path in sorted(paths):
        doc = etree.parse(str(path), parser)
        assert schema.validate(doc), f"{path.name}: {schema.error_log.last_error}"


# ---------------------------------------------------------------------------- render.py helpers

@pytest.fixture(scope="module")
def render_module():
    import sys

    sys.path.insert(0, str(FIXTURES))
    try:
        import render
    finally:
        sys.path.remove(str(FIXTURES))
    return render


def test_synthetic_reverb_has_the_requested_rt60(render_module):
    sr = 22050
    impulse = np.zeros(sr * 2)
    impulse[0] = 1.0
    for rt60 in (0.4, 0.8):
        h = render_module.add_reverb(impulse, sr, rt60_s=rt60, rng=np.random.default_rng(1))
        tail = h[int(0.02 * sr):]
        # Schroeder backward integration; fit the -5..-25 dB range and extrapolate to -60 dB
        # (Schroeder 1965, "New method of measuring reverberation time"; ISO 3382 T20)
        edc = np.cumsum(tail[::-1] ** 2)[::-1]
        edc_db = 10 * np.log10(edc / edc[0])
        sel = (edc_db <= -5) & (edc_db >= -25)
        slope = np.polyfit(np.arange(len(tail))[sel] / sr, edc_db[sel], 1)[0]
        assert -60.0 / slope == pytest.approx(rt60, rel=0.1)


def test_added_noise_has_the_requested_snr(render_module):
    sr = 22050
    t = np.arange(sr) / sr
    y = 0.3 * np.sin(2 * np.pi * 440 * t)
    noisy = render_module.add_noise(y, snr_db=30.0, rng=np.random.default_rng(2))
    snr = 10 * np.log10(np.mean(y ** 2) / np.mean((noisy - y) ** 2))
    assert snr == pytest.approx(30.0, abs=0.1)


def test_detuned_render_sounds_at_the_requested_a4(render_module, tmp_path):
    import shutil

    from takescribe.notes import Note

    if shutil.which("fluidsynth") is None or not render_module.SOUNDFONTS["sf_GMbank"].exists():
        pytest.skip("fluidsynth or the csound-soundfont sf_GMbank.sf2 is not installed")

    for tuning in (435.0, 445.0):
        mid = tmp_path / f"a4_{tuning:.0f}.mid"
        render_module.write_performance_midi(mid, [Note(0.1, 1.1, 69, 90)], program=73,
                                             tempo_qpm=120.0, tuning_hz=tuning)
        y = render_module.render_midi(mid, "sf_GMbank")
        seg = y[int(0.3 * 22050): int(0.9 * 22050)] * np.hanning(int(0.6 * 22050))
        spectrum = np.abs(np.fft.rfft(seg, n=1 << 18))
        freqs = np.fft.rfftfreq(1 << 18, 1 / 22050)
        band = (freqs > 400) & (freqs < 480)
        f0 = freqs[band][np.argmax(spectrum[band])]
        # MIDI 69 = A4; with the pitch bend the A sounds at `tuning` (ISO 16 names 440 Hz);
        # 2 Hz is about 8 cents, well inside the 20 cents between 435/440/445 Hz
        assert f0 == pytest.approx(tuning, abs=2.0)
