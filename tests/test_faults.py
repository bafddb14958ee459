"""Fault injection (#17): interruptions, a full disk and an unwritable output leave nothing half-done.

For ``transcribe``, ``compare`` and ``batch``, a signal is sent at a chosen point of a real
run (the test-only hook ``TAKESCRIBE_TEST_FAULT=<point>:<SIGNAL>``, see
``takescribe.interrupts``): while reading the take, while factorizing, and between writing
two outputs. After each: the exit code is the shell's 128 + signal number (POSIX ``sh``,
"Exit Status"; 130 and 143 are common practice), the message says what is on disk, no
output and no temporary file is left, no process of the run's session survives (psutil),
and a rerun completes with outputs identical to an uninterrupted run.

A full disk is a small tmpfs (the test runs as root here; otherwise ``os.fsync`` is patched
to fail with ENOSPC), an unwritable output a read-only tmpfs (otherwise a folder of mode 0555).
"""

from __future__ import annotations

import contextlib
import errno
import os
import re
import shutil
import signal
import subprocess
import sys
import tempfile
from pathlib import Path

import pytest

from takescribe.cli import main
from takescribe.interrupts import FAULT_ENV, FAULT_PID_ENV
from takescribe.safeio import SCRATCH_PREFIX, STAGING_PREFIX

from conftest import FIXTURES

psutil = pytest.importorskip("psutil")

HELDOUT = FIXTURES / "corpus" / "heldout"
TAKE = HELDOUT / "adverse_detune445_arpeggios.flac"  # 5.8 s, with its part
PART = HELDOUT / "adverse_detune445_arpeggios.musicxml"
OTHER = HELDOUT / "adverse_fast_altosax_jig.flac"  # 6.9 s, no part in the batch


def _args(command: str, work: Path, *, jobs: str = "1") -> list[str]:
    if command == "transcribe":
        return ["transcribe", str(TAKE), "-o", str(work / "out" / "a.mid"), "--notes", str(work / "out" / "a.txt")]
    if command == "compare":
        return ["compare", str(TAKE), str(PART), "-o", str(work / "out" / "report")]
    return ["batch", str(work / "takes"), "-o", str(work / "out"), "--score-dir", str(work / "scores"), "--jobs", jobs]


def _workspace(root: Path) -> Path:
    (root / "takes").mkdir(parents=True)
    (root / "scores").mkdir()
    (root / "out").mkdir()
    shutil.copy(TAKE, root / "takes")
    shutil.copy(OTHER, root / "takes")
    shutil.copy(PART, root / "scores")
    return root


def _files(folder: Path) -> dict[str, bytes]:
    """Every file under ``folder`` (hidden ones too), byte for byte."""
    return {p.relative_to(folder).as_posix(): p.read_bytes()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def _left_in_tmp(tmp: Path) -> list[str]:
    return sorted(p.name for p in tmp.iterdir()) if tmp.exists() else []


_reference: dict[str, dict[str, bytes]] = {}


def _uninterrupted(command: str, tmp_path_factory) -> dict[str, bytes]:
    """Outputs of an uninterrupted run of ``command`` (computed once per test process)."""
    if command not in _reference:
        work = _workspace(tmp_path_factory.mktemp(f"reference-{command}"))
        assert main(_args(command, work) + ["--quiet"]) == 0
        _reference[command] = _files(work / "out")
    return _reference[command]


def _run(args: list[str], *, fault: str, tmp: Path) -> tuple[int, str, int]:
    """Run the command line in its own session with the fault hook; returns (code, stderr, session id)."""
    env = {k: v for k, v in os.environ.items() if k not in (FAULT_ENV, FAULT_PID_ENV)}
    env.update({FAULT_ENV: fault, "TMPDIR": str(tmp)})
    proc = subprocess.Popen([sys.executable, "-m", "takescribe.cli", *args, "--quiet"], env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True)
    try:
        _, err = proc.communicate(timeout=240)
    finally:   # a run that overstays (or a test stopped by its timeout) leaves no process of its session
        if proc.poll() is None:
            with contextlib.suppress(ProcessLookupError):
                os.killpg(proc.pid, signal.SIGKILL)
            proc.wait(10)
    return proc.returncode, err, proc.pid


def _session_processes(sid: int) -> list:
    alive = []
    for process in psutil.process_iter():
        with contextlib.suppress(psutil.Error, ProcessLookupError, PermissionError):
            if os.getsid(process.pid) == sid and process.status() != psutil.STATUS_ZOMBIE:
                alive.append(process)
    return alive


# three points x two signals spread over the three commands: each command meets every point
CASES = [
    ("transcribe", "reading", "SIGTERM"), ("transcribe", "factorizing", "SIGINT"),
    ("transcribe", "between-outputs", "SIGTERM"),
    ("compare", "reading", "SIGINT"), ("compare", "factorizing", "SIGTERM"), ("compare", "between-outputs", "SIGINT"),
    ("batch", "reading", "SIGTERM"), ("batch", "factorizing", "SIGINT"), ("batch", "between-outputs", "SIGTERM"),
]


@pytest.mark.skipif(sys.platform == "win32", reason="POSIX signals and sessions")
@pytest.mark.parametrize("command,point,signame", CASES)
def test_signal_leaves_nothing_and_a_rerun_completes(command, point, signame, tmp_path, tmp_path_factory, capsys):
    expected = _uninterrupted(command, tmp_path_factory)
    work, tmp = _workspace(tmp_path / "work"), tmp_path / "tmp"
    tmp.mkdir()
    code, err, sid = _run(_args(command, work, jobs="2"), fault=f"{point}:{signame}", tmp=tmp)
    assert code == 128 + getattr(signal, signame), err
    assert f"interrupted by {signame}" in err and "Traceback" not in err
    assert _session_processes(sid) == []  # no worker left running (issue #17: orphans under PID 1)
    assert _left_in_tmp(tmp) == []  # the run's temporary folder is gone
    out = _files(work / "out")
    assert not any(STAGING_PREFIX in name for name in out) and not any(".partial" in n for n in out)
    if command == "batch":
        # only complete take folders, and the message counts exactly those
        complete = sorted({name.split("/")[0] for name in out})
        for take in complete:
            assert {k: v for k, v in out.items() if k.startswith(take + "/")} == \
                {k: v for k, v in expected.items() if k.startswith(take + "/")}
        assert f"{len(complete)} of 2 takes have complete outputs" in err
    else:
        assert out == {} and "nothing was written" in err
        assert list((work / "out").iterdir()) == []
    # the rerun does exactly what is missing and gives the uninterrupted outputs
    assert main(_args(command, work) + ["--quiet"]) == 0
    if command == "batch":
        assert f"{len(complete)} skipped" in capsys.readouterr().out  # exactly the unfinished takes were redone
    assert _files(work / "out") == expected


_SMALL_DISK = 4 * 1024 * 1024  # no tmpfs these tests mount is larger


def _is_small_tmpfs(where: Path) -> bool:
    """Whether ``where`` really is a size-limited file system now (a sandbox may accept the mount
    and ignore it: filling the machine's own disk instead would take hours)."""
    stats = os.statvfs(where)
    return 0 < stats.f_blocks * stats.f_frsize <= _SMALL_DISK


@contextlib.contextmanager
def _tmpfs(where: Path, options: str):
    where.mkdir()
    done = subprocess.run(["mount", "-t", "tmpfs", "-o", options, "tmpfs", str(where)],
                          capture_output=True, timeout=30)
    mounted = done.returncode == 0
    if mounted and not _is_small_tmpfs(where):
        subprocess.run(["umount", "-l", str(where)], check=False, timeout=30)
        mounted = False
    try:
        yield mounted
    finally:
        if mounted:
            subprocess.run(["umount", "-l", str(where)], check=False, timeout=30)


def _fill(disk: Path, *, free_pages: int) -> Path:
    """Fill a tmpfs but ``free_pages`` pages (folders take none on tmpfs, files at least one)."""
    filler = disk / "filler"
    with open(filler, "wb", buffering=0) as fh:
        with contextlib.suppress(OSError):
            for _ in range(_SMALL_DISK // 4096 + 1):  # bounded, whatever the file system does
                fh.write(b"\0" * 4096)
            raise AssertionError(f"{disk}: {_SMALL_DISK} bytes written to a 1 MB tmpfs without ENOSPC")
    os.truncate(filler, max(0, filler.stat().st_size - 4096 * free_pages))
    return filler


def _no_scratch_of_this_process() -> bool:
    return not list(Path(tempfile.gettempdir()).glob(f"{SCRATCH_PREFIX}{os.getpid()}-*"))


@pytest.mark.parametrize("command", ["transcribe", "compare", "batch"])
def test_full_disk_leaves_nothing_and_a_rerun_completes(command, tmp_path, tmp_path_factory, monkeypatch, capsys):
    expected = _uninterrupted(command, tmp_path_factory)
    work = _workspace(tmp_path / "work")
    work.joinpath("out").rmdir()
    with _tmpfs(work / "out", "size=1m") as mounted:
        if mounted:
            # one free page: a job's first output fits, the next does not (a batch: none fits)
            filler = _fill(work / "out", free_pages=0 if command == "batch" else 1)
        else:  # no tmpfs here: every flush to disk fails as on a full one
            def full(fd):
                raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
            monkeypatch.setattr("takescribe.safeio.os.fsync", full)
        before = _files(work / "out")
        code = main(_args(command, work) + ["--quiet"])
        captured = capsys.readouterr()
        err = captured.err + captured.out  # a batch lists a failed take's error in its summary
        # a single job is refused (exit 4); a batch reports the take as failed (exit 1)
        assert code == (1 if command == "batch" else 4), err
        assert "the disk is full" in err and "internal error" not in err
        after = _files(work / "out")
        assert after == before  # nothing added, nothing half-written
        assert _no_scratch_of_this_process()
        if mounted:
            filler.unlink()
        monkeypatch.undo()
        assert main(_args(command, work) + ["--quiet"]) == 0
        assert _files(work / "out") == expected


@pytest.mark.parametrize("command", ["transcribe", "compare", "batch"])
def test_unwritable_output_is_refused_before_any_work(command, tmp_path, tmp_path_factory, capsys):
    expected = _uninterrupted(command, tmp_path_factory)
    work = _workspace(tmp_path / "work")
    with _tmpfs(tmp_path / "locked", "ro,size=16k") as mounted:
        locked = tmp_path / "locked"
        if not mounted:
            locked.chmod(0o555)
        args = _args(command, work)
        if command == "transcribe":  # issue #17: the first two outputs are writable, the third is not
            args += ["--musicxml", str(locked / "a.musicxml")]
        else:
            args[args.index("-o") + 1] = str(locked / "report")
        code = main(args)
        err = capsys.readouterr().err
        assert code == 4, err
        assert str(locked) in err and "reading" not in err  # refused before the take was read
        assert _files(work / "out") == {} and list(locked.iterdir()) == []
        assert _no_scratch_of_this_process()
    assert main(_args(command, work) + ["--quiet"]) == 0
    assert _files(work / "out") == expected
