"""The library: a folder holding the database, the recordings, the parts and the outputs.

Layout of a library folder (every name chosen by the desk, never by the browser)::

    desk.sqlite            the database (unless a PostgreSQL URL is given)
    audio/<take>.<kind>    the recordings, as received
    parts/<piece>.<kind>   the parts (musicxml, mxl or mid)
    outputs/<take>/        report.html, findings.json, annotated.musicxml, take.mid,
                           draft.mid, draft.musicxml (appears whole, by one rename)
    staging/               work in progress; emptied at every start

Conventions
-----------
Functions take the :class:`Library` first. A row is written in the same transaction that
makes its file visible (the file is renamed into place just before the commit, and removed
again if the commit fails), so the database never names a file that is not there.
"""

from __future__ import annotations

import errno
import os
import shutil
import uuid
from dataclasses import dataclass
from pathlib import Path

import sqlalchemy as sa

from ..errors import InputError, OutputError
from . import db
from .intake import check_audio_file, check_part_file, clean_label

__all__ = ["DeskSettings", "Library", "open_library", "add_student", "add_piece", "add_take", "delete_student",
           "staging_path", "disk_full_error", "list_students", "list_pieces", "student_takes", "get_take",
           "take_outputs", "DeletionSummary", "OUTPUT_FILES"]

OUTPUT_FILES = ("report.html", "findings.json", "annotated.musicxml", "take.mid", "draft.mid", "draft.musicxml")
FOLDERS = ("audio", "parts", "outputs", "staging")


@dataclass(frozen=True)
class DeskSettings:
    """Limits and pacing of the desk.

    Attributes
    ----------
    max_upload_bytes : int
        Largest recording accepted (an hour of 16-bit 44.1 kHz stereo WAV is 635 MB).
    max_part_bytes : int
        Largest part file (a long orchestral MusicXML is a few MB).
    max_archive_bytes : int
        Largest library archive accepted for import.
    workers : int
        Jobs run at once on this computer (0: one per CPU).
    worker_nice : int
        Niceness of job processes, so the pages stay quick while jobs run.
    watch_seconds : float
        How often the watched folder is looked at.
    """

    max_upload_bytes: int = 700 * 2**20   # the hour of stereo WAV above, with room
    max_part_bytes: int = 20 * 2**20      # 5x a long orchestral MusicXML
    max_archive_bytes: int = 20 * 2**30   # a school year of takes for twenty students
    workers: int = 0
    worker_nice: int = 10                 # the web process keeps its priority over the analysis
    watch_seconds: float = 3.0            # a file copied in is picked up within a few seconds


@dataclass(frozen=True)
class Library:
    """An open library: its folder, its database engine and URL, its settings."""

    root: Path
    engine: object
    url: str
    settings: DeskSettings


@dataclass(frozen=True)
class DeletionSummary:
    """What deleting a student removed."""

    name: str
    takes: int
    files: int
    jobs_stopped: int


def disk_full_error(exc: BaseException, root: Path) -> OutputError | None:
    """An :class:`OutputError` with a clear message when ``exc`` says the disk is full; else None."""
    full = isinstance(exc, OSError) and exc.errno in (errno.ENOSPC, errno.EDQUOT)
    full = full or (isinstance(exc, sa.exc.OperationalError) and "full" in str(exc).lower())
    if not full:
        return None
    return OutputError(f"{root}: the disk holding the library is full; nothing was stored. Free some space"
                       " (or move the library with --library) and try again")


def open_library(root, *, url: str | None = None, settings: DeskSettings | None = None) -> Library:
    """Open (creating when missing) the library in folder ``root``; the database is migrated.

    Work left in ``staging/`` by a stopped server is removed: it was never shown.
    """
    root = Path(root).expanduser().resolve()
    try:
        for name in FOLDERS:
            (root / name).mkdir(parents=True, exist_ok=True)
        for leftover in (root / "staging").iterdir():
            shutil.rmtree(leftover) if leftover.is_dir() else leftover.unlink()
    except OSError as exc:
        raise disk_full_error(exc, root) or OutputError(f"{root}: cannot use this folder as a library ({exc})")
    url = url or db.sqlite_url(root / "desk.sqlite")
    engine = db.open_engine(url)
    db.migrate(engine)
    return Library(root=root, engine=engine, url=url, settings=settings or DeskSettings())


def staging_path(lib: Library, suffix: str = "") -> Path:
    """A fresh name inside ``staging/``."""
    return lib.root / "staging" / f"{uuid.uuid4().hex}{suffix}"


def _rows(lib: Library, query) -> list[dict]:
    with lib.engine.connect() as conn:
        return [dict(r._mapping) for r in conn.execute(query)]


def add_student(lib: Library, name: str) -> int:
    """A new student; returns the id."""
    name = clean_label(name, what="student's name")
    with lib.engine.begin() as conn:
        return conn.execute(db.students.insert().values(name=name, created=db.now())).inserted_primary_key[0]


def add_piece(lib: Library, *, title: str, instrument: str, part_file: Path, part_label: str,
              part_name: str | None = None) -> int:
    """A new piece from a part file in ``staging/`` (moved into ``parts/``); returns the id.

    Raises
    ------
    ScoreError
        When the file is not a part, or ``part_name`` names no part in it.
    InputError
        For an unknown instrument or a bad title.
    """
    from ..transcription.instruments import resolve_instrument

    title = clean_label(title, what="piece's title")
    label = clean_label(part_label, what="part's file name")
    try:
        resolved = resolve_instrument(instrument.strip())
    except (InputError, ValueError, KeyError) as exc:
        raise InputError(f"instrument {instrument!r}: {exc}") from exc
    kind = check_part_file(part_file, label=label, part_name=part_name)
    with lib.engine.begin() as conn:
        ident = conn.execute(db.pieces.insert().values(
            title=title, instrument=resolved.gm_name, part_file="", part_name=part_name or None,
            created=db.now())).inserted_primary_key[0]
        name = f"parts/{ident}.{kind}"
        conn.execute(db.pieces.update().where(db.pieces.c.id == ident).values(part_file=name))
        os.replace(part_file, lib.root / name)
    return ident


def _exists(conn, table, ident) -> bool:
    return conn.execute(sa.select(table.c.id).where(table.c.id == ident)).first() is not None


def add_take(lib: Library, *, student_id: int, piece_id: int, date: str, label: str, audio_file: Path) -> dict:
    """A new take from a recording in ``staging/`` (moved into ``audio/``), queued for analysis.

    Returns
    -------
    dict
        ``take_id`` and ``job_id``.

    Raises
    ------
    AudioError
        When the content is not a readable recording (the name is not trusted).
    InputError
        For an unknown student or piece or a bad date.
    """
    from .intake import parse_date

    label = clean_label(label)
    iso = parse_date(date or "")
    if iso is None or iso != (date or "").strip():
        raise InputError(f"{label}: the date {date!r} is not a date (YYYY-MM-DD)")
    kind = check_audio_file(audio_file, label=label)
    with lib.engine.begin() as conn:
        if not _exists(conn, db.students, student_id) or not _exists(conn, db.pieces, piece_id):
            raise InputError(f"{label}: choose a student and a piece of this library")
        take_id = conn.execute(db.takes.insert().values(
            student_id=student_id, piece_id=piece_id, date=iso, label=label, audio_file="", status="queued",
            created=db.now())).inserted_primary_key[0]
        name = f"audio/{take_id}.{kind}"
        conn.execute(db.takes.update().where(db.takes.c.id == take_id).values(audio_file=name))
        job_id = conn.execute(db.jobs.insert().values(
            take_id=take_id, label=label, status="queued", fraction=0.0, attempt=0,
            created=db.now())).inserted_primary_key[0]
        os.replace(audio_file, lib.root / name)
    return {"take_id": take_id, "job_id": job_id}


def delete_student(lib: Library, student_id: int) -> DeletionSummary:
    """Remove a student, their takes, the takes' recordings and outputs, and every row about them.

    Jobs of those takes that are waiting or running are stopped (a running one finds its take
    gone and throws its work away).
    """
    with lib.engine.begin() as conn:
        row = conn.execute(sa.select(db.students.c.name).where(db.students.c.id == student_id)).first()
        if row is None:
            raise InputError(f"student {student_id}: not in this library (already removed?)")
        their = conn.execute(sa.select(db.takes.c.id, db.takes.c.audio_file)
                             .where(db.takes.c.student_id == student_id)).all()
        ids = [t.id for t in their]
        stopped = conn.execute(db.jobs.update().where(db.jobs.c.take_id.in_(ids))
                               .where(db.jobs.c.status.in_(("queued", "running")))
                               .values(status="stopped", message="the student was removed",
                                       finished=db.now())).rowcount if ids else 0
        conn.execute(db.jobs.delete().where(db.jobs.c.take_id.in_(ids)))
        conn.execute(db.students.delete().where(db.students.c.id == student_id))
    files = 0
    for take in their:
        files += _remove(lib.root / take.audio_file) + _remove(lib.root / "outputs" / str(take.id))
    return DeletionSummary(name=row.name, takes=len(ids), files=files, jobs_stopped=int(stopped or 0))


def _remove(path: Path) -> int:
    """Remove a file or folder; returns how many files went."""
    if path.is_dir():
        count = sum(1 for p in path.rglob("*") if p.is_file())
        shutil.rmtree(path, ignore_errors=True)
        return count
    if path.is_file():
        path.unlink()
        return 1
    return 0


def list_students(lib: Library) -> list[dict]:
    """Students with their number of takes, by name."""
    t = db.takes
    count = sa.select(sa.func.count(t.c.id)).where(t.c.student_id == db.students.c.id).scalar_subquery()
    latest = sa.select(sa.func.max(t.c.date)).where(t.c.student_id == db.students.c.id).scalar_subquery()
    return _rows(lib, sa.select(db.students, count.label("n_takes"), latest.label("latest"))
                 .order_by(db.students.c.name, db.students.c.id))


def list_pieces(lib: Library) -> list[dict]:
    """Pieces with their number of takes, by title."""
    t = db.takes
    count = sa.select(sa.func.count(t.c.id)).where(t.c.piece_id == db.pieces.c.id).scalar_subquery()
    return _rows(lib, sa.select(db.pieces, count.label("n_takes")).order_by(db.pieces.c.title, db.pieces.c.id))


def _take_query():
    t = db.takes
    return (sa.select(t, db.students.c.name.label("student"), db.pieces.c.title.label("piece"),
                      db.pieces.c.instrument)
            .join(db.students, db.students.c.id == t.c.student_id)
            .join(db.pieces, db.pieces.c.id == t.c.piece_id))


def student_takes(lib: Library, student_id: int, piece_id: int | None = None) -> list[dict]:
    """A student's takes (optionally of one piece) in date order."""
    query = _take_query().where(db.takes.c.student_id == student_id)
    if piece_id is not None:
        query = query.where(db.takes.c.piece_id == piece_id)
    return _rows(lib, query.order_by(db.takes.c.date, db.takes.c.id))


def get_take(lib: Library, take_id: int) -> dict | None:
    """One take with its student's name and piece's title, or None."""
    found = _rows(lib, _take_query().where(db.takes.c.id == take_id))
    return found[0] if found else None


def take_outputs(lib: Library, take: dict) -> Path | None:
    """The outputs folder of a finished take; None until the analysis has finished whole."""
    if take is None or take["status"] != "done":
        return None
    folder = lib.root / "outputs" / str(int(take["id"]))
    return folder if folder.is_dir() else None


def get_row(lib: Library, table, ident: int) -> dict | None:
    """One row of ``table`` by id, or None."""
    found = _rows(lib, sa.select(table).where(table.c.id == ident))
    return found[0] if found else None


def seed_demo(lib: Library, *, date: str) -> int:
    """Put the bundled demo's two students, their pieces and takes in an empty library; returns takes added.

    A new teacher then sees a filled page at once (the two takes are analysed by the queue).
    Does nothing when the library already holds students or pieces.
    """
    from ..jobs.demo import demo_bundle, load_scenario

    with lib.engine.connect() as conn:
        if conn.execute(sa.select(sa.func.count()).select_from(db.students)).scalar() or \
                conn.execute(sa.select(sa.func.count()).select_from(db.pieces)).scalar():
            return 0
    added = 0
    with demo_bundle() as bundle:
        for entry in load_scenario(bundle)["students"]:
            part = staging_path(lib)
            shutil.copyfile(bundle / entry["files"]["part"], part)
            piece = add_piece(lib, title=entry["piece"], instrument=entry["instrument"], part_file=part,
                              part_label="part.musicxml")
            student = add_student(lib, entry["student"])
            take = staging_path(lib)
            shutil.copyfile(bundle / entry["files"]["take"], take)
            add_take(lib, student_id=student, piece_id=piece, date=date,
                     label=f"{entry['student']} {entry['piece']} (demo).flac", audio_file=take)
            added += 1
    return added


def part_path(lib: Library, piece: dict) -> Path:
    """The stored part file of a piece."""
    return lib.root / piece["part_file"]


def check_ids(*values) -> list[int]:
    """Integers from form fields; InputError naming the field otherwise."""
    out = []
    for name, value in values:
        try:
            out.append(int(value))
        except (TypeError, ValueError):
            raise InputError(f"{name}: choose one from the list") from None
    return out


__all__ += ["get_row", "seed_demo", "part_path", "check_ids"]
