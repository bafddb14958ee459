"""The desk's web layer (Flask): pages and a small JSON API over the library. No analysis here.

Every route works on ids; a file is found from its database row, so nothing the browser
sends becomes a path. Recordings and parts are stored under names the desk chooses.
"""

from __future__ import annotations

import html
import json
from collections import deque
from pathlib import Path

import sqlalchemy as sa
from flask import Flask, Response, jsonify, redirect, render_template, request, send_file
from jinja2 import DictLoader
from werkzeug.exceptions import HTTPException, RequestEntityTooLarge

from ..errors import InputError, OutputError, TakescribeError
from . import db
from .guard import GuardError, install_guard
from .library import (add_piece, add_student, add_take, check_ids, delete_student, disk_full_error, get_row,
                      get_take, list_pieces, list_students, staging_path, student_takes, take_outputs)
from .pages import TEMPLATES

__all__ = ["create_app", "job_words", "DOWNLOADS"]

# file -> (download name suffix, media type)
DOWNLOADS = {
    "draft.mid": ("draft.mid", "audio/midi"),
    "draft.musicxml": ("draft.musicxml", "application/vnd.recordare.musicxml+xml"),
    "annotated.musicxml": ("part-with-findings.musicxml", "application/vnd.recordare.musicxml+xml"),
    "take.mid": ("performed.mid", "audio/midi"),
    "findings.json": ("findings.json", "application/json"),
}
AUDIO_TYPES = {"wav": "audio/wav", "flac": "audio/flac", "ogg": "audio/ogg", "mp3": "audio/mpeg",
               "aiff": "audio/aiff", "m4a": "audio/mp4"}
# the stored report needs no script: it may show its own styles, images and sound, nothing else
REPORT_POLICY = ("default-src 'none'; style-src 'unsafe-inline'; img-src data:; media-src data:;"
                 " sandbox allow-same-origin")


def job_words(job: dict) -> str:
    """What a job row means, in a few words for the page."""
    status = job["status"]
    if status == "queued":
        return job.get("stage") or "waiting for its turn"
    if status == "running":
        return job.get("stage") or "starting"
    if status == "done":
        return "finished"
    if status == "refused":
        return "not kept: " + (job.get("message") or "")
    if status == "stopped":
        return "stopped: " + (job.get("message") or "")
    return "could not finish: " + (job.get("message") or "")


def _jobs(lib, ids=None, *, active=False) -> list[dict]:
    j = db.jobs
    query = sa.select(j).order_by(j.c.id)
    if ids is not None:
        query = query.where(j.c.id.in_(ids))
    if active:
        query = query.where(j.c.status.in_(("queued", "running")))
    with lib.engine.connect() as conn:
        rows = [dict(r._mapping) for r in conn.execute(query)]
    for row in rows:
        row["words"] = job_words(row)
    return rows


def _latest_jobs(lib, take_ids) -> dict:
    if not take_ids:
        return {}
    return {row["take_id"]: row for row in _jobs(lib) if row["take_id"] in set(take_ids)}


def _message(heading: str, text: str, *, status: int = 200, kind: str = "note", back: str | None = None):
    return render_template("message.html", heading=heading, text=text, kind=kind, back=back), status


def _wants_json() -> bool:
    return request.path.startswith("/api/")


def _refusal(status: int, text: str):
    if _wants_json():
        return jsonify({"error": text}), status
    page = (f"<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\"><title>Refused</title></head>"
            f"<body><h1>Refused</h1><p id=\"message\">{html.escape(text)}</p></body></html>")
    return Response(page, status=status, mimetype="text/html")


def _receive(lib, storage, *, limit: int, what: str) -> Path:
    """Copy an uploaded file into ``staging/`` (the browser's name is not used)."""
    target = staging_path(lib)
    size = 0
    try:
        with open(target, "wb") as out:
            while True:
                chunk = storage.stream.read(1 << 20)
                if not chunk:
                    break
                size += len(chunk)
                if size > limit:
                    raise RequestEntityTooLarge()
                out.write(chunk)
    except BaseException as exc:
        target.unlink(missing_ok=True)
        full = disk_full_error(exc, lib.root)
        if full is not None:
            raise full from exc
        raise
    if size == 0:
        target.unlink(missing_ok=True)
        raise InputError(f"{what}: the file is empty (0 bytes); nothing was stored")
    return target


def create_app(lib, *, key: str, port_of, runner=None, watch: str | None = None) -> Flask:
    """The Flask application of the desk over library ``lib``.

    Parameters
    ----------
    lib : takescribe.desk.library.Library
    key : str
        The session key (see :mod:`takescribe.desk.guard`).
    port_of : callable
        Returns the port the server listens on.
    runner : takescribe.desk.queue.JobRunner, optional
        Told when a job is added.
    watch : str, optional
        The watched folder, shown on the page.
    """
    app = Flask("takescribe.desk")
    app.jinja_loader = DictLoader(TEMPLATES)
    app.config["MAX_CONTENT_LENGTH"] = max(lib.settings.max_upload_bytes, lib.settings.max_archive_bytes,
                                           lib.settings.max_part_bytes) + (1 << 20)
    app.config["MAX_FORM_MEMORY_SIZE"] = 1 << 20
    app.extensions["desk.notices"] = deque(maxlen=20)

    @app.before_request
    def _limit():
        # a body larger than the route can use is refused before it is read
        if request.path == "/library/import":
            request.max_content_length = lib.settings.max_archive_bytes + (1 << 20)
        elif request.path == "/pieces":
            request.max_content_length = lib.settings.max_part_bytes + (1 << 20)
        else:
            request.max_content_length = lib.settings.max_upload_bytes + (1 << 20)

    install_guard(app, key=key, port_of=port_of)
    kick = runner.kick if runner is not None else (lambda: None)

    _handlers(app, lib)
    _student_routes(app, lib)
    _intake_routes(app, lib, kick=kick, watch=watch)
    _take_routes(app, lib, kick=kick)
    _over_time_routes(app, lib)
    from .archive import install_archive_routes

    install_archive_routes(app, lib, kick=kick)
    return app


def _over_time_data(lib, sid: int, pid: int):
    from .progress import load_findings, summarize_progress

    student, piece = get_row(lib, db.students, sid), get_row(lib, db.pieces, pid)
    if student is None or piece is None:
        return None, None, None
    takes = []
    for row in student_takes(lib, sid, pid):
        folder = take_outputs(lib, row)
        if folder is not None:
            takes.append(load_findings(folder / "findings.json", label=row["label"], date=row["date"],
                                       href=f"/takes/{row['id']}"))
    return student, piece, summarize_progress(takes)


def _over_time_routes(app, lib) -> None:
    from .progress import progress_html, progress_json

    @app.get("/students/<int:sid>/pieces/<int:pid>/over-time")
    def over_time(sid: int, pid: int):
        student, piece, progress = _over_time_data(lib, sid, pid)
        if progress is None:
            return _message("Not here", "no such student or piece in this library", status=404)
        return render_template("over_time.html", student=student, piece=piece, n=len(progress.takes),
                               content=progress_html(progress))

    @app.get("/students/<int:sid>/pieces/<int:pid>/over-time.json")
    def over_time_json(sid: int, pid: int):
        student, piece, progress = _over_time_data(lib, sid, pid)
        if progress is None:
            return jsonify({"error": "no such student or piece in this library"}), 404
        return jsonify(dict(progress_json(progress), student=student["name"], piece=piece["title"]))


def _handlers(app, lib) -> None:
    """Refusals and errors as pages (or JSON for /api/)."""

    @app.errorhandler(GuardError)
    def _guard_error(exc):
        return _refusal(exc.status, str(exc))

    @app.errorhandler(TakescribeError)
    def _bad_input(exc):
        status = 507 if isinstance(exc, OutputError) and "full" in str(exc) else 400
        if _wants_json():
            return jsonify({"error": str(exc)}), status
        return _message("Not done", str(exc), status=status, kind="problem", back=request.referrer)

    @app.errorhandler(RequestEntityTooLarge)
    def _too_large(exc):
        limit = lib.settings.max_upload_bytes / 2**20
        return _refusal(413, f"the file is larger than the desk accepts ({limit:g} MB for a recording); nothing was"
                             " stored. Trim the recording or export it compressed (FLAC, OGG)")

    @app.errorhandler(HTTPException)
    def _http(exc):
        return _refusal(exc.code or 500, f"{exc.name}: {exc.description}")


def _student_routes(app, lib) -> None:
    """Students and pieces."""

    @app.get("/")
    def home():
        return redirect("/students")

    @app.get("/students")
    def students():
        return render_template("students.html", students=list_students(lib), jobs=_jobs(lib, active=True),
                               notice=request.args.get("notice"))

    @app.post("/students")
    def students_add():
        ident = add_student(lib, request.form.get("name", ""))
        return redirect(f"/students/{ident}")

    @app.get("/students/<int:sid>")
    def student(sid: int):
        row = get_row(lib, db.students, sid)
        if row is None:
            return _message("Not here", f"student {sid} is not in this library", status=404, back="/students")
        takes = student_takes(lib, sid)
        jobs = _latest_jobs(lib, [t["id"] for t in takes])
        groups = {}
        for take in takes:
            take["job"] = jobs.get(take["id"])
            group = groups.setdefault(take["piece_id"], {"id": take["piece_id"], "title": take["piece"],
                                                         "instrument": take["instrument"], "takes": [], "done": 0})
            group["takes"].append(take)
            group["done"] += take["status"] == "done"
        return render_template("student.html", student=row, pieces=list(groups.values()))

    @app.post("/students/<int:sid>/delete")
    def student_delete(sid: int):
        gone = delete_student(lib, sid)
        text = (f"Removed {gone.name}: {gone.takes} take{'s' if gone.takes != 1 else ''}, {gone.files} file"
                f"{'s' if gone.files != 1 else ''} (recordings, reports, drafts) and every database row about them"
                + (f"; {gone.jobs_stopped} analysis stopped" if gone.jobs_stopped else "") + ".")
        return _message("Removed", text, kind="done-msg", back="/students")

    @app.get("/pieces")
    def pieces():
        return render_template("pieces.html", pieces=list_pieces(lib))

    @app.post("/pieces")
    def pieces_add():
        storage = request.files.get("part")
        if storage is None or not storage.filename:
            raise InputError("choose the part file (MusicXML, .mxl or MIDI)")
        staged = _receive(lib, storage, limit=lib.settings.max_part_bytes, what=storage.filename)
        try:
            add_piece(lib, title=request.form.get("title", ""), instrument=request.form.get("instrument", "piano"),
                      part_file=staged, part_label=storage.filename,
                      part_name=request.form.get("part_name", "").strip() or None)
        finally:
            staged.unlink(missing_ok=True)
        return redirect("/pieces")


def _intake_routes(app, lib, *, kick, watch) -> None:
    """Bringing recordings in; job states."""

    @app.get("/bring-in")
    def bring_in():
        return render_template(
            "bring_in.html", students=[{"id": s["id"], "name": s["name"]} for s in list_students(lib)],
            pieces=[{"id": p["id"], "name": p["title"]} for p in list_pieces(lib)], watch=watch,
            notices=list(app.extensions["desk.notices"]))

    @app.get("/api/guess")
    def guess():
        from .intake import guess_from_name

        return jsonify(guess_from_name(request.args.get("name", ""),
                                       [(s["id"], s["name"]) for s in list_students(lib)],
                                       [(p["id"], p["title"]) for p in list_pieces(lib)]))

    @app.post("/api/takes")
    def takes_add():
        from .intake import clean_label

        storage = request.files.get("file")
        if storage is None:
            raise InputError("no recording was sent")
        label = clean_label(request.form.get("label") or storage.filename or "")
        student_id, piece_id = check_ids(("student", request.form.get("student_id")),
                                         ("piece", request.form.get("piece_id")))
        staged = _receive(lib, storage, limit=lib.settings.max_upload_bytes, what=label)
        try:
            made = add_take(lib, student_id=student_id, piece_id=piece_id, date=request.form.get("date", ""),
                            label=label, audio_file=staged)
        except Exception as exc:
            staged.unlink(missing_ok=True)
            full = disk_full_error(exc, lib.root)
            if full is not None:
                raise full from exc
            raise
        kick()
        return jsonify(made), 201

    @app.get("/api/jobs")
    def jobs():
        try:
            ids = [int(x) for x in request.args.get("ids", "").split(",") if x.strip()]
        except ValueError:
            raise InputError("ids: give job numbers separated by commas") from None
        rows = _jobs(lib, ids or None)
        return jsonify({"jobs": {str(r["id"]): {"status": r["status"], "fraction": r["fraction"],
                                                 "words": r["words"], "take": r["take_id"]} for r in rows}})


def _take_routes(app, lib, *, kick) -> None:
    """A take: its page, report, downloads, recording; analysing it again."""

    @app.get("/takes/<int:tid>")
    def take(tid: int):
        row = get_take(lib, tid)
        folder = take_outputs(lib, row)
        if folder is None:
            return _message("Not ready", f"take {tid} has no finished analysis (yet)", status=404,
                            back=f"/students/{row['student_id']}" if row else "/students")
        findings = json.loads((folder / "findings.json").read_text(encoding="utf-8")).get("findings", [])
        return render_template("take.html", take=row, findings=[f for f in findings if f.get("linked_to") is None])

    @app.post("/takes/<int:tid>/again")
    def take_again(tid: int):
        row = get_take(lib, tid)
        if row is None or row["status"] != "failed":
            raise InputError(f"take {tid}: only a take whose analysis could not finish is analysed again")
        with lib.engine.begin() as conn:
            conn.execute(db.takes.update().where(db.takes.c.id == tid).values(status="queued", message=None))
            conn.execute(db.jobs.insert().values(take_id=tid, label=row["label"], status="queued", fraction=0.0,
                                                 attempt=0, created=db.now()))
        kick()
        return redirect(f"/students/{row['student_id']}")

    @app.get("/takes/<int:tid>/report")
    def report(tid: int):
        folder = take_outputs(lib, get_take(lib, tid))
        if folder is None:
            return _message("Not ready", f"take {tid} has no report (yet)", status=404)
        response = send_file(folder / "report.html", mimetype="text/html")
        response.headers["Content-Security-Policy"] = REPORT_POLICY
        return response

    @app.get("/takes/<int:tid>/file/<name>")
    def download(tid: int, name: str):
        row = get_take(lib, tid)
        folder = take_outputs(lib, row)
        if folder is None or name not in DOWNLOADS:
            return _message("Not here", f"take {tid} has no file {name!r}", status=404)
        suffix, mimetype = DOWNLOADS[name]
        stem = "".join(ch if ch.isalnum() else "-" for ch in f"{row['student']} {row['piece']} {row['date']}")
        return send_file(folder / name, mimetype=mimetype, as_attachment=True, download_name=f"{stem}-{suffix}")

    @app.get("/takes/<int:tid>/audio")
    def audio(tid: int):
        row = get_take(lib, tid)
        if row is None:
            return _message("Not here", f"take {tid} is not in this library", status=404)
        path = lib.root / row["audio_file"]
        return send_file(path, mimetype=AUDIO_TYPES.get(path.suffix.lstrip("."), "application/octet-stream"),
                         conditional=True)
