"""Signals: SIGINT and SIGTERM stop a run cleanly; and the fault hook of the tests.

Conventions
-----------
- In the main process (:func:`handle_signals`), SIGINT and SIGTERM raise
  :class:`~takescribe.errors.Interrupted` in the main thread. The exception unwinds every
  ``with`` block on its way out, so staging folders (:mod:`takescribe.safeio`) and temporary
  data are removed; the command line then exits ``128 + signal number`` (130, 143), the
  shell's convention for a process ended by a signal (POSIX ``sh``, "Exit Status";
  common practice for 130 and 143).
- After the first signal both are ignored until the run ends, so a second Ctrl-C cannot
  break the cleanup half-way.
- In a pool worker (:func:`init_worker`), a signal during a job raises the same
  exception (the job removes its staging folder, then the worker exits); a signal while
  the worker waits for work ends it at once (it holds nothing to clean).
- :func:`fault_point` is a test hook and nothing else: with ``TAKESCRIBE_TEST_FAULT`` set to
  ``<point>:<SIGNAL>`` (e.g. ``factorizing:SIGTERM``), the named point sends that signal to
  the process that started the run (SIGINT to its whole process group, as a terminal's
  Ctrl-C does). Without the variable it does nothing.
"""

from __future__ import annotations

import contextlib
import os
import signal
import tempfile
import threading
from typing import Iterator

from .errors import Interrupted

__all__ = ["handle_signals", "init_worker", "job_running", "in_worker", "fault_point", "arm_faults",
           "FAULT_ENV", "FAULT_PID_ENV", "FAULT_POINTS", "signal_name"]

FAULT_ENV = "TAKESCRIBE_TEST_FAULT"
FAULT_PID_ENV = "TAKESCRIBE_TEST_FAULT_PID"
#: The points a test may pick: reading the take, factorizing it, between two output files.
FAULT_POINTS = ("reading", "factorizing", "between-outputs")
_SIGNALS = (signal.SIGINT, signal.SIGTERM)

_state = {"worker": False, "in_job": False}


def signal_name(signum: int) -> str:
    """``"SIGTERM"`` for 15, and so on."""
    try:
        return signal.Signals(signum).name
    except ValueError:
        return f"signal {signum}"


def _ignore(signum, frame) -> None:
    """A second signal during the cleanup: noted, nothing else (SIG_IGN would race with a pending one)."""


def _raise_interrupted(signum, frame) -> None:
    for sig in _SIGNALS:
        signal.signal(sig, _ignore)
    raise Interrupted(signum)


@contextlib.contextmanager
def handle_signals() -> Iterator[None]:
    """SIGINT and SIGTERM raise :class:`Interrupted` inside the block (main thread only).

    Outside the main thread (where Python cannot set handlers) the block runs unchanged.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = {sig: signal.getsignal(sig) for sig in _SIGNALS}
    for sig in _SIGNALS:
        signal.signal(sig, _raise_interrupted)
    try:
        yield
    finally:
        for sig, handler in previous.items():
            signal.signal(sig, handler if handler is not None else signal.SIG_DFL)


def _worker_signal(signum, frame) -> None:
    if _state["in_job"]:
        _raise_interrupted(signum, frame)
    os._exit(128 + signum)


def init_worker(scratch: str | None = None) -> None:
    """Initializer of a pool worker: signal handling, and the run's private temporary folder."""
    _state["worker"] = True
    for sig in _SIGNALS:
        signal.signal(sig, _worker_signal)
    if scratch is not None:
        tempfile.tempdir = scratch


def in_worker() -> bool:
    """True inside a pool worker set up by :func:`init_worker`."""
    return _state["worker"]


@contextlib.contextmanager
def job_running() -> Iterator[None]:
    """Mark a job as running in this worker (a signal then unwinds it instead of exiting)."""
    _state["in_job"] = True
    try:
        yield
    finally:
        _state["in_job"] = False


def arm_faults() -> None:
    """Remember the process that started the run as the fault hook's target (tests only)."""
    if os.environ.get(FAULT_ENV) and FAULT_PID_ENV not in os.environ:
        os.environ[FAULT_PID_ENV] = str(os.getpid())


def fault_point(name: str) -> None:
    """Send the signal a test asked for when the run reaches point ``name`` (see the module notes)."""
    spec = os.environ.get(FAULT_ENV)
    if not spec:
        return
    point, _, signame = spec.partition(":")
    if point != name:
        return
    sig = getattr(signal, signame, None)
    if not isinstance(sig, signal.Signals):
        raise ValueError(f"{FAULT_ENV}={spec!r}: unknown signal {signame!r}")
    target = int(os.environ.get(FAULT_PID_ENV, os.getpid()))
    if sig == signal.SIGINT:
        os.killpg(os.getpgid(target), sig)
    else:
        os.kill(target, sig)
