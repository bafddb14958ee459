"""The bad-input contract seen from the command line.

For every bad take of ``tests/test_audio.py`` (missing, folder, unreadable, empty,
truncated or damaged WAV/FLAC/OGG, MIDI/MusicXML/ZIP/text given as audio, random
bytes, NaN samples, too short), ``takescribe.cli.main`` runs in-process and must:
exit with code 1 (bad input; errors.py), print exactly one line on stderr that
names the file (with ``--quiet``; without it, progress lines may precede it), show
no traceback unless ``--debug``, create no output file, and leave the input bytes
unchanged. Output refusals exit with code 4 and leave the existing file as it was.

Exit codes are takescribe's own (errors.py / README); the fixtures are synthetic.
"""

from __future__ import annotations

import hashlib
import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from takescribe.audio import probe as audio  # opens the take since the split of audio/load.py
from takescribe.errors import EXIT_BAD_INPUT, EXIT_OK, EXIT_OUTPUT
from test_audio import BAD_INPUTS, chord
from test_fuzz_readers import MUSICXML_TEXT

cli = pytest.importorskip("takescribe.cli", reason="takescribe.cli is not written yet")


def snapshot(folder: Path) -> dict[str, str]:
    """Relative path -> sha256 of every file under ``folder`` (folders as "<dir>")."""
    state = {}
    for path in sorted(folder.rglob("*")):
        key = str(path.relative_to(folder))
        state[key] = "<dir>" if path.is_dir() else hashlib.sha256(path.read_bytes()).hexdigest()
    return state


def run(capsys, argv):
    code = cli.main([str(a) for a in argv])
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def error_lines(err: str) -> list[str]:
    return [line for line in err.splitlines() if line.strip()]


@pytest.fixture
def inputs(tmp_path):
    """A folder holding the bad takes and a valid part; outputs go to a separate folder."""
    folder = tmp_path / "inputs"
    folder.mkdir()
    (folder / "part.musicxml").write_text(MUSICXML_TEXT, encoding="utf-8")
    return folder


@pytest.fixture
def outputs(tmp_path):
    folder = tmp_path / "outputs"
    folder.mkdir()
    return folder


def _check_refused(capsys, argv, take, inputs, outputs, *, quiet):
    before_in, before_out = snapshot(inputs), snapshot(outputs)
    code, out, err = run(capsys, argv + (["--quiet"] if quiet else []))
    assert code == EXIT_BAD_INPUT, (code, err)
    assert "Traceback" not in err
    lines = error_lines(err)
    errors = [line for line in lines if line.startswith("takescribe: error:")]
    assert len(errors) == 1, err
    assert take.name in errors[0]  # names the file
    if quiet:
        assert lines == errors, err  # the error is the only line
    assert snapshot(inputs) == before_in  # input bytes unchanged, nothing added next to them
    assert snapshot(outputs) == before_out  # no output file, no partial or temporary file
    return errors[0]


@pytest.mark.parametrize("quiet", [True, False], ids=["quiet", "progress"])
@pytest.mark.parametrize("case", list(BAD_INPUTS), ids=list(BAD_INPUTS))
def test_transcribe_refuses_bad_take(capsys, inputs, outputs, case, quiet):
    build, pattern = BAD_INPUTS[case]
    take = build(inputs)
    message = _check_refused(capsys, ["transcribe", take, "-o", outputs / "draft.mid",
                                      "--musicxml", outputs / "draft.musicxml"],
                             take, inputs, outputs, quiet=quiet)
    assert re.search(pattern, message), message


@pytest.mark.parametrize("case", list(BAD_INPUTS), ids=list(BAD_INPUTS))
def test_compare_refuses_bad_take(capsys, inputs, outputs, case):
    build, pattern = BAD_INPUTS[case]
    take = build(inputs)
    report = outputs / "report"
    _check_refused(capsys, ["compare", take, inputs / "part.musicxml", "-o", report],
                   take, inputs, outputs, quiet=True)
    assert not report.exists()


def test_unreadable_take(capsys, inputs, outputs, monkeypatch):
    take = inputs / "take.wav"
    sf.write(take, chord(22050), 22050, subtype="PCM_16")

    def refuse(*args, **kwargs):
        raise PermissionError(13, "Permission denied", str(take))

    monkeypatch.setattr(audio, "open", refuse, raising=False)  # root reads files of any mode
    message = _check_refused(capsys, ["transcribe", take, "-o", outputs / "draft.mid"], take, inputs, outputs,
                             quiet=True)
    assert "permission denied" in message


def test_debug_shows_the_traceback(capsys, inputs, outputs):
    take = inputs / "take.wav"
    take.write_bytes(b"")
    code, _, err = run(capsys, ["transcribe", take, "-o", outputs / "draft.mid", "--debug", "--quiet"])
    assert code == EXIT_BAD_INPUT
    assert "Traceback" in err and "AudioError" in err
    assert not (outputs / "draft.mid").exists()


# ---------------------------------------------------------------------------
# outputs: refused without --force, atomic, never an input


@pytest.fixture
def good_take(inputs):
    take = inputs / "take.wav"
    sf.write(take, chord(22050), 22050, subtype="PCM_16")
    return take


def test_existing_output_is_not_overwritten(capsys, inputs, outputs, good_take):
    draft = outputs / "draft.mid"
    draft.write_bytes(b"the teacher's own file")
    before_in = snapshot(inputs)
    code, _, err = run(capsys, ["transcribe", good_take, "-o", draft, "--quiet"])
    assert code == EXIT_OUTPUT
    lines = error_lines(err)
    assert len(lines) == 1 and "draft.mid" in lines[0] and "--force" in lines[0], err
    assert draft.read_bytes() == b"the teacher's own file"
    assert snapshot(inputs) == before_in
    assert sorted(p.name for p in outputs.iterdir()) == ["draft.mid"]  # no temporary left


def test_force_replaces_the_output_and_keeps_the_input(capsys, inputs, outputs, good_take):
    draft = outputs / "draft.mid"
    draft.write_bytes(b"old draft")
    before_in = snapshot(inputs)
    code, _, err = run(capsys, ["transcribe", good_take, "-o", draft, "--quiet", "--force"])
    assert code == EXIT_OK, err
    assert draft.read_bytes()[:4] == b"MThd"  # a Standard MIDI File now (SMF header chunk)
    assert snapshot(inputs) == before_in
    assert sorted(p.name for p in outputs.iterdir()) == ["draft.mid"]


def test_output_onto_the_take_is_refused_even_with_force(capsys, inputs, good_take):
    before = snapshot(inputs)
    code, _, err = run(capsys, ["transcribe", good_take, "--notes", good_take, "--quiet", "--force"])
    assert code in (EXIT_BAD_INPUT, EXIT_OUTPUT), err
    assert len(error_lines(err)) == 1 and "Traceback" not in err
    assert snapshot(inputs) == before


@pytest.mark.parametrize("where", ["folder", "under-a-file"])
def test_output_path_that_cannot_be_a_file(capsys, inputs, outputs, good_take, where):
    if where == "folder":
        target = outputs / "draft.mid"
        target.mkdir()
    else:
        (outputs / "plain").write_bytes(b"x")
        target = outputs / "plain" / "draft.mid"
    before_in, before_out = snapshot(inputs), snapshot(outputs)
    code, _, err = run(capsys, ["transcribe", good_take, "-o", target, "--quiet"])
    assert code == EXIT_OUTPUT, err
    assert len(error_lines(err)) == 1 and "Traceback" not in err
    assert snapshot(inputs) == before_in and snapshot(outputs) == before_out


def test_silent_take_gives_an_empty_draft_with_a_warning(capsys, inputs, outputs):
    take = inputs / "silent.wav"
    sf.write(take, np.zeros(22050), 22050, subtype="PCM_16")
    draft = outputs / "draft.mid"
    code, out, err = run(capsys, ["transcribe", take, "-o", draft, "--quiet"])
    assert code == EXIT_OK, err
    assert "silent.wav" in err and "silent" in err and "Traceback" not in err
    assert draft.read_bytes()[:4] == b"MThd"


# ---------------------------------------------------------------------------
# the reference part side of the same contract (compare and transcribe --score)


def _part_missing(folder: Path) -> Path:
    return folder / "no_such_part.musicxml"


def _part_empty(folder: Path) -> Path:
    path = folder / "empty.mid"
    path.write_bytes(b"")
    return path


def _part_is_audio(folder: Path) -> Path:
    path = folder / "part.musicxml"
    sf.write(path, chord(22050), 22050, format="WAV", subtype="PCM_16")
    return path


def _part_cut_musicxml(folder: Path) -> Path:
    path = folder / "cut.musicxml"
    path.write_text(MUSICXML_TEXT[: len(MUSICXML_TEXT) // 2], encoding="utf-8")
    return path


def _part_cut_midi(folder: Path) -> Path:
    from test_fuzz_readers import MIDI_SEED

    path = folder / "cut.mid"
    path.write_bytes(MIDI_SEED[: len(MIDI_SEED) // 2])
    return path


def _part_damaged_mxl(folder: Path) -> Path:
    # a compressed MusicXML whose score member lost its local file header signature ("PK\x03\x04",
    # ZIP APPNOTE 4.3.7) while the central directory still lists it
    from test_fuzz_readers import MXL_SEED

    data = bytearray(MXL_SEED)
    at = data.find(b"PK\x03\x04", data.find(b"tune.musicxml") - 40)
    assert data[at + 30 : at + 43] == b"tune.musicxml"
    data[at : at + 4] = b"XXXX"
    path = folder / "damaged.mxl"
    path.write_bytes(bytes(data))
    return path


BAD_PARTS = {
    "missing": _part_missing,
    "empty-midi": _part_empty,
    "audio-named-musicxml": _part_is_audio,
    "truncated-musicxml": _part_cut_musicxml,
    "truncated-midi": _part_cut_midi,
    "damaged-mxl": _part_damaged_mxl,
}


@pytest.mark.parametrize("case", list(BAD_PARTS), ids=list(BAD_PARTS))
def test_compare_refuses_bad_part(capsys, inputs, outputs, good_take, case):
    part = BAD_PARTS[case](inputs)
    report = outputs / "report"
    _check_refused(capsys, ["compare", good_take, part, "-o", report], part, inputs, outputs, quiet=True)
    assert not report.exists()


@pytest.mark.parametrize("case", list(BAD_PARTS), ids=list(BAD_PARTS))
def test_transcribe_refuses_bad_score(capsys, inputs, outputs, good_take, case):
    part = BAD_PARTS[case](inputs)
    _check_refused(capsys, ["transcribe", good_take, "--score", part, "-o", outputs / "draft.mid"],
                   part, inputs, outputs, quiet=True)


def test_quiet_take_with_flattened_tops_is_warned(tmp_path):
    # issue #17: a take peaking at -50 dBFS with a third of its tops flattened got no warning.
    # A sine clipped at full scale, then turned down by 50 dB: its flattened share is known in
    # closed form (a sine of amplitude 1.6 clipped at 1 stays flat for 1 - 2*asin(1/1.6)/pi of the time)
    import math
    import warnings

    import numpy as np
    import soundfile as sf

    from takescribe.audio.load import load_audio

    sr = 44100
    t = np.arange(3 * sr) / sr
    y = np.clip(1.6 * np.sin(2 * np.pi * 220 * t), -1, 1) * 10 ** (-50 / 20)
    path = tmp_path / "quiet.wav"
    sf.write(path, y.astype(np.float32), sr, subtype="FLOAT")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        load_audio(path, sr=22050)
    messages = " ".join(str(w.message) for w in caught)
    assert "very quiet take (peak -50 dBFS)" in messages
    flat = 1 - 2 * math.asin(1 / 1.6) / math.pi
    shown = float(re.search(r"([\d.]+) % of samples are flattened tops at -50 dBFS", messages).group(1))
    assert abs(shown / 100 - flat) < 0.02  # runs shorter than 4 samples at the edges are not counted


def test_valid_flac_without_samples_is_called_empty(tmp_path, capsys):
    # FLAC format: STREAMINFO's 36-bit total of samples is 0 and no audio frame follows
    if shutil.which("ffmpeg") is None:
        pytest.skip("ffmpeg is needed to write a FLAC file without samples")
    path = tmp_path / "empty.flac"
    subprocess.run(["ffmpeg", "-loglevel", "error", "-y", "-f", "lavfi", "-i", "anullsrc=r=44100:cl=mono",
                    "-frames:a", "0", str(path)], check=True)
    code, _, err = run(capsys, ["transcribe", path, "-o", tmp_path / "a.mid"])
    assert code == EXIT_BAD_INPUT and "empty.flac: is empty: a valid FLAC file that holds no samples" in err
    assert not (tmp_path / "a.mid").exists()
