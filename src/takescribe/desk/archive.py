"""The whole library as one archive (ZIP), for a backup or for moving to another computer.

Archive layout (schema ``takescribe-desk-library/1``)::

    library.json           pieces, students and takes (ids as in the exporting library)
    parts/<piece>.<kind>   audio/<take>.<kind>   outputs/<take>/<file>

Bringing an archive in adds its students, pieces and takes to the open library under new ids
(nothing there is replaced). Every member name is checked against the layout above before
anything is written, so an archive cannot place a file outside the library; sizes are
checked before unpacking; recordings and parts are checked by content as uploads are.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import zipfile
from pathlib import Path

import sqlalchemy as sa

from ..errors import InputError
from . import db
from .intake import check_audio_file, check_part_file, clean_label
from .library import OUTPUT_FILES, disk_full_error, staging_path

__all__ = ["export_library", "import_library", "install_archive_routes", "ARCHIVE_SCHEMA"]

ARCHIVE_SCHEMA = "takescribe-desk-library/1"
_MEMBER = re.compile(r"^(library\.json|parts/\d+\.(musicxml|mxl|mid)|audio/\d+\.(wav|flac|ogg|mp3|aiff|m4a)"
                     r"|outputs/\d+/(" + "|".join(re.escape(n) for n in OUTPUT_FILES) + r"))$")
MAX_MEMBERS = 200_000   # a school's years of takes; a ZIP with more is not a desk archive


def export_library(lib, target: Path) -> dict:
    """Write the library to the ZIP file ``target``; returns counts per table."""
    with lib.engine.connect() as conn:
        tables = {name: [dict(r._mapping) for r in conn.execute(sa.select(table).order_by(table.c.id))]
                  for name, table in (("pieces", db.pieces), ("students", db.students), ("takes", db.takes))}
    with zipfile.ZipFile(target, "w", compression=zipfile.ZIP_DEFLATED) as archive:
        archive.writestr("library.json", json.dumps(dict(schema=ARCHIVE_SCHEMA, **tables), indent=1))
        for piece in tables["pieces"]:
            archive.write(lib.root / piece["part_file"], piece["part_file"])
        for take in tables["takes"]:
            archive.write(lib.root / take["audio_file"], take["audio_file"], compress_type=zipfile.ZIP_STORED)
            folder = lib.root / "outputs" / str(take["id"])
            if take["status"] == "done" and folder.is_dir():
                for name in OUTPUT_FILES:
                    if (folder / name).is_file():
                        archive.write(folder / name, f"outputs/{take['id']}/{name}")
    return {name: len(rows) for name, rows in tables.items()}


def _check_archive(archive: zipfile.ZipFile, *, limit: int, label: str) -> dict:
    members = archive.infolist()
    if len(members) > MAX_MEMBERS:
        raise InputError(f"{label}: holds {len(members)} files, more than a desk library archive; nothing was added")
    for info in members:
        if not _MEMBER.match(info.filename) or info.is_dir():
            raise InputError(f"{label}: holds {info.filename!r}, which has no place in a desk library (names are"
                             " checked so an archive cannot write outside the library); nothing was added")
    if sum(info.file_size for info in members) > limit:
        raise InputError(f"{label}: would unpack to more than {limit // 2**30} GB; nothing was added")
    try:
        manifest = json.loads(archive.read("library.json"))
    except (KeyError, ValueError) as exc:
        raise InputError(f"{label}: is not a desk library archive (no readable library.json); nothing was added") \
            from exc
    if not isinstance(manifest, dict) or manifest.get("schema") != ARCHIVE_SCHEMA:
        raise InputError(f"{label}: is not a desk library archive (schema {ARCHIVE_SCHEMA} expected)")
    return manifest


def import_library(lib, source: Path, *, label: str) -> dict:
    """Add the students, pieces and takes of archive ``source`` to the library; returns counts.

    Raises
    ------
    InputError
        For a file that is not a desk archive, a member outside the layout, a recording or part
        that fails its content check; nothing is added then.
    """
    try:
        archive = zipfile.ZipFile(source)
    except (zipfile.BadZipFile, OSError) as exc:
        raise InputError(f"{label}: is not a ZIP archive made by the desk ({exc}); nothing was added") from exc
    unpacked = staging_path(lib)
    try:
        with archive:
            manifest = _check_archive(archive, limit=lib.settings.max_archive_bytes, label=label)
            names = set(archive.namelist())
            archive.extractall(unpacked)   # names already checked against the layout
        return _add_all(lib, manifest, unpacked, names, label=label)
    except OSError as exc:
        raise disk_full_error(exc, lib.root) or InputError(f"{label}: cannot be unpacked ({exc})") from exc
    finally:
        shutil.rmtree(unpacked, ignore_errors=True)


def _add_all(lib, manifest: dict, unpacked: Path, names: set, *, label: str) -> dict:
    try:
        pieces, students, takes = (list(manifest[k]) for k in ("pieces", "students", "takes"))
        for piece in pieces:
            if piece["part_file"] not in names:
                raise InputError(f"{label}: the part of {piece['title']!r} is missing")
            check_part_file(unpacked / piece["part_file"], label=f"{label}: {piece['part_file']}",
                            part_name=piece.get("part_name"))
        for take in takes:
            if take["audio_file"] not in names:
                raise InputError(f"{label}: the recording {take['label']!r} is missing")
            check_audio_file(unpacked / take["audio_file"], label=f"{label}: {take['label']}")
    except (KeyError, TypeError) as exc:
        raise InputError(f"{label}: library.json lacks {exc}; nothing was added") from exc
    moved = []
    try:
        with lib.engine.begin() as conn:
            piece_ids, student_ids = {}, {}
            for piece in pieces:
                kind = piece["part_file"].rsplit(".", 1)[1]
                new = conn.execute(db.pieces.insert().values(
                    title=clean_label(piece["title"], what="piece's title"), instrument=str(piece["instrument"]),
                    part_file="", part_name=piece.get("part_name"), created=db.now())).inserted_primary_key[0]
                conn.execute(db.pieces.update().where(db.pieces.c.id == new).values(part_file=f"parts/{new}.{kind}"))
                moved.append(_move(unpacked / piece["part_file"], lib.root / f"parts/{new}.{kind}"))
                piece_ids[piece["id"]] = new
            for student in students:
                student_ids[student["id"]] = conn.execute(db.students.insert().values(
                    name=clean_label(student["name"], what="student's name"), created=db.now())).inserted_primary_key[0]
            for take in takes:
                _add_take(conn, lib, take, unpacked, piece_ids, student_ids, moved)
    except BaseException:
        for path in moved:
            shutil.rmtree(path, ignore_errors=True) if path.is_dir() else path.unlink(missing_ok=True)
        raise
    return {"pieces": len(pieces), "students": len(students), "takes": len(takes)}


def _move(source: Path, target: Path) -> Path:
    os.replace(source, target)
    return target


def _add_take(conn, lib, take, unpacked, piece_ids, student_ids, moved) -> None:
    outputs = unpacked / "outputs" / str(take["id"])
    done = take.get("status") == "done" and (outputs / "findings.json").is_file()
    kind = take["audio_file"].rsplit(".", 1)[1]
    new = conn.execute(db.takes.insert().values(
        student_id=student_ids[take["student_id"]], piece_id=piece_ids[take["piece_id"]], date=str(take["date"])[:10],
        label=clean_label(take["label"]), audio_file="", status="done" if done else "queued",
        created=db.now())).inserted_primary_key[0]
    conn.execute(db.takes.update().where(db.takes.c.id == new).values(audio_file=f"audio/{new}.{kind}"))
    moved.append(_move(unpacked / take["audio_file"], lib.root / f"audio/{new}.{kind}"))
    if done:
        moved.append(_move(outputs, lib.root / "outputs" / str(new)))
    else:
        conn.execute(db.jobs.insert().values(take_id=new, label=clean_label(take["label"]), status="queued",
                                             fraction=0.0, attempt=0, created=db.now()))


def install_archive_routes(app, lib, *, kick) -> None:
    """The backup page, the download of the archive and bringing one in."""
    from flask import redirect, render_template, request, send_file

    from .app import _receive

    @app.get("/library")
    def library_page():
        database = "SQLite in the library folder" if lib.url.startswith("sqlite") else "PostgreSQL"
        return render_template("library.html", root=str(lib.root), database=database,
                               notice=request.args.get("notice"))

    @app.get("/library/export")
    def library_export():
        target = staging_path(lib, ".zip")
        try:
            export_library(lib, target)
        except OSError as exc:
            target.unlink(missing_ok=True)
            raise disk_full_error(exc, lib.root) or InputError(f"the archive could not be written ({exc})") from exc
        response = send_file(target, mimetype="application/zip", as_attachment=True,
                             download_name="takescribe-desk-library.zip")
        response.call_on_close(lambda: target.unlink(missing_ok=True))
        return response

    @app.post("/library/import")
    def library_import():
        storage = request.files.get("archive")
        if storage is None or not storage.filename:
            raise InputError("choose a library file to bring in")
        staged = _receive(lib, storage, limit=lib.settings.max_archive_bytes, what=storage.filename)
        try:
            counts = import_library(lib, staged, label=clean_label(storage.filename))
        finally:
            staged.unlink(missing_ok=True)
        kick()
        return redirect(f"/library?notice=Added {counts['students']} students, {counts['pieces']} pieces and "
                        f"{counts['takes']} takes.")

