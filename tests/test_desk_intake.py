"""Bringing takes into the desk: a dropped batch of files through the HTTP API, the watched folder,
phone recordings (AAC in MP4, raw AAC), a library archive brought in through the page, and the
``takescribe progress`` command on a folder of reports.

Flask's test client drives the web layer (no server thread, no job runner); the one analysis
(an M4A take) runs in this process through :func:`takescribe.desk.queue.run_job`.
"""

from __future__ import annotations

import io
import json
import shutil
import sqlite3
import subprocess
from pathlib import Path

import pytest

from takescribe.cli import main
from takescribe.desk import _watch_once
from takescribe.desk.app import create_app
from takescribe.desk.archive import export_library
from takescribe.desk.guard import change_check
from takescribe.desk.library import DeskSettings, add_piece, add_student, open_library, staging_path

HERE = Path(__file__).resolve().parent
DEMO = HERE.parent / "src" / "takescribe" / "data" / "demo"
WEEKS = sorted((HERE / "desk_takes").glob("*.ogg"))
FFMPEG = shutil.which("ffmpeg")
KEY = "k" * 43
ORIGIN = "http://127.0.0.1:5125"


def _rows(lib, sql: str):
    with sqlite3.connect(lib.root / "desk.sqlite") as conn:
        return conn.execute(sql).fetchall()


@pytest.fixture
def desk(tmp_path):
    """A library with the waltz and Maren, and a logged-in test client (no job runner)."""
    lib = open_library(tmp_path / "lib", settings=DeskSettings(max_upload_bytes=4 * 2**20))
    part = staging_path(lib)
    shutil.copyfile(DEMO / "piano" / "part.musicxml", part)
    piece = add_piece(lib, title="Lantern Waltz", instrument="piano", part_file=part, part_label="part.musicxml")
    student = add_student(lib, "Maren")
    client = create_app(lib, key=KEY, port_of=lambda: 5125).test_client()
    assert client.get(f"/?key={KEY}", base_url=ORIGIN).status_code == 302
    yield lib, client, piece, student
    lib.engine.dispose()


def _post(client, path: str, data: dict):
    return client.post(path, data=data, base_url=ORIGIN, content_type="multipart/form-data",
                       headers={"Origin": ORIGIN, "X-Desk-Check": change_check(KEY)})


def test_dropped_files_are_guessed_stored_and_queued(desk):
    # what the bring-in page does with files dropped on it: a guess per name, then one POST each
    lib, client, piece, student = desk
    made = []
    for path in WEEKS:
        guess = client.get("/api/guess", query_string={"name": path.name}, base_url=ORIGIN).get_json()
        assert guess == {"student_id": student, "piece_id": piece, "date": path.stem.rsplit(" ", 1)[1]}
        answer = _post(client, "/api/takes", {"file": (io.BytesIO(path.read_bytes()), path.name), "label": path.name,
                                               **{k: str(v) for k, v in guess.items()}})
        assert answer.status_code == 201, answer.get_json()
        made.append(answer.get_json())
    jobs = client.get("/api/jobs", query_string={"ids": ",".join(str(m["job_id"]) for m in made)},
                      base_url=ORIGIN).get_json()["jobs"]
    assert [jobs[str(m["job_id"])]["status"] for m in made] == ["queued"] * 3
    assert _rows(lib, "SELECT label, date, status FROM takes ORDER BY date") == \
        [(p.name, p.stem.rsplit(" ", 1)[1], "queued") for p in WEEKS]
    for m, path in zip(made, WEEKS):   # stored under the take's id, byte for byte
        assert (lib.root / "audio" / f"{m['take_id']}.ogg").read_bytes() == path.read_bytes()


def test_watched_folder_adds_named_recordings_once(desk, tmp_path):
    lib, _, piece, student = desk
    folder = tmp_path / "inbox"
    folder.mkdir()
    shutil.copyfile(WEEKS[0], folder / WEEKS[0].name)
    shutil.copyfile(WEEKS[1], folder / "recording 3.ogg")   # a name that tells neither student nor piece
    (folder / "notes.txt").write_text("not a take")
    kicks, notices, sizes = [], [], {}

    class Runner:
        def kick(self):
            kicks.append(1)

    _watch_once(lib, folder, sizes, notices, Runner())   # first look: sizes noted, files may still be copying
    assert _rows(lib, "SELECT count(*) FROM takes") == [(0,)] and kicks == []
    _watch_once(lib, folder, sizes, notices, Runner())   # same sizes: complete, taken in
    assert _rows(lib, "SELECT student_id, piece_id, date, label, status FROM takes") == \
        [(student, piece, "2026-11-02", WEEKS[0].name, "queued")]
    assert kicks == [1]
    assert notices == ["recording 3.ogg: its name does not tell whose take or which piece; add it by hand"]
    _watch_once(lib, folder, sizes, notices, Runner())   # seen before: not added twice
    assert _rows(lib, "SELECT count(*) FROM takes") == [(1,)] and len(notices) == 1
    assert sorted(p.name for p in folder.iterdir()) == sorted([WEEKS[0].name, "recording 3.ogg", "notes.txt"])


@pytest.mark.skipif(FFMPEG is None, reason="ffmpeg is not installed (Debian: apt-get install ffmpeg)")
def test_phone_recordings_are_taken_in_and_analysed_as_the_command_line_does(desk, tmp_path):
    from takescribe.desk.queue import claim_next, run_job

    lib, client, piece, student = desk
    codes = {"week1.m4a": ["-c:a", "aac", "-b:a", "64k"], "week1.aac": ["-c:a", "aac", "-b:a", "64k", "-f", "adts"]}
    made = {}
    for name, codec in codes.items():   # AAC in MP4 (ISO/IEC 14496-12) and raw AAC (ADTS, ISO/IEC 13818-7)
        encoded = tmp_path / name
        subprocess.run([FFMPEG, "-loglevel", "error", "-y", "-i", str(WEEKS[0]), *codec, str(encoded)], check=True,
                       capture_output=True, timeout=60)
        answer = _post(client, "/api/takes", {"file": (io.BytesIO(encoded.read_bytes()), name), "label": name,
                                               "student_id": str(student), "piece_id": str(piece),
                                               "date": "2026-11-02"})
        assert answer.status_code == 201, answer.get_json()
        made[name] = answer.get_json()
        suffix = Path(name).suffix
        assert (lib.root / "audio" / f"{made[name]['take_id']}{suffix}").read_bytes() == encoded.read_bytes()
    job, attempt = claim_next(lib.engine)
    assert job == made["week1.m4a"]["job_id"]
    assert run_job(lib.url, str(lib.root), job, attempt) == "done"
    outputs = lib.root / "outputs" / str(made["week1.m4a"]["take_id"])
    findings = json.loads((outputs / "findings.json").read_text())
    # the planted pause before bar 12 of week 1 (desk_takes/build_desk_takes.py) is found in the phone copy too
    assert any(f["measure"] == 12 for f in findings["findings"])


def test_a_library_archive_is_brought_in_through_the_page(desk, tmp_path):
    lib, client, _, _ = desk
    other = open_library(tmp_path / "other", settings=DeskSettings(max_upload_bytes=4 * 2**20))
    part = staging_path(other)
    shutil.copyfile(DEMO / "violin" / "part.musicxml", part)
    add_piece(other, title="Harbour Song", instrument="violin", part_file=part, part_label="part.musicxml")
    add_student(other, "Joss")
    archive = tmp_path / "backup.zip"
    export_library(other, archive)
    other.engine.dispose()
    answer = _post(client, "/library/import", {"archive": (io.BytesIO(archive.read_bytes()), "backup.zip")})
    assert answer.status_code == 302
    page = client.get(answer.headers["Location"], base_url=ORIGIN).get_data(as_text=True)
    assert "Added 1 students, 1 pieces and 0 takes." in page   # the page says what was added
    assert sorted(r[0] for r in _rows(lib, "SELECT name FROM students")) == ["Joss", "Maren"]
    assert sorted(r[0] for r in _rows(lib, "SELECT title FROM pieces")) == ["Harbour Song", "Lantern Waltz"]


def _findings(measures: list[int], bpm: list[float]) -> dict:
    """A findings file of the practice report's schema (takescribe-findings/1), written by hand."""
    return {"schema": "takescribe-findings/1",
            "findings": [{"kind": "missed", "measure": m} for m in measures],
            "summary": {"counts": {"missed": len(measures)}, "notes_in_part": 40,
                        "tempo_curve": [{"measure": k + 1, "beats_per_minute": b} for k, b in enumerate(bpm)]}}


def test_progress_command_writes_html_and_json_from_a_folder_of_reports(tmp_path, capsys):
    # a worked example by hand: bar 3 has findings in all three weeks, bar 1 only in the first
    reports = tmp_path / "reports"
    for name, measures in (("2026-11-16 maren", [3]), ("2026-11-02 maren", [1, 3]), ("2026-11-09 maren", [3, 3])):
        (reports / name).mkdir(parents=True)
        (reports / name / "findings.json").write_text(json.dumps(_findings(measures, [100, 100, 100, 100])))
    html, data = tmp_path / "progress.html", tmp_path / "progress.json"
    assert main(["progress", str(reports), "-o", str(html), "--json", str(data)]) == 0
    written = json.loads(data.read_text())
    assert written["findings_per_bar"]["3"] == [1, 2, 1]   # in date order, not name order
    assert written["findings_per_bar"]["1"] == [1, 0, 0]
    assert "<svg" in html.read_text() and "2026-11-09" in html.read_text()
    # never overwritten without --force
    assert main(["progress", str(reports), "-o", str(html)]) == 4
    assert "exists" in capsys.readouterr().err
