"""Safe output: no clobbering without force, never a partial file, even when interrupted."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
import time

import pytest

from takescribe.jobs import pipeline as pipeline
from takescribe.cli import main
from takescribe.errors import OutputError
from takescribe.safeio import atomic_write, write_bytes, write_text

from conftest import FIXTURES

TAKE = FIXTURES / "corpus" / "heldout" / "melody_clarinet_tune.flac"


def test_existing_file_is_refused_without_force(tmp_path):
    target = tmp_path / "a.txt"
    target.write_text("old")
    with pytest.raises(OutputError, match="already exists; pass --force"):
        write_text(target, "new")
    assert target.read_text() == "old"
    write_text(target, "new", force=True)
    assert target.read_text() == "new"


def test_missing_folders_are_created_and_permissions_are_usual(tmp_path):
    target = write_bytes(tmp_path / "x" / "y" / "out.bin", b"123")
    assert target.read_bytes() == b"123"
    umask = os.umask(0)
    os.umask(umask)
    assert (target.stat().st_mode & 0o777) == (0o666 & ~umask)


def test_fault_in_the_middle_of_writing_leaves_the_old_file(tmp_path):
    target = tmp_path / "draft.txt"
    target.write_text("old complete file")
    with pytest.raises(RuntimeError, match="disk on fire"):
        with atomic_write(target, force=True, mode="w") as fh:
            fh.write("half of the new")
            raise RuntimeError("disk on fire")
    assert target.read_text() == "old complete file"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["draft.txt"]  # no temporary left


def test_ctrl_c_during_transcription_output_leaves_nothing_partial(tmp_path, monkeypatch, capsys):
    # inject a KeyboardInterrupt while the MIDI file is being written: the CLI exits 130 and
    # leaves neither a partial draft nor a temporary file
    real = pipeline.write_draft_midi

    def interrupted(path, *args, **kwargs):
        with atomic_write(path, force=kwargs.get("force", False)) as fh:
            fh.write(b"MThd\x00\x00")
            raise KeyboardInterrupt

    monkeypatch.setattr(pipeline, "write_draft_midi", interrupted)
    code = main(["transcribe", str(TAKE), "-o", str(tmp_path / "draft.mid"), "--notes", str(tmp_path / "n.txt"),
                 "--quiet"])
    monkeypatch.setattr(pipeline, "write_draft_midi", real)
    assert code == 130
    assert "interrupted" in capsys.readouterr().err
    assert list(tmp_path.iterdir()) == []


@pytest.mark.skipif(sys.platform == "win32", reason="POSIX signals")
@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGKILL])
def test_signal_mid_write_never_leaves_a_partial_destination(tmp_path, sig):
    # a real process is stopped by a signal while it writes: the destination holds the old
    # complete content (SIGKILL may leave a hidden *.partial temporary, never a partial draft)
    target = tmp_path / "draft.txt"
    target.write_text("old complete file")
    script = textwrap.dedent(f"""
        import sys, time
        from takescribe.safeio import atomic_write
        with atomic_write({str(target)!r}, force=True, mode="w") as fh:
            fh.write("x" * 1000)
            fh.flush()
            print("writing", flush=True)
            time.sleep(30)
            fh.write("end")
    """)
    proc = subprocess.Popen([sys.executable, "-c", script], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        assert proc.stdout.readline().strip() == "writing"
        proc.send_signal(sig)
        proc.wait(timeout=30)
    finally:   # never leave the writer sleeping behind a failed check
        if proc.poll() is None:
            proc.kill()
            proc.wait(10)
    assert proc.returncode != 0
    assert target.read_text() == "old complete file"
    leftovers = [p.name for p in tmp_path.iterdir() if p.name != "draft.txt"]
    if sig == signal.SIGINT:
        assert leftovers == []  # cleaned up on KeyboardInterrupt
    else:
        assert all(name.startswith(".draft.txt.") and name.endswith(".partial") for name in leftovers)
