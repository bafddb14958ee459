"""The desk without running analyses: database, content checks, the guard, bad input, backup, progress.

Flask's test client drives the web layer (no server, no job runner); each refused request is
checked to leave the database and the library folder as they were.
"""

from __future__ import annotations

import io
import json
import shutil
import sqlite3
import zipfile
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from takescribe.cli import main
from takescribe.desk import db
from takescribe.desk.app import create_app
from takescribe.desk.archive import export_library, import_library
from takescribe.desk.guard import change_check
from takescribe.desk.intake import clean_label, guess_from_name, sniff_audio, sniff_part
from takescribe.desk.library import (DeskSettings, add_piece, add_student, add_take, delete_student, list_students,
                                     open_library, staging_path, student_takes)
from takescribe.desk.progress import TakeFindings, progress_json, summarize_progress
from takescribe.errors import InputError

DEMO = Path(__file__).resolve().parents[1] / "src" / "takescribe" / "data" / "demo"
WEEKS = sorted((Path(__file__).resolve().parent / "desk_takes").glob("*.ogg"))
PORT = 5123
ORIGIN = f"http://127.0.0.1:{PORT}"


def _stage(lib, source: Path) -> Path:
    target = staging_path(lib)
    shutil.copyfile(source, target)
    return target


@pytest.fixture
def desk(tmp_path):
    """A library with one piece and one student, and a logged-in test client (no job runner)."""
    lib = open_library(tmp_path / "lib", settings=DeskSettings(max_upload_bytes=2 * 2**20))
    piece = add_piece(lib, title="Lantern Waltz", instrument="piano", part_file=_stage(lib, DEMO / "piano" / "part.musicxml"),
                      part_label="part.musicxml")
    student = add_student(lib, "Maren")
    app = create_app(lib, key="k" * 43, port_of=lambda: PORT)
    client = app.test_client()
    assert client.get(f"/?key={'k' * 43}", base_url=ORIGIN).status_code == 302
    yield lib, client, piece, student
    lib.engine.dispose()


def _post(client, path, *, data=None, origin=ORIGIN, check=True):
    headers = {"Origin": origin} if origin else {}
    if check:
        headers["X-Desk-Check"] = change_check("k" * 43)
    return client.post(path, data=data or {}, headers=headers, base_url=ORIGIN, content_type="multipart/form-data")


def _snapshot(lib) -> tuple:
    with lib.engine.connect() as conn:
        rows = tuple(conn.execute(db.sa.select(db.sa.func.count()).select_from(t)).scalar()
                     for t in (db.pieces, db.students, db.takes, db.jobs))
    files = tuple(sorted(str(p.relative_to(lib.root)) for p in lib.root.rglob("*")
                         if p.is_file() and not p.name.startswith("desk.sqlite")))
    return rows, files


def test_database_is_wal_with_foreign_keys_and_versioned(tmp_path):
    lib = open_library(tmp_path / "lib")
    with lib.engine.connect() as conn:
        assert conn.exec_driver_sql("PRAGMA journal_mode").scalar() == "wal"
        assert conn.exec_driver_sql("PRAGMA foreign_keys").scalar() == 1
        assert db.schema_version(conn) == db.SCHEMA_VERSION
    assert db.migrate(lib.engine) == db.SCHEMA_VERSION   # a second start changes nothing
    with lib.engine.begin() as conn:   # a database from a newer takescribe is refused, not damaged
        conn.exec_driver_sql("UPDATE schema_version SET version = 99")
    with pytest.raises(InputError, match="newer"):
        db.migrate(lib.engine)


def test_content_sniffing_follows_the_format_signatures(tmp_path):
    # signatures: RIFF/WAVE, fLaC (RFC 9639), OggS (RFC 3533), ID3 / MPEG sync, SMF MThd
    buf = io.BytesIO()
    sf.write(buf, np.zeros(800), 8000, format="WAV")
    assert sniff_audio(buf.getvalue()[:64]) == "wav"
    assert sniff_audio((DEMO / "piano" / "take.flac").read_bytes()[:64]) == "flac"
    assert sniff_audio(WEEKS[0].read_bytes()[:64]) == "ogg"
    assert sniff_audio(b"ID3\x04\x00") == "mp3"
    assert sniff_audio(b"\x89PNG\r\n\x1a\n" + bytes(56)) is None
    assert sniff_part((DEMO / "piano" / "part.musicxml").read_bytes()[:4096]) == "musicxml"
    assert sniff_part(b"MThd\x00\x00\x00\x06") == "mid"


@pytest.mark.parametrize("name", ["../../etc/passwd.wav", "..\\take.wav", "a/b.flac", "..", "take\x00.wav"])
def test_names_that_point_somewhere_are_refused(name):
    with pytest.raises(InputError):
        clean_label(name)


def test_guess_from_file_name():
    students, pieces = [(1, "Maren"), (2, "Joss")], [(5, "Lantern Waltz"), (6, "Harbour Song")]
    assert guess_from_name("maren lantern waltz 2026-11-02.ogg", students, pieces) == \
        {"student_id": 1, "piece_id": 5, "date": "2026-11-02"}
    assert guess_from_name("JOSS_harbour-song.flac", students, pieces)["student_id"] == 2
    assert guess_from_name("recording 3.wav", students, pieces) == {"student_id": None, "piece_id": None, "date": None}
    # two students equally likely: no guess rather than a wrong one
    assert guess_from_name("maren and joss.wav", students, pieces)["student_id"] is None


def test_upload_stores_a_take_and_queues_its_job(desk):
    lib, client, piece, student = desk
    answer = _post(client, "/api/takes", data={"file": (io.BytesIO(WEEKS[0].read_bytes()), WEEKS[0].name),
                                              "label": WEEKS[0].name, "student_id": student, "piece_id": piece,
                                              "date": "2026-11-02"})
    assert answer.status_code == 201, answer.get_json()
    take = student_takes(lib, student)[0]
    assert take["audio_file"] == f"audio/{take['id']}.ogg" and take["status"] == "queued"
    assert (lib.root / take["audio_file"]).read_bytes() == WEEKS[0].read_bytes()
    jobs = client.get("/api/jobs", base_url=ORIGIN).get_json()["jobs"]
    assert jobs[str(answer.get_json()["job_id"])]["status"] == "queued"


def _bad_requests(client, piece, student):
    """(what, response) for each kind of bad request the issue names."""
    png = b"\x89PNG\r\n\x1a\n" + bytes(400)
    ok_audio = WEEKS[0].read_bytes()
    form = {"student_id": student, "piece_id": piece, "date": "2026-11-02"}
    yield "wrong type", 400, _post(client, "/api/takes", data=dict(form, file=(io.BytesIO(png), "take.wav"),
                                                                  label="take.wav"))
    yield "score as a take", 400, _post(client, "/api/takes", data=dict(
        form, file=(io.BytesIO((DEMO / "piano" / "part.musicxml").read_bytes()), "take.flac"), label="take.flac"))
    yield "path traversal", 400, _post(client, "/api/takes", data=dict(
        form, file=(io.BytesIO(ok_audio), "../../outside.ogg"), label="../../outside.ogg"))
    yield "oversized", 413, _post(client, "/api/takes", data=dict(
        form, file=(io.BytesIO(b"RIFF" + bytes(3 * 2**20)), "big.wav"), label="big.wav"))
    yield "no token", 403, client.__class__(client.application).post(
        "/api/takes", data=dict(form, file=(io.BytesIO(ok_audio), "t.ogg"), label="t.ogg"),
        headers={"Origin": ORIGIN, "X-Desk-Check": change_check("k" * 43)}, base_url=ORIGIN)
    yield "other origin", 403, _post(client, "/api/takes", origin="http://evil.example",
                                     data=dict(form, file=(io.BytesIO(ok_audio), "t.ogg"), label="t.ogg"))
    yield "no change check", 403, _post(client, "/api/takes", check=False,
                                        data=dict(form, file=(io.BytesIO(ok_audio), "t.ogg"), label="t.ogg"))
    yield "other host", 400, client.get("/students", base_url="http://attacker.example:5123")
    yield "not a part", 400, _post(client, "/pieces", data={"title": "X", "instrument": "piano",
                                                            "part": (io.BytesIO(ok_audio), "x.musicxml")})


def test_bad_requests_are_refused_with_a_clear_message_and_nothing_stored(desk):
    lib, client, piece, student = desk
    before = _snapshot(lib)
    words = {"wrong type": "not a recording", "score as a take": "not a recording", "path traversal": "folders",
             "oversized": "larger than", "no token": "session key", "other origin": "evil.example",
             "no change check": "check", "other host": "attacker.example", "not a part": "not a part"}
    for what, status, answer in _bad_requests(client, piece, student):
        text = answer.get_data(as_text=True)
        assert answer.status_code == status, (what, text)
        assert words[what] in text, (what, text)
        assert _snapshot(lib) == before, what


def test_deleting_a_student_removes_takes_outputs_and_rows(desk):
    lib, client, piece, student = desk
    made = add_take(lib, student_id=student, piece_id=piece, date="2026-11-02", label=WEEKS[0].name,
                    audio_file=_stage(lib, WEEKS[0]))
    out = lib.root / "outputs" / str(made["take_id"])
    out.mkdir()
    (out / "findings.json").write_text("{}")
    answer = _post(client, f"/students/{student}/delete", data={})
    assert answer.status_code == 200
    assert "Removed Maren: 1 take, 2 files" in answer.get_data(as_text=True)
    assert list_students(lib) == [] and not out.exists() and not list((lib.root / "audio").iterdir())
    with lib.engine.connect() as conn:
        assert conn.execute(db.sa.select(db.sa.func.count()).select_from(db.jobs)).scalar() == 0
    with pytest.raises(InputError):
        delete_student(lib, student)


def test_backup_archive_round_trip_and_hostile_archives(desk, tmp_path):
    lib, client, piece, student = desk
    add_take(lib, student_id=student, piece_id=piece, date="2026-11-02", label=WEEKS[0].name,
             audio_file=_stage(lib, WEEKS[0]))
    archive = tmp_path / "backup.zip"
    assert export_library(lib, archive) == {"pieces": 1, "students": 1, "takes": 1}
    other = open_library(tmp_path / "other")
    assert import_library(other, archive, label="backup.zip") == {"pieces": 1, "students": 1, "takes": 1}
    take = student_takes(other, list_students(other)[0]["id"])[0]
    assert (other.root / take["audio_file"]).read_bytes() == WEEKS[0].read_bytes()
    hostile = tmp_path / "hostile.zip"
    with zipfile.ZipFile(hostile, "w") as z:
        z.writestr("library.json", json.dumps({"schema": "takescribe-desk-library/1", "pieces": [], "students": [],
                                               "takes": []}))
        z.writestr("../escape.txt", "x")
    before = _snapshot(other)
    with pytest.raises(InputError, match="no place"):
        import_library(other, hostile, label="hostile.zip")
    assert _snapshot(other) == before and not (other.root.parent / "escape.txt").exists()
    other.engine.dispose()


def _take(label, findings, bpm):
    return TakeFindings(label=label, date=label, findings=tuple(findings), tempo_bpm=tuple(bpm), n_bars=4,
                        notes_in_part=10, counts={k: sum(f["kind"] == k for f in findings) for k in ("missed", "hesitation")})


def test_progress_counts_bars_over_takes():
    # a worked example by hand: bar 3 has findings in all three takes, bar 1 only in the first
    takes = [_take("2026-11-02", [{"kind": "missed", "measure": 1}, {"kind": "hesitation", "measure": 3}],
                   [100, 100, 90, 110]),
             _take("2026-11-09", [{"kind": "hesitation", "measure": 3}, {"kind": "missed", "measure": 3}],
                   [100, 102, 98, 100]),
             _take("2026-11-16", [{"kind": "hesitation", "measure": 3}], [100, 100, 100, 100])]
    progress = summarize_progress(takes)
    assert progress.per_bar.tolist() == [[1, 0, 0], [0, 0, 0], [1, 2, 1], [0, 0, 0]]
    assert [r["bar"] for r in progress.recurring] == [3] and progress.recurring[0]["in_latest"]
    assert progress.counts == {"missed": (1, 1, 0), "hesitation": (1, 1, 1)}
    # robust spread = scaled median absolute deviation, as scipy.stats.median_abs_deviation(scale="normal")
    from scipy.stats import median_abs_deviation

    for k, take in enumerate(takes):
        expected = 100 * median_abs_deviation(take.tempo_bpm, scale="normal") / np.median(take.tempo_bpm)
        assert progress.tempo_spread[k] == pytest.approx(expected, rel=1e-3)
    assert progress_json(progress)["findings_per_bar"]["3"] == [1, 2, 1]


def test_progress_command_refuses_a_folder_without_reports(tmp_path, capsys):
    (tmp_path / "empty").mkdir()
    assert main(["progress", str(tmp_path / "empty"), "-o", str(tmp_path / "p.html")]) == 1
    assert "holds no report folder" in capsys.readouterr().err
    assert not (tmp_path / "p.html").exists()


def test_seeded_library_holds_the_demo_students(tmp_path):
    from takescribe.desk.library import seed_demo

    lib = open_library(tmp_path / "lib")
    assert seed_demo(lib, date="2026-12-01") == 2
    assert sorted(s["name"] for s in list_students(lib)) == ["Joss", "Maren"]
    assert seed_demo(lib, date="2026-12-01") == 0   # never twice
    with sqlite3.connect(lib.root / "desk.sqlite") as conn:
        assert conn.execute("SELECT count(*) FROM jobs WHERE status = 'queued'").fetchone()[0] == 2
    lib.engine.dispose()
