"""The desk's job queue: takes waiting for analysis, kept in the database, run in other processes.

A job is a row of ``jobs``. The runner in the server claims queued jobs (``status`` becomes
``running``, ``attempt`` goes up by one) and hands each to a worker process on this computer,
or to a Dask cluster. The worker writes everything into ``staging/job-<id>-<attempt>/`` and
then, in one database transaction, renames that folder to ``outputs/<take>/`` and marks the
job and the take done, but only if the job is still its own (same attempt, still running).

Surviving a stop: at start every job left ``running`` goes back to ``queued`` and runs again;
its earlier staging folder is removed, and the outputs folder of a take becomes visible only
with the commit that marks it done, so nothing half-written is ever shown. Worker processes
on this computer die with the server (Linux ``PR_SET_PDEATHSIG``) and, should one outlive it
elsewhere, its late result is thrown away by the attempt check.
"""

from __future__ import annotations

import os
import shutil
import signal
import threading
import time
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import sqlalchemy as sa

from ..errors import AudioError, ScoreError, TakescribeError
from . import db

__all__ = ["JobRunner", "run_job", "recover", "claim_next", "analyse_take", "EXPECTED_STAGES"]

# stage messages a comparison usually sends (reading, aligning, factorizing, comparing,
# report, notation); the bar moves one step per message and waits at 95 % for the end
EXPECTED_STAGES = 7


def recover(engine) -> int:
    """Put jobs left running by a stopped server back in the queue; returns how many."""
    with engine.begin() as conn:
        conn.execute(db.takes.update().where(db.takes.c.status == "running").values(status="queued"))
        return conn.execute(db.jobs.update().where(db.jobs.c.status == "running").values(
            status="queued", stage="waiting to start again (the desk was stopped during this job)",
            fraction=0.0)).rowcount


def claim_next(engine) -> tuple[int, int] | None:
    """Take the oldest queued job for running; returns ``(job_id, attempt)`` or None.

    On PostgreSQL, ``FOR UPDATE SKIP LOCKED`` lets several desks share one queue.
    """
    j = db.jobs
    with engine.begin() as conn:
        row = conn.execute(sa.select(j.c.id, j.c.attempt).where(j.c.status == "queued").order_by(j.c.id)
                           .limit(1).with_for_update(skip_locked=True)).first()
        if row is None:
            return None
        attempt = int(row.attempt) + 1
        changed = conn.execute(j.update().where(j.c.id == row.id).where(j.c.status == "queued").values(
            status="running", attempt=attempt, stage="starting", fraction=0.0)).rowcount
        if changed != 1:
            return None
        conn.execute(db.takes.update().where(db.takes.c.id == sa.select(j.c.take_id).where(j.c.id == row.id)
                                             .scalar_subquery()).values(status="running"))
    return int(row.id), attempt


def analyse_take(take_path: Path, part_path: Path, out: Path, *, part_name=None, instrument=None,
                 progress=None) -> None:
    """The analysis of one take: the practice report of :func:`takescribe.jobs.pipeline.compare_file`
    plus the draft (MIDI and MusicXML) notated from the same transcription, as the demo does."""
    from ..jobs.pipeline import compare_file, write_draft_midi
    from ..notation import notate, write_musicxml

    outputs = compare_file(take_path, part_path, out, part=part_name, instrument=instrument, progress=progress)
    if progress:
        progress("notation of the draft")
    result = outputs.transcription
    notation = notate(result.notes, reference=outputs.reference, alignment=outputs.alignment,
                      instrument_name=result.instrument.gm_name, midi_program=result.instrument.program,
                      measured_offsets=not result.instrument.decaying, title=Path(take_path).stem)
    write_draft_midi(out / "draft.mid", result, notation=notation)
    write_musicxml(notation, out / "draft.musicxml")


def _reporter(engine, job_id: int, attempt: int):
    seen = [0]

    def progress(message: str) -> None:
        seen[0] += 1
        if message.startswith("reading "):   # the stored name (an id) means nothing to the teacher
            message = "reading the recording"
        fraction = min(0.95, seen[0] / EXPECTED_STAGES)
        with engine.begin() as conn:
            conn.execute(db.jobs.update().where(db.jobs.c.id == job_id).where(db.jobs.c.attempt == attempt)
                         .where(db.jobs.c.status == "running").values(stage=str(message)[:300], fraction=fraction))
    return progress


def _load(conn, job_id: int):
    j, t, p = db.jobs, db.takes, db.pieces
    return conn.execute(sa.select(j.c.attempt, j.c.status, t.c.id.label("take_id"), t.c.audio_file, t.c.label,
                                  p.c.part_file,
                                  p.c.part_name, p.c.instrument)
                        .join(t, t.c.id == j.c.take_id).join(p, p.c.id == t.c.piece_id)
                        .where(j.c.id == job_id)).first()


def _finish(engine, root: Path, job_id: int, attempt: int, row, staged: Path | None, error=None) -> str:
    """Make the job's outcome visible in one transaction; returns the job's final status."""
    j, t = db.jobs, db.takes
    mine = (j.c.id == job_id) & (j.c.attempt == attempt) & (j.c.status == "running")
    with engine.begin() as conn:
        if error is None:
            if conn.execute(j.update().where(mine).values(status="done", fraction=1.0, stage="finished",
                                                          finished=db.now())).rowcount != 1:
                return "stale"
            final = root / "outputs" / str(row.take_id)
            if final.exists():   # left by an attempt that never committed: never shown
                shutil.rmtree(final)
            os.replace(staged, final)
            conn.execute(t.update().where(t.c.id == row.take_id).values(status="done", message=None))
            return "done"
        refused = isinstance(error, ScoreError)
        status = "refused" if refused else "failed"
        if conn.execute(j.update().where(mine).values(status=status, message=str(error), stage=None,
                                                      finished=db.now())).rowcount != 1:
            return "stale"
        if refused:   # the take is not this piece: nothing of it is kept
            conn.execute(t.delete().where(t.c.id == row.take_id))
        else:
            conn.execute(t.update().where(t.c.id == row.take_id).values(status="failed", message=str(error)))
    if refused:
        (root / row.audio_file).unlink(missing_ok=True)
    return status


def _describe(exc: BaseException, root: Path) -> BaseException:
    from .library import disk_full_error

    if isinstance(exc, TakescribeError):
        full = disk_full_error(getattr(exc, "__cause__", None) or exc, root)
        return full or exc
    full = disk_full_error(exc, root)
    if full is not None:
        return full
    return RuntimeError(f"internal error during the analysis ({type(exc).__name__}: {exc}); please report it")


def run_job(url: str, root: str, job_id: int, attempt: int) -> str:
    """Run one claimed job (in a worker process or on a Dask worker); returns its final status.

    Parameters
    ----------
    url : str
        The library's database URL.
    root : str
        The library folder (the same path on every machine that runs jobs).
    job_id, attempt : int
        From :func:`claim_next`; the result counts only if the job is still this attempt.
    """
    from threadpoolctl import threadpool_limits

    engine = db.open_engine(url, pool=False)
    root_path = Path(root)
    staging = root_path / "staging" / f"job-{job_id}-{attempt}"
    try:
        with engine.connect() as conn:
            row = _load(conn, job_id)
        if row is None or row.attempt != attempt or row.status != "running":
            return "stale"
        error = None
        try:
            staging.mkdir(parents=True)
            # the report names the recording: under the teacher's name for it, not the stored id
            if not (root_path / row.audio_file).is_file():
                raise AudioError(f"{row.label}: its recording ({row.audio_file}) is missing from the library"
                                 " folder; remove the take and bring it in again")
            named = staging / "take" / (Path(row.label).stem + Path(row.audio_file).suffix)
            named.parent.mkdir()
            try:
                os.link(root_path / row.audio_file, named)
            except OSError:
                shutil.copyfile(root_path / row.audio_file, named)
            with threadpool_limits(1):
                analyse_take(named, root_path / row.part_file, staging / "out",
                             part_name=row.part_name, instrument=row.instrument,
                             progress=_reporter(engine, job_id, attempt))
        except Exception as exc:   # every failure becomes the job's message
            error = _describe(exc, root_path)
        try:
            return _finish(engine, root_path, job_id, attempt, row, staging / "out", error)
        except Exception as exc:   # e.g. the disk filled up while committing
            return _finish(engine, root_path, job_id, attempt, row, None, _describe(exc, root_path))
    finally:
        shutil.rmtree(staging, ignore_errors=True)
        engine.dispose()


def _worker_init(niceness: int) -> None:
    """Worker processes: lower priority, and die with the server (Linux)."""
    for name in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
        os.environ[name] = "1"
    try:
        os.nice(niceness)
    except OSError:
        pass
    try:
        import ctypes

        ctypes.CDLL("libc.so.6", use_errno=True).prctl(1, signal.SIGKILL)   # PR_SET_PDEATHSIG
    except (OSError, AttributeError):
        pass
    _warm_up_in_turn()


def _warm_up_in_turn() -> None:
    """Compile (or load) librosa's cached numba code one worker at a time.

    Workers spawned together compiled it at once into the same on-disk cache, which can tear a
    cache file and crash a worker mid-job (seen as ``BrokenProcessPool`` in the desk's browser
    test); see :func:`takescribe.jobs.batch._warm_up`. A file lock next to the cache orders them.
    """
    import fcntl
    import tempfile

    from ..jobs.batch import _warm_up

    folder = Path(os.environ.get("NUMBA_CACHE_DIR") or tempfile.gettempdir())
    with open(folder / ".takescribe-warm-up.lock", "a") as lock:
        fcntl.flock(lock, fcntl.LOCK_EX)
        try:
            _warm_up()
        finally:
            fcntl.flock(lock, fcntl.LOCK_UN)


class JobRunner:
    """The thread that feeds queued jobs to worker processes or a Dask cluster.

    Parameters
    ----------
    lib : takescribe.desk.library.Library
    workers : int
        Jobs at once (0: one per CPU).
    scheduler : str, optional
        Address of a Dask distributed scheduler (``tcp://host:8786``); its workers must see
        the library folder at the same path and the same database (PostgreSQL).
    """

    def __init__(self, lib, *, workers: int = 0, scheduler: str | None = None) -> None:
        self.lib = lib
        self.slots = workers or os.cpu_count() or 1
        self.scheduler = scheduler
        self.wake = threading.Event()
        self.halt = threading.Event()
        self.running: dict = {}
        self.thread = None
        self.pool = None
        self.client = None

    def start(self) -> int:
        """Re-queue interrupted jobs and start feeding; returns how many were re-queued."""
        again = recover(self.lib.engine)
        if self.scheduler:
            from distributed import Client

            self.client = Client(self.scheduler)
        else:
            import multiprocessing

            self.pool = ProcessPoolExecutor(self.slots, mp_context=multiprocessing.get_context("spawn"),
                                            initializer=_worker_init, initargs=(self.lib.settings.worker_nice,))
        self.thread = threading.Thread(target=self._loop, name="desk-jobs", daemon=True)
        self.thread.start()
        return again

    def kick(self) -> None:
        """Look at the queue now (a job was added)."""
        self.wake.set()

    def stop(self) -> None:
        self.halt.set()
        self.wake.set()
        if self.thread is not None:
            self.thread.join(timeout=5)
        if self.pool is not None:   # running jobs are stopped now and run again at the next start
            from ..jobs.batch import _stop_pool

            _stop_pool(self.pool)
        if self.client is not None:
            self.client.close()

    def _submit(self, job_id: int, attempt: int):
        args = (self.lib.url, str(self.lib.root), job_id, attempt)
        if self.client is not None:
            return self.client.submit(run_job, *args, pure=False, key=f"desk-job-{job_id}-{attempt}")
        return self.pool.submit(run_job, *args)

    def _reap(self) -> None:
        for key, future in list(self.running.items()):
            if not future.done():
                continue
            del self.running[key]
            try:
                future.result()
            except Exception as exc:   # the worker process itself died
                job_id, attempt = key
                with self.lib.engine.begin() as conn:
                    conn.execute(db.jobs.update().where(db.jobs.c.id == job_id).where(db.jobs.c.attempt == attempt)
                                 .where(db.jobs.c.status == "running").values(
                                     status="failed", finished=db.now(),
                                     message=f"the analysis process stopped unexpectedly ({type(exc).__name__})"))
                if self.pool is not None and "Broken" in type(exc).__name__:
                    import multiprocessing

                    self.pool = ProcessPoolExecutor(
                        self.slots, mp_context=multiprocessing.get_context("spawn"),
                        initializer=_worker_init, initargs=(self.lib.settings.worker_nice,))

    def _loop(self) -> None:
        while not self.halt.is_set():
            try:
                self._reap()
                while len(self.running) < self.slots and not self.halt.is_set():
                    claimed = claim_next(self.lib.engine)
                    if claimed is None:
                        break
                    self.running[claimed] = self._submit(*claimed)
            except Exception:   # a locked or unreachable database: try again shortly
                time.sleep(1.0)
            self.wake.wait(0.5)
            self.wake.clear()

    def busy(self) -> int:
        """Jobs handed out and not yet finished."""
        return len(self.running)
