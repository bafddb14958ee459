"""The desk's job queue under faults: a killed server, a part that is not the take, a full disk."""

from __future__ import annotations

import io
import os
import shutil
import signal
import sqlite3
import subprocess
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from desk_takes.client import DEMO, WEEKS, DeskProcess
from takescribe.desk.app import create_app
from takescribe.desk.guard import change_check
from takescribe.desk.library import DeskSettings, add_piece, add_student, open_library, staging_path

EXPECTED = {"report.html", "findings.json", "annotated.musicxml", "take.mid", "draft.mid", "draft.musicxml"}


def _rows(db: Path, sql: str):
    with sqlite3.connect(db) as conn:
        return conn.execute(sql).fetchall()


@pytest.mark.slow
def test_killed_mid_job_the_job_completes_after_restart_and_a_mismatch_is_refused(tmp_path):
    library = tmp_path / "lib"
    desk = DeskProcess(library, "--no-demo")
    try:
        piece = desk.add_piece("Lantern Waltz", DEMO / "piano" / "part.musicxml")
        student = desk.add_student("Maren")
        job = desk.upload(WEEKS[0], student=student, piece=piece).json()["job_id"]
        desk.wait(job, until=("running",), fraction=0.4)   # inside the factorization
        os.kill(desk.proc.pid, signal.SIGKILL)
        desk.proc.wait(10)
    finally:
        desk.stop()
    take = _rows(library / "desk.sqlite", "SELECT id, status FROM takes")[0]
    assert take[1] == "running" and not (library / "outputs" / str(take[0])).exists()   # nothing half-shown
    desk = DeskProcess(library, "--no-demo")
    try:
        mismatch = desk.upload(DEMO / "violin" / "take.flac", student=student, piece=piece, name="violin.flac")
        state = desk.wait(job)
        assert state["status"] == "done", state
        refused = desk.wait(mismatch.json()["job_id"])
    finally:
        desk.stop()
    db = library / "desk.sqlite"
    assert _rows(db, "PRAGMA integrity_check") == [("ok",)]
    assert _rows(db, f"SELECT status, attempt FROM jobs WHERE id = {job}") == [("done", 2)]
    assert {p.name for p in (library / "outputs" / str(take[0])).iterdir()} == EXPECTED
    # the violin take is not the waltz: refused with the reason, and nothing of it kept
    assert refused["status"] == "refused" and "does not seem to be a performance" in refused["words"]
    assert _rows(db, "SELECT count(*) FROM takes") == [(1,)]
    assert sorted(p.name for p in (library / "audio").iterdir()) == [f"{take[0]}.ogg"]
    assert not list((library / "staging").iterdir())


@pytest.fixture
def small_disk(tmp_path):
    """A 1 MB tmpfs (needs root and mount); skips with the reason where it cannot be made."""
    mount = tmp_path / "small"
    mount.mkdir()
    if os.geteuid() != 0 or shutil.which("mount") is None:
        pytest.skip("a small tmpfs needs root and mount(8)")
    done = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=1m", "tmpfs", str(mount)], capture_output=True)
    if done.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here: {done.stderr.decode(errors='replace').strip()}")
    yield mount
    subprocess.run(["umount", "-l", str(mount)], check=False)


def test_full_disk_gives_a_clear_message_and_no_entry(small_disk):
    lib = open_library(small_disk / "lib", settings=DeskSettings(max_upload_bytes=8 * 2**20))
    part = staging_path(lib)
    shutil.copyfile(DEMO / "piano" / "part.musicxml", part)
    piece = add_piece(lib, title="Lantern Waltz", instrument="piano", part_file=part, part_label="part.musicxml")
    student = add_student(lib, "Maren")
    buf = io.BytesIO()   # 20 s of 16-bit stereo WAV at 22050 Hz: 1.7 MB, more than the disk has left
    sf.write(buf, np.zeros((22050 * 20, 2)), 22050, format="WAV", subtype="PCM_16")
    app = create_app(lib, key="k" * 43, port_of=lambda: 5124)
    client = app.test_client()
    base = "http://127.0.0.1:5124"
    client.get(f"/?key={'k' * 43}", base_url=base)
    answer = client.post("/api/takes", base_url=base, content_type="multipart/form-data",
                         headers={"Origin": base, "X-Desk-Check": change_check("k" * 43)},
                         data={"file": (io.BytesIO(buf.getvalue()), "long.wav"), "label": "long.wav",
                               "student_id": student, "piece_id": piece, "date": "2026-11-02"})
    assert answer.status_code == 507
    assert "disk holding the library is full" in answer.get_json()["error"]
    assert _rows(lib.root / "desk.sqlite", "SELECT count(*) FROM takes") == [(0,)]
    assert not list((lib.root / "audio").iterdir()) and not list((lib.root / "staging").iterdir())
    assert _rows(lib.root / "desk.sqlite", "PRAGMA integrity_check") == [("ok",)]
    lib.engine.dispose()


def test_jobs_can_be_handed_to_a_dask_cluster(tmp_path):
    distributed = pytest.importorskip("distributed", reason="dask.distributed is not installed")
    import time

    from takescribe.desk.library import add_take
    from takescribe.desk.queue import JobRunner

    lib = open_library(tmp_path / "lib")
    part = staging_path(lib)
    shutil.copyfile(DEMO / "piano" / "part.musicxml", part)
    piece = add_piece(lib, title="Lantern Waltz", instrument="piano", part_file=part, part_label="part.musicxml")
    student = add_student(lib, "Maren")
    audio = staging_path(lib)
    shutil.copyfile(WEEKS[0], audio)
    made = add_take(lib, student_id=student, piece_id=piece, date="2026-11-02", label="week1.ogg", audio_file=audio)
    # the recording vanishes before its turn (a disk that went away): the Dask worker runs the job,
    # which fails quickly with the reader's message, written to the database by the worker
    (lib.root / "audio" / f"{made['take_id']}.ogg").unlink()
    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=False, dashboard_address=None) as cluster:
        runner = JobRunner(lib, scheduler=cluster.scheduler_address)
        runner.start()
        try:
            end = time.monotonic() + 60
            while time.monotonic() < end:
                state = _rows(lib.root / "desk.sqlite", f"SELECT status, message FROM jobs WHERE id = {made['job_id']}")
                if state[0][0] in ("failed", "done"):
                    break
                time.sleep(0.3)
        finally:
            runner.stop()
    assert state[0][0] == "failed" and "week1.ogg" in state[0][1], state
    assert _rows(lib.root / "desk.sqlite", "SELECT status FROM takes") == [("failed",)]
    lib.engine.dispose()
