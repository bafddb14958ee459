"""Test helpers for the desk: start it as its own process, talk to it as the desk's pages do."""

from __future__ import annotations

import os
import re
import selectors
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import requests

HERE = Path(__file__).resolve().parent
DEMO = HERE.parents[1] / "src" / "takescribe" / "data" / "demo"
WEEKS = sorted(HERE.glob("*.ogg"))


class DeskProcess:
    """``takescribe desk`` in a subprocess on a free port, with a logged-in HTTP session."""

    def __init__(self, library: Path, *extra: str, workers: int = 1, start_seconds: float = 120.0) -> None:
        self.library = Path(library)
        args = [sys.executable, "-m", "takescribe.cli", "desk", "--library", str(library), "--port", "0",
                "--no-browser", "--workers", str(workers), *extra]
        # stderr to a file, not a pipe nobody reads: a full pipe would block the desk
        self.log = tempfile.TemporaryFile(mode="w+")
        self.proc = subprocess.Popen(args, stdout=subprocess.PIPE, stderr=self.log, text=True, env=dict(os.environ))
        try:
            line = self._first_line(start_seconds)
            found = re.search(r"(http://127\.0\.0\.1:(\d+))/\?key=(\S+)", line)
            if not found:
                self.log.seek(0)
                raise RuntimeError(f"the desk did not start: {line!r} {self.log.read()[-2000:]}")
            self.base, self.port, self.key = found[1], int(found[2]), found[3]
            self.session = requests.Session()
            self.session.get(f"{self.base}/?key={self.key}", timeout=30)
            page = self.session.get(f"{self.base}/students", timeout=30).text
            self.check = re.search(r'const CHECK = "([0-9a-f]+)"', page)[1]
        except BaseException:   # never leave a desk running behind a failed start
            self.stop()
            raise

    def _first_line(self, seconds: float) -> str:
        """The line the desk prints when it listens, waited for at most ``seconds``."""
        with selectors.DefaultSelector() as selector:
            selector.register(self.proc.stdout, selectors.EVENT_READ)
            if not selector.select(timeout=seconds):
                return f"(nothing printed in {seconds:.0f} s)"
        return self.proc.stdout.readline()

    def get(self, path: str, **kw):
        return self.session.get(self.base + path, timeout=30, **kw)

    def post(self, path: str, **kw):
        headers = {"Origin": self.base, "X-Desk-Check": self.check, **kw.pop("headers", {})}
        return self.session.post(self.base + path, headers=headers, timeout=60, **kw)

    def add_piece(self, title: str, part: Path, instrument: str = "piano") -> int:
        answer = self.post("/pieces", data={"title": title, "instrument": instrument},
                           files={"part": (part.name, part.read_bytes())})
        assert answer.status_code == 200, answer.text
        import sqlite3

        with sqlite3.connect(self.library / "desk.sqlite") as conn:
            return conn.execute("SELECT max(id) FROM pieces WHERE title = ?", (title,)).fetchone()[0]

    def add_student(self, name: str) -> int:
        answer = self.post("/students", data={"name": name})
        assert answer.status_code == 200, answer.text
        return int(answer.url.rsplit("/", 1)[1])

    def upload(self, path: Path, *, student: int, piece: int, date: str = "2026-11-02", name: str | None = None):
        return self.post("/api/takes", files={"file": (name or path.name, path.read_bytes())},
                         data={"label": name or path.name, "student_id": student, "piece_id": piece, "date": date})

    def wait(self, job: int, until=("done", "failed", "refused"), timeout: float = 120.0, **cond) -> dict:
        end = time.monotonic() + timeout
        while time.monotonic() < end:
            state = self.get(f"/api/jobs?ids={job}").json()["jobs"].get(str(job))
            if state and state["status"] in until and all(state.get(k, 0) >= v for k, v in cond.items()):
                return state
            time.sleep(0.3)
        raise AssertionError(f"job {job} did not reach {until} in {timeout} s: {state}")

    def stop(self) -> None:
        """Stop the desk (SIGTERM, then SIGKILL after 10 s); its job workers die with it (PR_SET_PDEATHSIG)."""
        if self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(10)
        if self.proc.stdout is not None:
            self.proc.stdout.close()

