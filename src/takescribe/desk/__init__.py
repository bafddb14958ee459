"""The teacher's desk: a local web app over a library of pieces, students and their takes.

``takescribe desk`` opens it in the browser. Everything stays on this computer: the server
binds 127.0.0.1 only, every request carries a random session key, and every change must
come from the desk's own pages (see :mod:`takescribe.desk.guard`).

Modules: :mod:`~takescribe.desk.db` (tables, migrations), :mod:`~takescribe.desk.library`
(the folder and its rows), :mod:`~takescribe.desk.intake` (content checks, name guesses),
:mod:`~takescribe.desk.queue` (the persistent job queue), :mod:`~takescribe.desk.progress`
(progress across takes), :mod:`~takescribe.desk.archive` (backup), :mod:`~takescribe.desk.app`
and :mod:`~takescribe.desk.pages` (the web layer).
"""

from __future__ import annotations

import datetime as _dt
import shutil
import threading
from dataclasses import dataclass
from pathlib import Path

from ..errors import InputError, OutputError

__all__ = ["DeskServer", "start_desk", "DEFAULT_LIBRARY", "DEFAULT_PORT"]

DEFAULT_LIBRARY = "~/takescribe-library"
DEFAULT_PORT = 8765


@dataclass(frozen=True)
class DeskServer:
    """A running desk: its address with the session key, and what to stop."""

    url: str
    port: int
    key: str
    library: object
    runner: object
    server: object
    thread: object
    watcher: object = None

    def stop(self) -> None:
        """Stop serving, the job feeder and the watcher (running jobs are re-run at the next start)."""
        if self.watcher is not None:
            self.watcher.set()
        self.server.shutdown()
        self.runner.stop()
        self.library.engine.dispose()


def start_desk(library, *, port: int = DEFAULT_PORT, url: str | None = None, scheduler: str | None = None,
               workers: int | None = None, watch=None, seed: bool = True, settings=None) -> DeskServer:
    """Open the library, start the job queue and serve the desk on 127.0.0.1 in a thread.

    Parameters
    ----------
    library : path-like
        The library folder (created when missing).
    port : int
        0 picks a free port.
    url : str, optional
        Database URL (default: SQLite in the library folder).
    scheduler : str, optional
        Dask scheduler address for the jobs.
    workers : int, optional
        Jobs at once on this computer (default: the settings', one per CPU).
    watch : path-like, optional
        A folder whose new recordings are added when their name tells student and piece.
    seed : bool
        Put the demo's students in a new, empty library.

    Raises
    ------
    OutputError
        When the port is taken or the folder cannot hold a library.
    """
    from werkzeug.serving import make_server

    from .app import create_app
    from .guard import new_key
    from .library import DeskSettings, open_library, seed_demo
    from .queue import JobRunner

    import logging

    logging.getLogger("werkzeug").setLevel(logging.WARNING)   # no line per request in the terminal
    settings = settings or DeskSettings()
    lib = open_library(library, url=url, settings=settings)
    if seed:
        seed_demo(lib, date=_dt.date.today().isoformat())
    runner = JobRunner(lib, workers=settings.workers if workers is None else workers, scheduler=scheduler)
    key = new_key()
    bound = {}
    watch_path = str(Path(watch).expanduser().resolve()) if watch else None
    app = create_app(lib, key=key, port_of=lambda: bound["port"], runner=runner, watch=watch_path)
    try:
        server = make_server("127.0.0.1", port, app, threaded=True)
    except OSError as exc:
        lib.engine.dispose()
        raise OutputError(f"port {port} on 127.0.0.1: cannot listen there ({exc.strerror}); is another desk open?"
                          " choose another with --port") from exc
    bound["port"] = server.server_port
    runner.start()
    thread = threading.Thread(target=server.serve_forever, name="desk-http", daemon=True)
    thread.start()
    stop_watch = None
    if watch_path:
        stop_watch = _start_watcher(lib, Path(watch_path), runner, app.extensions["desk.notices"])
    return DeskServer(url=f"http://127.0.0.1:{server.server_port}/?key={key}", port=server.server_port, key=key,
                      library=lib, runner=runner, server=server, thread=thread, watcher=stop_watch)


def _start_watcher(lib, folder: Path, runner, notices) -> threading.Event:
    """Every few seconds, add new recordings of ``folder`` whose name tells student and piece."""
    if not folder.is_dir():
        raise InputError(f"{folder}: the folder to watch does not exist")
    halt = threading.Event()

    def loop():
        sizes = {}
        while not halt.wait(lib.settings.watch_seconds):
            try:
                _watch_once(lib, folder, sizes, notices, runner)
            except Exception as exc:   # keep watching; say what went wrong on the page
                notices.append(f"watching {folder}: {exc}")

    threading.Thread(target=loop, name="desk-watch", daemon=True).start()
    return halt


def _watch_once(lib, folder: Path, sizes: dict, notices, runner) -> None:
    import sqlalchemy as sa

    from . import db
    from .intake import AUDIO_SUFFIXES, guess_from_name
    from .library import add_take, list_pieces, list_students, staging_path

    for path in sorted(folder.iterdir()):
        if not path.is_file() or path.suffix.lower() not in AUDIO_SUFFIXES:
            continue
        stat = path.stat()
        key = f"{path.name}|{stat.st_size}|{stat.st_mtime_ns}"
        if sizes.get(path.name) != stat.st_size:   # still being copied in: look again next time
            sizes[path.name] = stat.st_size
            continue
        with lib.engine.begin() as conn:
            if conn.execute(sa.select(db.seen_files.c.key).where(db.seen_files.c.key == key)).first():
                continue
            conn.execute(db.seen_files.insert().values(key=key, created=db.now()))
        guess = guess_from_name(path.name, [(s["id"], s["name"]) for s in list_students(lib)],
                                [(p["id"], p["title"]) for p in list_pieces(lib)])
        if guess["student_id"] is None or guess["piece_id"] is None:
            notices.append(f"{path.name}: its name does not tell whose take or which piece; add it by hand")
            continue
        staged = staging_path(lib)
        shutil.copyfile(path, staged)
        try:
            add_take(lib, student_id=guess["student_id"], piece_id=guess["piece_id"],
                     date=guess["date"] or _dt.date.fromtimestamp(stat.st_mtime).isoformat(), label=path.name,
                     audio_file=staged)
        except Exception as exc:
            staged.unlink(missing_ok=True)
            notices.append(f"{path.name}: {exc}")
            continue
        runner.kick()
