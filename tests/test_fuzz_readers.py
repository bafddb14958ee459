"""Property-based fuzzing of every reader of user files: a parsed result or one of our typed errors.

Each reader gets random bytes and mutated valid files (truncations, byte flips,
insertions, deletions, header damage) and must either return a result or raise a
:class:`~takescribe.errors.TakescribeError` subclass; any other exception (IndexError,
struct.error, UnicodeDecodeError, a libsndfile RuntimeError, ...) fails the test.
Warnings are allowed. A reader that runs longer than :data:`READER_SECONDS` on one
of these few-kB files fails too (a hang or a memory blow-up). Readers that do not
exist yet are skipped with the reason.

hypothesis runs derandomized (the same examples on every run) so CI is repeatable;
``tests/benchmarks/fuzz_readers.py`` runs the same mutations many more times.
The seed files are of our own invention (short synthetic tones, a four-note tune).
"""

from __future__ import annotations

import contextlib
import importlib
import io
import signal
import tempfile
import threading
import warnings
import zipfile
from pathlib import Path
from typing import Callable, Sequence

import numpy as np
import pytest
import soundfile as sf
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from takescribe.errors import InputError, TakescribeError

N_EXAMPLES = 500  # per reader and kind of input; the brief's minimum for the default suite

FUZZ_SETTINGS = settings(
    max_examples=N_EXAMPLES,
    derandomize=True,
    deadline=None,
    database=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
)

# ---------------------------------------------------------------------------
# seeds: small valid files of each kind

MAPS_TEXT = (
    # MAPS note-list layout: a header line then onset, offset (s), MIDI pitch, tab-separated
    "OnsetTime\tOffsetTime\tMidiPitch\n"
    "0.500000\t0.980000\t60\n"
    "1.000000\t1.480000\t64\n"
    "1.500000\t2.400000\t67\n"
    "1.500000\t2.400000\t72\n"
)

MUSICXML_TEXT = """<?xml version="1.0" encoding="UTF-8" standalone="no"?>
<!DOCTYPE score-partwise PUBLIC "-//Recordare//DTD MusicXML 4.0 Partwise//EN" "http://www.musicxml.org/dtds/partwise.dtd">
<score-partwise version="4.0">
  <part-list>
    <score-part id="P1"><part-name>Flute</part-name></score-part>
  </part-list>
  <part id="P1">
    <measure number="1">
      <attributes>
        <divisions>2</divisions>
        <key><fifths>1</fifths></key>
        <time><beats>3</beats><beat-type>4</beat-type></time>
        <clef><sign>G</sign><line>2</line></clef>
      </attributes>
      <direction placement="above"><direction-type><metronome><beat-unit>quarter</beat-unit>
        <per-minute>96</per-minute></metronome></direction-type><sound tempo="96"/></direction>
      <note><pitch><step>G</step><octave>4</octave></pitch><duration>2</duration><type>quarter</type></note>
      <note><pitch><step>A</step><octave>4</octave></pitch><duration>1</duration><type>eighth</type></note>
      <note><pitch><step>B</step><octave>4</octave></pitch><duration>1</duration><type>eighth</type></note>
      <note><pitch><step>D</step><octave>5</octave></pitch><duration>2</duration>
        <tie type="start"/><type>quarter</type><notations><tied type="start"/></notations></note>
    </measure>
    <measure number="2">
      <note><pitch><step>D</step><octave>5</octave></pitch><duration>2</duration>
        <tie type="stop"/><type>quarter</type><notations><tied type="stop"/></notations></note>
      <note><pitch><step>F</step><alter>1</alter><octave>4</octave></pitch><duration>2</duration><type>quarter</type></note>
      <note><rest/><duration>2</duration><type>quarter</type></note>
      <barline location="right"><bar-style>light-heavy</bar-style></barline>
    </measure>
  </part>
</score-partwise>
"""

MXL_CONTAINER = """<?xml version="1.0" encoding="UTF-8"?>
<container><rootfiles><rootfile full-path="tune.musicxml" media-type="application/vnd.recordare.musicxml+xml"/></rootfiles></container>
"""


def _audio_seed(fmt: str, subtype: str, *, sr: int = 8000, n_channels: int = 1) -> bytes:
    t = np.arange(int(0.6 * sr)) / sr
    y = 0.3 * np.sin(2 * np.pi * 440.0 * t) + 0.1 * np.sin(2 * np.pi * 660.0 * t)
    if n_channels > 1:
        y = np.stack([y] * n_channels, axis=1)
    buffer = io.BytesIO()
    sf.write(buffer, y, sr, format=fmt, subtype=subtype)
    return buffer.getvalue()


def _midi_seed() -> bytes:
    import mido

    mid = mido.MidiFile(type=1, ticks_per_beat=480)
    meta = mido.MidiTrack([
        mido.MetaMessage("set_tempo", tempo=625000, time=0),
        mido.MetaMessage("time_signature", numerator=3, denominator=4, time=0),
        mido.MetaMessage("key_signature", key="G", time=0),
    ])
    notes = mido.MidiTrack([mido.MetaMessage("track_name", name="Flute", time=0),
                            mido.Message("program_change", program=73, time=0)])
    for pitch, ticks in ((67, 480), (69, 240), (71, 240), (74, 960), (66, 480)):
        notes.append(mido.Message("note_on", note=pitch, velocity=80, time=0))
        notes.append(mido.Message("note_off", note=pitch, velocity=0, time=ticks))
    mid.tracks.extend([meta, notes])
    buffer = io.BytesIO()
    mid.save(file=buffer)
    return buffer.getvalue()


def _mxl_seed() -> bytes:
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", compression=zipfile.ZIP_DEFLATED) as archive:
        archive.writestr("mimetype", "application/vnd.recordare.musicxml")
        archive.writestr("META-INF/container.xml", MXL_CONTAINER)
        archive.writestr("tune.musicxml", MUSICXML_TEXT)
    return buffer.getvalue()


def audio_seeds() -> dict[str, bytes]:
    return {
        "wav16": _audio_seed("WAV", "PCM_16"),
        "wavfloat": _audio_seed("WAV", "FLOAT", n_channels=2),
        "wav24-6ch": _audio_seed("WAV", "PCM_24", n_channels=6, sr=11025),
        "flac": _audio_seed("FLAC", "PCM_16"),
        "ogg": _audio_seed("OGG", "VORBIS", sr=22050),
    }


# ---------------------------------------------------------------------------
# mutations, shared with tests/benchmarks/fuzz_readers.py

MUTATION_KINDS = ("truncate", "flip", "set", "insert", "delete", "header")
# (kind, relative position in [0, 1), byte value)
Mutation = tuple[str, float, int]


def apply_mutations(data: bytes, mutations: Sequence[Mutation]) -> bytes:
    """Damage ``data`` as a failing disk, a cut download or a wrong editor would."""
    buffer = bytearray(data)
    for kind, where, value in mutations:
        if kind == "header":  # the first 64 bytes hold most of the structure
            at = int(where * min(64, len(buffer)))
        else:
            at = int(where * len(buffer))
        if kind == "truncate":
            del buffer[at:]
        elif kind == "flip" and buffer:
            buffer[min(at, len(buffer) - 1)] ^= value or 0x80
        elif kind in ("set", "header") and buffer:
            buffer[min(at, len(buffer) - 1)] = value
        elif kind == "insert":
            buffer[at:at] = bytes([value]) * (1 + value % 16)
        elif kind == "delete":
            del buffer[at : at + 1 + value % 64]
    return bytes(buffer)


def random_mutations(rng: np.random.Generator, max_count: int = 4) -> list[Mutation]:
    return [
        (MUTATION_KINDS[rng.integers(len(MUTATION_KINDS))], float(rng.random()), int(rng.integers(256)))
        for _ in range(rng.integers(1, max_count + 1))
    ]


mutations_strategy = st.lists(
    st.tuples(st.sampled_from(MUTATION_KINDS), st.floats(0.0, 1.0, exclude_max=True), st.integers(0, 255)),
    min_size=1,
    max_size=4,
)


# CPU seconds: a few-kB file that takes longer than this is a hang (or a memory blow-up). CPU time,
# not wall time, so a loaded CI machine does not turn a slow parse into a failure.
READER_SECONDS = 10.0


class ReaderTimeout(BaseException):
    """A reader ran past :data:`READER_SECONDS` (BaseException: no ``except Exception`` may swallow it)."""


@contextlib.contextmanager
def time_limit(seconds: float):
    """Interrupt the block after ``seconds`` of process CPU time (POSIX main thread only; elsewhere no limit)."""
    if not hasattr(signal, "setitimer") or threading.current_thread() is not threading.main_thread():
        yield
        return

    def on_alarm(signum, frame):
        raise ReaderTimeout(f"reader still running after {seconds} s of CPU time")

    previous = signal.signal(signal.SIGPROF, on_alarm)
    signal.setitimer(signal.ITIMER_PROF, seconds)
    try:
        yield
    finally:
        signal.setitimer(signal.ITIMER_PROF, 0)
        signal.signal(signal.SIGPROF, previous)


def outcome(reader: Callable, path: Path) -> str:
    """Run ``reader(path)``: "ok" or the name of our typed error; anything else propagates.

    A typed error must be bad input (an :class:`InputError`, exit code 1) and its
    message must name the file, as the bad-input contract asks.
    """
    with warnings.catch_warnings(), time_limit(READER_SECONDS):
        warnings.simplefilter("ignore")
        try:
            reader(path)
        except TakescribeError as exc:
            assert isinstance(exc, InputError), f"{type(exc).__name__} is not bad input: {exc}"
            assert path.name in str(exc), f"message does not name the file: {exc}"
            return type(exc).__name__
    return "ok"


def find_reader(module: str, name: str) -> Callable | None:
    try:
        return getattr(importlib.import_module(f"takescribe.{module}"), name, None)
    except ImportError:
        return None


def reader_or_skip(module: str, name: str) -> Callable:
    reader = find_reader(module, name)
    if reader is None:
        pytest.skip(f"takescribe.{module}.{name} does not exist yet")
    return reader


@pytest.fixture(scope="module")
def scratch():
    # one scratch folder per module: hypothesis examples overwrite the same few files
    with tempfile.TemporaryDirectory(prefix="takescribe-fuzz-") as folder:
        yield Path(folder)


def _write(folder: Path, name: str, data: bytes) -> Path:
    path = folder / name
    path.write_bytes(data)
    return path


# ---------------------------------------------------------------------------
# audio: takescribe.audio.load.load_audio

AUDIO_SEEDS = audio_seeds()
AUDIO_SUFFIX = {"wav16": ".wav", "wavfloat": ".wav", "wav24-6ch": ".wav", "flac": ".flac", "ogg": ".ogg"}
# magic numbers that send random bytes deeper into a parser (RIFF/WAVE, FLAC, Ogg, AIFF, SMF)
MAGICS = (b"", b"RIFF\x00\x10\x00\x00WAVEfmt ", b"fLaC\x00\x00\x00\x22", b"OggS\x00\x02", b"FORM\x00\x00\x10\x00AIFF",
          b"MThd\x00\x00\x00\x06")


@FUZZ_SETTINGS
@given(seed=st.sampled_from(sorted(AUDIO_SEEDS)), mutations=mutations_strategy)
def test_load_audio_on_mutated_files(scratch, seed, mutations):
    from takescribe.audio.load import load_audio

    path = _write(scratch, "take" + AUDIO_SUFFIX[seed], apply_mutations(AUDIO_SEEDS[seed], mutations))
    result = outcome(load_audio, path)
    assert result in ("ok", "AudioError")


@FUZZ_SETTINGS
@given(prefix=st.sampled_from(MAGICS), body=st.binary(max_size=1024))
def test_load_audio_on_random_bytes(scratch, prefix, body):
    from takescribe.audio.load import load_audio

    path = _write(scratch, "noise.wav", prefix + body)
    assert outcome(load_audio, path) in ("ok", "AudioError")


# ---------------------------------------------------------------------------
# note lists: takescribe.export.noteio.read_maps


@FUZZ_SETTINGS
@given(mutations=mutations_strategy)
def test_read_maps_on_mutated_text(scratch, mutations):
    reader = reader_or_skip("noteio", "read_maps")
    path = _write(scratch, "notes.txt", apply_mutations(MAPS_TEXT.encode(), mutations))
    outcome(reader, path)


@FUZZ_SETTINGS
@given(text=st.text(max_size=300))
def test_read_maps_on_random_text(scratch, text):
    reader = reader_or_skip("noteio", "read_maps")
    path = _write(scratch, "random.txt", text.encode("utf-8", errors="surrogatepass"))
    outcome(reader, path)


# ---------------------------------------------------------------------------
# MIDI: takescribe.export.midi.read_midi_notes

MIDI_SEED = _midi_seed()


@FUZZ_SETTINGS
@given(mutations=mutations_strategy)
def test_read_midi_notes_on_mutated_files(scratch, mutations):
    reader = reader_or_skip("midi", "read_midi_notes")
    path = _write(scratch, "part.mid", apply_mutations(MIDI_SEED, mutations))
    outcome(reader, path)


# ---------------------------------------------------------------------------
# reference parts: takescribe.reference.part.load_reference (MusicXML text, .mxl archive, MIDI)

MXL_SEED = _mxl_seed()


@FUZZ_SETTINGS
@given(mutations=mutations_strategy)
def test_load_reference_on_mutated_musicxml(scratch, mutations):
    reader = reader_or_skip("score", "load_reference")
    path = _write(scratch, "part.musicxml", apply_mutations(MUSICXML_TEXT.encode(), mutations))
    outcome(reader, path)


@FUZZ_SETTINGS
@given(mutations=mutations_strategy)
def test_load_reference_on_mutated_mxl(scratch, mutations):
    reader = reader_or_skip("score", "load_reference")
    path = _write(scratch, "part.mxl", apply_mutations(MXL_SEED, mutations))
    outcome(reader, path)


@FUZZ_SETTINGS
@given(mutations=mutations_strategy)
def test_load_reference_on_mutated_midi(scratch, mutations):
    reader = reader_or_skip("score", "load_reference")
    path = _write(scratch, "part.mid", apply_mutations(MIDI_SEED, mutations))
    outcome(reader, path)


def test_seeds_are_valid(scratch):
    """The unmutated seeds read cleanly, so the mutations start from valid files."""
    from takescribe.audio.load import load_audio

    for name, data in AUDIO_SEEDS.items():
        assert outcome(load_audio, _write(scratch, "seed" + AUDIO_SUFFIX[name], data)) == "ok", name
    checks = [
        ("score", "load_reference", "seed.musicxml", MUSICXML_TEXT.encode()),
        ("score", "load_reference", "seed.mxl", MXL_SEED),
        ("score", "load_reference", "seed.mid", MIDI_SEED),
        ("midi", "read_midi_notes", "seed.mid", MIDI_SEED),
        ("noteio", "read_maps", "seed.txt", MAPS_TEXT.encode()),
    ]
    for module, name, filename, data in checks:
        reader = find_reader(module, name)
        if reader is not None:
            assert outcome(reader, _write(scratch, filename, data)) == "ok", (module, name, filename)
