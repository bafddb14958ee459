"""The desk's library on PostgreSQL: a throwaway cluster (initdb, pg_ctl) on a localhost port.

PostgreSQL refuses to run as root, so as root the cluster runs as the ``postgres`` user
(Debian's package creates it). Skips with the reason where initdb/pg_ctl, the driver or a
non-root user is missing.
"""

from __future__ import annotations

import os
import pwd
import shutil
import socket
import subprocess
import tempfile
from pathlib import Path

import pytest
import sqlalchemy as sa

pytest.importorskip("psycopg2", reason="psycopg2 is not installed (pip install '.[postgres]')")

from takescribe.desk import db  # noqa: E402
from takescribe.desk.library import (add_piece, add_student, add_take, delete_student, open_library,  # noqa: E402
                                     staging_path, student_takes)
from takescribe.desk.queue import claim_next, recover  # noqa: E402

DEMO = Path(__file__).resolve().parents[1] / "src" / "takescribe" / "data" / "demo"


def _tool(name: str) -> str | None:
    found = shutil.which(name)
    if found:
        return found
    versions = sorted(Path("/usr/lib/postgresql").glob(f"*/bin/{name}"))
    return str(versions[-1]) if versions else None


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture(scope="module")
def postgres_url():
    initdb, pg_ctl = _tool("initdb"), _tool("pg_ctl")
    if not initdb or not pg_ctl:
        pytest.skip("PostgreSQL's initdb/pg_ctl are not installed (Debian: apt-get install postgresql)")
    user = None
    if os.geteuid() == 0:
        try:
            user = pwd.getpwnam("postgres")
        except KeyError:
            pytest.skip("running as root and there is no 'postgres' user to run the throwaway cluster")
    folder = Path(tempfile.mkdtemp(prefix="takescribe-pg-"))
    if user is not None:
        os.chown(folder, user.pw_uid, user.pw_gid)
    data, port = folder / "data", _free_port()

    def run(*args):
        command = list(args) if user is None else ["runuser", "-u", "postgres", "--", *args]
        return subprocess.run(command, capture_output=True, text=True, timeout=120)

    done = run(initdb, "-D", str(data), "-U", "desk", "--auth=trust", "-E", "UTF8")
    if done.returncode != 0:
        shutil.rmtree(folder, ignore_errors=True)
        pytest.skip(f"initdb failed: {done.stderr.strip()[-300:]}")
    try:
        done = run(pg_ctl, "-D", str(data), "-l", str(folder / "log"), "-w", "-o",
                   f"-h 127.0.0.1 -p {port} -k {folder}", "start")
        if done.returncode != 0:   # (a server that started too slowly is stopped below all the same)
            pytest.skip(f"pg_ctl start failed: {done.stderr.strip()[-300:]}")
        yield f"postgresql://desk@127.0.0.1:{port}/postgres"
    finally:
        _stop_cluster(run, pg_ctl, data)
        shutil.rmtree(folder, ignore_errors=True)


def _stop_cluster(run, pg_ctl: str, data: Path) -> None:
    """pg_ctl stop (immediate); should the server outlive it, SIGKILL its postmaster (pid from postmaster.pid)."""
    import signal
    import time

    pid_file = data / "postmaster.pid"
    pid = int(pid_file.read_text().split()[0]) if pid_file.exists() else None
    try:
        run(pg_ctl, "-D", str(data), "-m", "immediate", "stop")
    except subprocess.TimeoutExpired:
        pass
    if pid is None:
        return
    deadline = time.monotonic() + 10
    while time.monotonic() < deadline:
        try:
            os.kill(pid, 0)
        except ProcessLookupError:
            return
        time.sleep(0.2)
    try:
        os.kill(pid, signal.SIGKILL)
    except ProcessLookupError:
        pass


def test_library_on_postgresql(tmp_path, postgres_url):
    lib = open_library(tmp_path / "lib", url=postgres_url)
    with lib.engine.connect() as conn:
        assert db.schema_version(conn) == db.SCHEMA_VERSION
    part = staging_path(lib)
    shutil.copyfile(DEMO / "piano" / "part.musicxml", part)
    piece = add_piece(lib, title="Lantern Waltz", instrument="piano", part_file=part, part_label="part.musicxml")
    student = add_student(lib, "Maren")
    audio = staging_path(lib)
    shutil.copyfile(DEMO / "piano" / "take.flac", audio)
    made = add_take(lib, student_id=student, piece_id=piece, date="2026-11-02", label="take.flac", audio_file=audio)
    # the queue: claimed with FOR UPDATE SKIP LOCKED, put back after a stop, claimed again as attempt 2
    assert claim_next(lib.engine) == (made["job_id"], 1)
    assert claim_next(lib.engine) is None
    assert recover(lib.engine) == 1
    assert claim_next(lib.engine) == (made["job_id"], 2)
    assert [t["label"] for t in student_takes(lib, student)] == ["take.flac"]
    gone = delete_student(lib, student)   # ON DELETE CASCADE on PostgreSQL too
    assert gone.takes == 1 and gone.jobs_stopped == 1
    with lib.engine.connect() as conn:
        assert conn.execute(sa.select(sa.func.count()).select_from(db.takes)).scalar() == 0
    lib.engine.dispose()
