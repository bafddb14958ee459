"""Batch jobs: every take of a folder transcribed (and compared with its part) in parallel, resumably.

Method
------
- The takes are the audio files directly inside ``input_dir`` (by suffix, see
  :data:`AUDIO_SUFFIXES`), in name order. A take's part is the file of ``score_dir``
  with the same stem and a score suffix (:data:`SCORE_SUFFIXES`, first match wins).
- Each take gets its own folder ``output_dir/<stem>/`` holding ``draft.mid`` (performed
  timing), ``draft.musicxml`` (the notated draft), ``notes.txt`` (MAPS-style note list) and,
  with a part, the practice report of :func:`takescribe.pipeline.compare_file`
  (:data:`takescribe.pipeline.REPORT_FILES`); the drafts then come from the same
  score-informed transcription as the report, and the MusicXML draft takes the part's bars and values.
- **Instrument**: ``instrument`` (``--instrument``) for every take, else the part's. A take
  with neither is transcribed with the piano's templates, and its result says so
  (:attr:`TakeResult.remark`, printed under the summary table): never silently.
- **All or nothing per take**: a take's folder is written as a staging folder
  beside it and renamed into place when complete (:func:`takescribe.safeio.staged_outputs`),
  so a take folder on disk always holds all its outputs.
- **Resumable**: a take is finished when all its outputs exist; finished takes are
  skipped unless ``force``. A folder with only some outputs (left by an older
  version) fails with a message saying what to do, so nothing is overwritten silently.
- Takes run in a :class:`concurrent.futures.ProcessPoolExecutor` of ``jobs``
  processes (one BLAS thread each), or, with ``scheduler``, on a Dask distributed
  cluster (``dask.distributed.Client(address).map``). A failing take never stops
  the batch: its error is in the summary and the batch's exit code is 1.
- **Interrupted** (SIGINT, SIGTERM): the workers are stopped (Dask futures cancelled),
  unfinished takes leave nothing, and :class:`~takescribe.errors.Interrupted` carries
  how many takes are complete on disk; rerunning the command does exactly the others.
- Paths are made absolute before jobs are sent, so a Dask worker started in any
  working directory reads and writes the same files as a local run.

Conventions
-----------
Seconds in the summary are the wall-clock time of the take's job in its worker.
"""

from __future__ import annotations

import contextlib
import multiprocessing
import os
import sys
import tempfile
import time
import uuid
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import EXIT_BAD_INPUT, EXIT_OK, InputError, Interrupted, TakescribeError
from ..export.noteio import write_maps
from ..interrupts import fault_point, handle_signals, in_worker, init_worker, job_running
from ..jobs.pipeline import REPORT_FILES, compare_into, notate_take, transcribe_into, write_draft_midi
from ..notation import write_musicxml
from ..safeio import STAGING_PREFIX, clear_stale, ensure_folder, scratch_folder, staged_outputs, write_error

__all__ = ["AUDIO_SUFFIXES", "SCORE_SUFFIXES", "TakeJob", "TakeResult", "BatchSummary", "find_takes", "run_batch",
           "process_take", "validate_batch_folders"]

AUDIO_SUFFIXES = (".wav", ".flac", ".ogg", ".oga", ".aif", ".aiff", ".mp3")
SCORE_SUFFIXES = (".musicxml", ".mxl", ".xml", ".mid", ".midi")
DRAFT_FILES = ("draft.mid", "notes.txt", "draft.musicxml")
#: What a take with no instrument from the option or its part is said to be transcribed as.
DEFAULT_INSTRUMENT_REMARK = ("no --instrument and no part naming one: transcribed as piano;"
                             " pass --instrument if it is another instrument")
#: Seconds to wait for a Dask scheduler before saying it cannot be reached.
DASK_CONNECT_SECONDS = 4.0
#: Seconds a stopped worker gets to remove its staging folder before it is killed.
STOP_GRACE_SECONDS = 10.0


@dataclass(frozen=True)
class TakeJob:
    """One take to process.

    Attributes
    ----------
    take : str
        Audio file.
    folder : str
        Output folder of this take.
    part : str or None
        Matching part file, if any.
    instrument : str, int or None
    force : bool
    stop_event : str or None
        Name of the Dask event that asks the job to stop (Dask runs only).
    """

    take: str
    folder: str
    part: str | None = None
    instrument: "str | int | None" = None
    force: bool = False
    stop_event: str | None = None

    @property
    def outputs(self) -> tuple[Path, ...]:
        """Every file this take produces."""
        names = DRAFT_FILES + (REPORT_FILES if self.part else ())
        return tuple(Path(self.folder) / name for name in names)

    def finished(self) -> bool:
        return all(path.exists() for path in self.outputs)


@dataclass(frozen=True)
class TakeResult:
    """What became of one take.

    Attributes
    ----------
    take : str
    status : str
        ``"done"``, ``"skipped"`` (finished in an earlier run), ``"failed"`` or
        ``"stopped"`` (the batch was interrupted; nothing of the take is on disk).
    notes : int or None
        Notes in the draft.
    findings : int or None
        Findings of the comparison (None without a part).
    seconds : float
    error : str or None
    part : str or None
    remark : str or None
        Something the reader must know about a finished take (e.g. the instrument was assumed).
    """

    take: str
    status: str
    notes: int | None = None
    findings: int | None = None
    seconds: float = 0.0
    error: str | None = None
    part: str | None = None
    remark: str | None = None


@dataclass(frozen=True)
class BatchSummary:
    """All takes of a batch, in name order.

    Attributes
    ----------
    results : tuple of TakeResult
    output_dir : str
    seconds : float
        Wall-clock time of the whole batch.
    """

    results: tuple[TakeResult, ...]
    output_dir: str
    seconds: float = 0.0
    counts: dict = field(default_factory=dict)

    @property
    def failed(self) -> tuple[TakeResult, ...]:
        return tuple(r for r in self.results if r.status == "failed")

    @property
    def exit_code(self) -> int:
        """0 when every take is done or skipped, 1 when any failed."""
        return EXIT_BAD_INPUT if self.failed else EXIT_OK

    def table(self) -> str:
        """The summary as a text table (one line per take, then totals and errors)."""
        width = max([len("take")] + [len(Path(r.take).name) for r in self.results])
        lines = [f"{'take':{width}s}  {'status':8s} {'notes':>6s} {'findings':>8s} {'seconds':>8s}"]
        for r in self.results:
            notes = "" if r.notes is None else str(r.notes)
            findings = "" if r.findings is None else str(r.findings)
            lines.append(f"{Path(r.take).name:{width}s}  {r.status:8s} {notes:>6s} {findings:>8s} {r.seconds:8.1f}")
        done = sum(r.status == "done" for r in self.results)
        skipped = sum(r.status == "skipped" for r in self.results)
        stopped = sum(r.status == "stopped" for r in self.results)
        lines.append(f"{len(self.results)} takes: {done} done, {skipped} skipped, {len(self.failed)} failed"
                     + (f", {stopped} stopped" if stopped else "")
                     + f" in {self.seconds:.1f} s; outputs in {self.output_dir}")
        for r in self.failed:
            lines.append(f"failed: {Path(r.take).name}: {r.error}")
        for r in self.results:
            if r.remark:
                lines.append(f"note: {Path(r.take).name}: {r.remark}")
        return "\n".join(lines)


def _prepare_output(output_dir) -> None:
    """Create the results folder and prove it writable, before any take is processed."""
    folder = ensure_folder(output_dir)
    clear_stale(folder, STAGING_PREFIX)
    try:
        probe = tempfile.mkdtemp(prefix=f"{STAGING_PREFIX}{os.getpid()}-", dir=folder)
    except OSError as exc:
        raise write_error(folder, exc) from exc
    os.rmdir(probe)


def validate_batch_folders(input_dir, output_dir, score_dir=None) -> None:
    """Input (and score) folders must exist; the output folder must not be the input folder."""
    for name, folder in (("input folder", input_dir), ("score folder", score_dir)):
        if folder is not None and not Path(folder).is_dir():
            raise InputError(f"{folder}: {name} not found; give an existing folder")
    if Path(output_dir).resolve() == Path(input_dir).resolve():
        raise InputError(f"{output_dir}: the output folder is the input folder; choose another output folder")


def find_takes(input_dir, output_dir, *, score_dir=None, instrument=None, force: bool = False) -> list[TakeJob]:
    """The jobs of a batch: audio files of ``input_dir`` with their part and output folder, as absolute paths."""
    input_dir, output_dir = Path(input_dir).absolute(), Path(output_dir).absolute()
    score_dir = None if score_dir is None else Path(score_dir).absolute()
    takes = sorted(p for p in Path(input_dir).iterdir() if p.is_file() and p.suffix.lower() in AUDIO_SUFFIXES)
    jobs = []
    for take in takes:
        part = None
        if score_dir is not None:
            for suffix in SCORE_SUFFIXES:
                candidate = Path(score_dir) / (take.stem + suffix)
                if candidate.is_file():
                    part = str(candidate)
                    break
        jobs.append(TakeJob(str(take), str(Path(output_dir) / take.stem), part, instrument, force))
    stems = [Path(j.take).stem for j in jobs]
    doubles = sorted({s for s in stems if stems.count(s) > 1})
    if doubles:
        raise InputError(f"{input_dir}: takes {', '.join(doubles)} exist with several suffixes; their outputs would"
                         " collide: keep one file per name")
    return jobs


def _one_blas_thread():
    """One BLAS thread per worker: the workers already keep every core busy."""
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - threadpoolctl comes with scikit-learn
        return contextlib.nullcontext()
    return threadpool_limits(limits=1, user_api="blas")


class _Stopped(Exception):
    """The Dask client asked a running job to stop (a signal in the client)."""


def _stop_check(job: TakeJob):
    """A progress callback that stops the job when the batch's Dask stop event is set."""
    if job.stop_event is None:
        return None
    from distributed import Event

    event = Event(job.stop_event)

    def check(message: str) -> None:
        if event.is_set():
            raise _Stopped(message)

    return check


def _transcribe_and_compare(job: TakeJob) -> tuple[int, int | None, str | None]:
    """The work of one take, all or nothing on disk; returns (notes in the draft, findings or None, remark)."""
    present = [p for p in job.outputs if p.exists()]
    if present and not job.force:
        raise InputError(f"{job.folder}: holds only some of this take's outputs (an interrupted run?); remove"
                         " the folder or pass --force to redo the take")
    progress = _stop_check(job)
    with staged_outputs(force=job.force) as staged:
        folder = staged.folder(job.folder)
        midi_path, notes_path, xml_path = (folder / name for name in DRAFT_FILES)
        if job.part:
            out = compare_into(folder, job.take, job.part, instrument=job.instrument, progress=progress)
            fault_point("between-outputs")
            notation = notate_take(out.transcription, job.take, reference=out.reference, alignment=out.alignment)
            write_draft_midi(midi_path, out.transcription, notation=notation)
            write_maps(out.transcription.notes, notes_path)
            write_musicxml(notation, xml_path)
            assumed = job.instrument is None and getattr(out.reference, "midi_program", None) is None
            return len(out.transcription.notes), len(out.comparison.findings), _remark(assumed)
        staged = {path: path for path in (midi_path, notes_path, xml_path)}
        out = transcribe_into(job.take, staged, midi_path=midi_path, notes_path=notes_path, musicxml_path=xml_path,
                              instrument=job.instrument, progress=progress)
        return len(out.transcription.notes), None, _remark(job.instrument is None)


def _remark(assumed_instrument: bool) -> str | None:
    return DEFAULT_INSTRUMENT_REMARK if assumed_instrument else None


def process_take(job: TakeJob) -> TakeResult:
    """Transcribe (and compare) one take; never raises an error: failures come back as a result.

    A signal (:class:`~takescribe.errors.Interrupted`) removes the take's staging folder on its
    way out; in a pool worker the process then exits, elsewhere the signal goes on to the caller.
    """
    start = time.perf_counter()
    try:
        with scratch_folder(), job_running(), _one_blas_thread():
            notes, findings, remark = _transcribe_and_compare(job)
        return TakeResult(job.take, "done", notes, findings, time.perf_counter() - start, None, job.part, remark)
    except Interrupted as exc:
        if in_worker():
            os._exit(exc.exit_code)
        raise
    except _Stopped:
        return TakeResult(job.take, "stopped", seconds=time.perf_counter() - start, part=job.part)
    except TakescribeError as exc:
        error = str(exc)
    except Exception as exc:  # a bug on one take must not stop the batch
        error = f"internal error ({type(exc).__name__}: {exc})"
    return TakeResult(job.take, "failed", None, None, time.perf_counter() - start, error, job.part)


class _Bar:
    """A one-line progress bar on stderr (a line per take when stderr is not a terminal)."""

    def __init__(self, total: int, enabled: bool) -> None:
        self.total, self.done, self.enabled = total, 0, enabled and total > 0
        self.tty = sys.stderr.isatty()
        self.start = time.perf_counter()

    def step(self, result: TakeResult) -> None:
        self.done += 1
        if not self.enabled:
            return
        width = 30
        filled = int(round(width * self.done / self.total))
        line = (f"[{'#' * filled}{'.' * (width - filled)}] {self.done}/{self.total} takes"
                f" {time.perf_counter() - self.start:6.1f} s  {Path(result.take).name}: {result.status}")
        if self.tty:
            print("\r" + line[:150].ljust(150), end="" if self.done < self.total else "\n", file=sys.stderr, flush=True)
        else:
            print(line, file=sys.stderr, flush=True)


def _warm_up() -> None:
    """Load the analysis code paths once before forking the workers.

    The first spectrogram of a process imports and compiles much of librosa (about
    10 s of a cold start, measured on the 2-core test machine); forked workers then
    inherit it instead of paying it each. The numba functions librosa compiles and
    caches on disk (Viterbi decoding, the beat tracker) are compiled here too: several
    processes compiling them at once can tear librosa's shared on-disk cache (seen as
    a segfault in a worker), so they must be compiled by one process at a time.
    """
    import librosa

    from ..features.spectrogram import compute_spectrogram

    noise = np.random.default_rng(0).standard_normal(22050).astype(np.float32)
    compute_spectrogram(0.1 * noise, 22050)
    envelope = np.abs(noise[::256])
    librosa.beat.beat_track(onset_envelope=envelope, sr=22050, hop_length=256)
    prob = np.full((2, 8), 0.5)
    librosa.sequence.viterbi(prob, np.full((2, 2), 0.5))


def _run_local(jobs: list[TakeJob], workers: int, bar: _Bar) -> dict:
    results = {}
    if workers == 1:
        for job in jobs:
            results[job.take] = process_take(job)
            bar.step(results[job.take])
        return results
    if multiprocessing.get_start_method(allow_none=False) == "fork":
        _warm_up()
    pool = ProcessPoolExecutor(max_workers=workers, initializer=init_worker, initargs=(tempfile.gettempdir(),))
    try:
        futures = {pool.submit(process_take, job): job for job in jobs}
        for future in as_completed(futures):
            job = futures[future]
            try:
                results[job.take] = future.result()
            except Exception as exc:  # the worker process itself died (e.g. out of memory)
                results[job.take] = TakeResult(job.take, "failed", error=f"worker died ({type(exc).__name__}: {exc})",
                                               part=job.part)
            bar.step(results[job.take])
    except BaseException:
        _stop_pool(pool)
        raise
    pool.shutdown(wait=True)
    return results


def _stop_pool(pool: ProcessPoolExecutor) -> None:
    """Stop every worker now: SIGTERM (a worker in a job removes its staging folder), then SIGKILL.

    ``ProcessPoolExecutor`` has no public way to stop running work before Python 3.14, so its
    worker list (``_processes``) is read directly.
    """
    processes = list(getattr(pool, "_processes", {}).values())
    pool.shutdown(wait=False, cancel_futures=True)
    for process in processes:
        with contextlib.suppress(OSError, ValueError):
            process.terminate()
    deadline = time.monotonic() + STOP_GRACE_SECONDS
    for process in processes:
        with contextlib.suppress(OSError, ValueError):
            process.join(max(0.0, deadline - time.monotonic()))
            if process.is_alive():
                process.kill()
                process.join(5.0)


def _dask_client(scheduler):
    """A client of the scheduler at ``scheduler``, or an :class:`InputError` within :data:`DASK_CONNECT_SECONDS`."""
    try:
        from dask.distributed import Client
    except ImportError as exc:
        raise InputError("--scheduler needs Dask's distributed scheduler, which is not installed:"
                         " pip install 'dask[distributed]', or run without --scheduler") from exc
    try:
        return Client(scheduler, timeout=DASK_CONNECT_SECONDS)
    except (OSError, TimeoutError, ValueError) as exc:
        raise InputError(f"cannot reach the Dask scheduler at {scheduler} within {DASK_CONNECT_SECONDS:.0f} s"
                         f" ({type(exc).__name__}); check the address (e.g. tcp://host:8786) and that the scheduler"
                         " runs") from exc


def _run_dask(jobs: list[TakeJob], client, bar: _Bar) -> dict:
    from dask.distributed import Event, as_completed as dask_completed

    results = {}
    stop = Event(f"takescribe-stop-{uuid.uuid4().hex}", client=client)
    jobs = [TakeJob(j.take, j.folder, j.part, j.instrument, j.force, stop.name) for j in jobs]
    futures = []
    try:
        # one worker at a time compiles (or loads) librosa's cached numba code: concurrent
        # compiles on one machine can tear the shared on-disk cache (see _warm_up)
        for address in list(client.scheduler_info().get("workers", {})):
            client.run(_warm_up, workers=[address])
        futures = client.map(process_take, jobs, pure=False)
        by_future = {f.key: job for f, job in zip(futures, jobs)}
        for future in dask_completed(futures):
            job = by_future[future.key]
            try:
                results[job.take] = future.result()
            except Exception as exc:  # the worker was lost
                results[job.take] = TakeResult(job.take, "failed", error=f"Dask worker failed ({type(exc).__name__}:"
                                               f" {exc})", part=job.part)
            bar.step(results[job.take])
    except BaseException:
        # running jobs see the event at their next stage and remove their staging folders
        with contextlib.suppress(Exception):
            stop.set()
            client.cancel(futures)
        raise
    return results


def run_batch(input_dir, output_dir, *, score_dir=None, jobs: int | None = None, scheduler=None,
              force: bool = False, progress: bool = True, instrument=None) -> BatchSummary:
    """Transcribe every take of a folder (and compare it with its part when one is found).

    Parameters
    ----------
    input_dir : path
        Folder of takes (audio files; not searched recursively).
    output_dir : path
        Folder of results, one subfolder per take (created if missing).
    score_dir : path, optional
        Folder of parts; a part matches a take with the same stem.
    jobs : int, optional
        Worker processes (default: the number of CPUs).
    scheduler : str, optional
        Address of a Dask distributed scheduler; the batch then runs on that
        cluster instead of local processes (needs ``dask[distributed]``).
    force : bool
        Redo finished takes, overwriting their outputs.
    progress : bool
        A progress bar on stderr.
    instrument : str or int, optional
        Instrument of every take (default: the part's, else piano, which the take's
        result then states in its ``remark``).

    Returns
    -------
    BatchSummary
        ``exit_code`` is 1 when any take failed.

    Raises
    ------
    InputError
        A missing input folder, or the output folder being the input folder.

    Examples
    --------
    >>> import tempfile
    >>> empty = tempfile.mkdtemp()
    >>> run_batch(empty, os.path.join(empty, "out"), progress=False).results
    ()
    """
    t0 = time.perf_counter()
    validate_batch_folders(input_dir, output_dir, score_dir)
    if jobs is not None and jobs < 1:
        raise InputError(f"jobs must be >= 1, got {jobs}")
    all_jobs = find_takes(input_dir, output_dir, score_dir=score_dir, instrument=instrument, force=force)
    results = {}
    todo = []
    for job in all_jobs:
        if job.finished() and not force:
            results[job.take] = TakeResult(job.take, "skipped", part=job.part)
        else:
            todo.append(job)
    with handle_signals():
        _run_todo(todo, all_jobs, results, output_dir, jobs=jobs, scheduler=scheduler, progress=progress)
    ordered = tuple(results[job.take] for job in all_jobs)
    counts = {status: sum(r.status == status for r in ordered) for status in ("done", "skipped", "failed", "stopped")}
    return BatchSummary(ordered, str(output_dir), time.perf_counter() - t0, counts)


def _run_todo(todo: list[TakeJob], all_jobs: list[TakeJob], results: dict, output_dir, *, jobs, scheduler,
              progress: bool) -> None:
    """Process the takes of ``todo`` into ``results``; an interruption says what is complete on disk."""
    client = _dask_client(scheduler) if scheduler is not None and todo else None
    try:
        _prepare_output(output_dir)
        bar = _Bar(len(todo), progress)
        if client is not None:
            results.update(_run_dask(todo, client, bar))
        elif todo:
            workers = min(jobs or os.cpu_count() or 1, len(todo))
            results.update(_run_local(todo, workers, bar))
    except Interrupted as exc:
        clear_stale(output_dir, STAGING_PREFIX)
        complete = sum(job.finished() for job in all_jobs)
        exc.note = (f"{complete} of {len(all_jobs)} takes have complete outputs in {output_dir} (kept); the others"
                    " left nothing behind; run the same command again to do exactly those")
        raise
    finally:
        if client is not None:
            client.close()
