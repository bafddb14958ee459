"""Safe output: never clobber a user's file, never leave a partial one.

Every writer in takescribe goes through :func:`atomic_write`: the content is
written to a temporary file in the destination folder and renamed into place
(``os.replace`` is atomic on POSIX and Windows for files on one volume), so an
interruption leaves either the old file or the complete new one.

A job writes several files (a take's draft, note list and notation; a report
folder). :class:`StagedOutputs` makes the job all or nothing: every output is
written into a private staging folder next to its target, and moved into place
only when all are complete, with one rename per folder (see its Notes). Any
exception or signal removes the staging folder, so nothing else changes.

Temporary data of a run lives in one private folder (:func:`scratch_folder`,
mode 0700), removed on exit, on error and on signals; folders left by a run that
was killed outright (SIGKILL, power loss) are removed by the next run.
"""

from __future__ import annotations

import contextlib
import errno
import os
import re
import shutil
import tempfile
import threading
from pathlib import Path
from typing import Iterator

from .errors import OutputError

__all__ = ["atomic_write", "check_writable", "ensure_folder", "StagedOutputs", "staged_outputs", "scratch_folder",
           "clear_stale", "committed_outputs", "STAGING_PREFIX", "SCRATCH_PREFIX", "write_error"]

#: Name prefix of staging folders (hidden), followed by the writing process id.
STAGING_PREFIX = ".takescribe-staging-"
#: Name prefix of a run's temporary folder in the system's temporary folder, followed by its process id.
SCRATCH_PREFIX = "takescribe-run-"
# errors of the file system itself, as opposed to a bug: they become OutputError (exit 4)
_WRITE_ERRNOS = {errno.ENOSPC, errno.EDQUOT, errno.EROFS, errno.EACCES, errno.EPERM, errno.EIO, errno.EFBIG,
                 errno.ENOTDIR}
_committed: list[Path] = []
_active_scratch: dict[int, list] = {}
_scratch_lock = threading.Lock()


def write_error(path, exc: OSError) -> OutputError:
    """The :class:`OutputError` for an :class:`OSError` met while writing ``path``."""
    what = exc.strerror or type(exc).__name__
    path = re.sub(re.escape(os.sep + STAGING_PREFIX) + r"\d+-[^" + re.escape(os.sep) + "]+", "", str(path))  # the final name
    if exc.errno in (errno.ENOSPC, errno.EDQUOT):
        return OutputError(f"{path}: cannot be written: {what} (the disk is full); free some space and run again")
    return OutputError(f"{path}: cannot be written ({what}); choose a writable output place")


def ensure_folder(path: str | os.PathLike) -> Path:
    """Create ``path`` (and parents) as a folder if missing; refuse if it is a file."""
    path = Path(path)
    if path.exists() and not path.is_dir():
        raise OutputError(f"{path}: exists and is not a folder; choose another output folder")
    try:
        path.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"{path}: cannot create folder ({exc.strerror}); choose a writable place") from exc
    return path


def check_writable(path: str | os.PathLike, *, force: bool = False) -> Path:
    """Refuse an existing destination unless ``force``; return the path."""
    path = Path(path)
    if path.is_dir():
        raise OutputError(f"{path}: is a folder; give a file name for this output")
    if path.exists() and not force:
        raise OutputError(f"{path}: already exists; pass --force to overwrite it or choose another name")
    return path


@contextlib.contextmanager
def atomic_write(path: str | os.PathLike, *, force: bool = False, mode: str = "wb") -> Iterator:
    """Open a temporary sibling of ``path`` for writing and rename it into place on success.

    Parameters
    ----------
    path : path-like
        Final destination. Missing parent folders are created.
    force : bool
        Allow replacing an existing file.
    mode : {"wb", "w"}
        Binary or text (UTF-8) mode.

    Raises
    ------
    OutputError
        If the destination exists and ``force`` is false, or cannot be written.
    """
    if mode not in ("wb", "w"):
        raise ValueError(f"mode must be 'wb' or 'w', got {mode!r}")
    path = check_writable(path, force=force)
    ensure_folder(path.parent if str(path.parent) else Path("."))
    try:
        fd, tmp_name = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".partial", dir=path.parent)
    except OSError as exc:
        raise OutputError(f"{path}: cannot write in {path.parent} ({exc.strerror})") from exc
    tmp = Path(tmp_name)
    try:
        try:
            with os.fdopen(fd, mode, **({"encoding": "utf-8", "newline": ""} if mode == "w" else {})) as fh:
                yield fh
                fh.flush()
                os.fsync(fh.fileno())
        except OSError as exc:
            if isinstance(exc, OutputError) or exc.errno not in _WRITE_ERRNOS:
                raise
            raise write_error(path, exc) from exc
        if path.exists() and not force:
            raise OutputError(f"{path}: appeared while writing; pass --force to overwrite it")
        # mkstemp creates the file readable by its owner only; give it the usual permissions
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            tmp.unlink()
        raise


def write_bytes(path: str | os.PathLike, data: bytes, *, force: bool = False) -> Path:
    """Write ``data`` to ``path`` atomically (see :func:`atomic_write`)."""
    with atomic_write(path, force=force, mode="wb") as fh:
        fh.write(data)
    return Path(path)


def write_text(path: str | os.PathLike, text: str, *, force: bool = False) -> Path:
    """Write ``text`` (UTF-8) to ``path`` atomically (see :func:`atomic_write`)."""
    with atomic_write(path, force=force, mode="w") as fh:
        fh.write(text)
    return Path(path)


__all__ += ["write_bytes", "write_text"]


# ----------------------------------------------------------------------------- stale folders


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # another user's process
        return True
    return True


def clear_stale(folder: str | os.PathLike, prefix: str) -> list[Path]:
    """Remove ``prefix<pid>-*`` folders of ``folder`` whose process no longer runs; return them.

    Only folders owned by this user are touched, and only when their process id is not alive
    (a live process, ours or another's, keeps its folder).
    """
    removed = []
    pattern = re.compile(re.escape(prefix) + r"(\d+)-")
    try:
        entries = list(Path(folder).iterdir())
    except OSError:
        return removed
    for entry in entries:
        match = pattern.match(entry.name)
        if not match or int(match.group(1)) == os.getpid():
            continue
        with contextlib.suppress(OSError):
            if entry.is_dir() and not entry.is_symlink() and entry.stat().st_uid == os.getuid() \
                    and not _pid_alive(int(match.group(1))):
                shutil.rmtree(entry, ignore_errors=True)
                removed.append(entry)
    return removed


# ----------------------------------------------------------------------------- temporary data


@contextlib.contextmanager
def scratch_folder() -> Iterator[Path]:
    """The run's private temporary folder (mode 0700): every ``tempfile`` of the process goes inside.

    While the block runs, :data:`tempfile.tempdir` points at the folder, so the spilled take,
    spectrogram blocks and report re-encodings of every stage land there; the folder and all
    it holds are removed when the last block of the process ends, however it ends. Folders
    of earlier runs that were killed outright are removed first (:func:`clear_stale`).
    Nested or concurrent blocks of one process (threads of a Dask worker) share one folder.
    """
    key = os.getpid()
    with _scratch_lock:
        if key not in _active_scratch:
            base = Path(tempfile.gettempdir())
            clear_stale(base, SCRATCH_PREFIX)
            folder = Path(tempfile.mkdtemp(prefix=f"{SCRATCH_PREFIX}{key}-", dir=base))  # mkdtemp: mode 0700
            _active_scratch[key] = [folder, tempfile.tempdir, 0]
            tempfile.tempdir = str(folder)
        entry = _active_scratch[key]
        entry[2] += 1
    try:
        yield entry[0]
    finally:
        with _scratch_lock:
            entry[2] -= 1
            if entry[2] == 0:
                _active_scratch.pop(key, None)
                tempfile.tempdir = entry[1]
                shutil.rmtree(entry[0], ignore_errors=True)


# ----------------------------------------------------------------------------- all-or-nothing jobs


def committed_outputs() -> list[Path]:
    """Every output moved into place by a :class:`StagedOutputs` of this process, in order."""
    return list(_committed)


def _final_mode(is_dir: bool) -> int:
    umask = os.umask(0)
    os.umask(umask)
    return (0o777 if is_dir else 0o666) & ~umask


class StagedOutputs:
    """The outputs of one job, staged privately and moved into place together.

    Use through :func:`staged_outputs`. :meth:`file` and :meth:`folder` return the staging
    path to write instead of the final one; the staging folder is created at once, next to
    the target, which also proves the place writable before any analysis starts.

    Notes
    -----
    - Each output's *entry* is its first missing path component below the nearest existing
      folder (the file itself, or the new folder that holds it); entries are moved into place
      with one ``rename`` each, so a new report folder appears in one rename, complete.
    - An existing *empty* folder is replaced by its staged copy in one rename; an existing
      folder holding other files receives the outputs one rename per file.
    - If any rename fails, the renames already done are undone (a replaced file, with
      ``force``, is put back from a hard link), so the job is all or nothing on disk.
    - Staging folders are named ``.takescribe-staging-<pid>-*``; a folder left by a process
      that was killed outright is removed by the next job writing next to it.
    """

    def __init__(self, *, force: bool = False) -> None:
        self.force = bool(force)
        self._stages: dict[Path, Path] = {}
        self._entries: dict[Path, Path] = {}
        self._inside: dict[Path, Path] = {}
        self.committed: list[Path] = []

    def _stage_for(self, anchor: Path) -> Path:
        if anchor not in self._stages:
            clear_stale(anchor, STAGING_PREFIX)
            try:
                self._stages[anchor] = Path(tempfile.mkdtemp(prefix=f"{STAGING_PREFIX}{os.getpid()}-", dir=anchor))
            except OSError as exc:
                raise write_error(anchor, exc) from exc
        return self._stages[anchor]

    @staticmethod
    def _split(path: Path) -> tuple[Path, list[str]]:
        """The nearest existing ancestor of ``path`` and the missing names below it."""
        missing: list[str] = []
        anchor = path
        while not anchor.exists() and anchor.parent != anchor:
            missing.append(anchor.name)
            anchor = anchor.parent
        if not anchor.is_dir():
            raise OutputError(f"{anchor}: is a file, so {path} cannot be created there; choose another output place")
        return anchor, missing[::-1]

    def file(self, path: str | os.PathLike) -> Path:
        """Staging path of the output file ``path`` (refused if it exists without ``force``)."""
        path = Path(os.path.abspath(path))
        check_writable(path, force=self.force)
        anchor, missing = self._split(path.parent)
        rel = missing + [path.name]
        stage = self._stage_for(anchor)
        staged = stage.joinpath(*rel)
        staged.parent.mkdir(parents=True, exist_ok=True)
        self._entries[anchor / rel[0]] = stage / rel[0]
        return staged

    def folder(self, path: str | os.PathLike) -> Path:
        """Staging folder standing for the output folder ``path``."""
        path = Path(os.path.abspath(path))
        if path.exists() and not path.is_dir():
            raise OutputError(f"{path}: exists and is not a folder; choose another output folder")
        if path.is_dir() and any(path.iterdir()):
            self._inside[path] = self._stage_for(path)
            return self._inside[path]
        anchor, rel = (path.parent, [path.name]) if path.is_dir() else self._split(path)
        stage = self._stage_for(anchor)
        staged = stage.joinpath(*rel)
        try:
            staged.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise write_error(path, exc) from exc
        self._entries[anchor / rel[0]] = stage / rel[0]
        return staged

    def _pending(self) -> list[tuple[Path, Path]]:
        entries = list(self._entries.items())
        for final_folder, stage in self._inside.items():
            entries += [(final_folder / child.name, child) for child in sorted(stage.iterdir())]
        return entries

    def _move(self, final: Path, staged: Path) -> Path | None:
        """Rename one entry into place; returns the hard-linked backup of a replaced file."""
        backup = None
        if final.is_dir() and not final.is_symlink():
            if not staged.is_dir() or any(final.iterdir()):
                raise OutputError(f"{final}: a folder appeared there while writing; nothing was written")
        elif final.exists() or final.is_symlink():
            if not self.force:
                raise OutputError(f"{final}: appeared while writing; pass --force to overwrite it")
            backup = staged.parent / f"{staged.name}.previous"
            try:
                os.link(final, backup, follow_symlinks=False)
            except OSError:  # a file system without hard links: no way back for this one file
                backup = None
        if staged.is_dir():
            os.chmod(staged, _final_mode(True))
        os.rename(staged, final)
        return backup

    def commit(self) -> list[Path]:
        """Move every staged output into place (all or nothing); returns the final entries."""
        done: list[tuple[Path, Path, Path | None]] = []
        try:
            for final, staged in self._pending():
                done.append((final, staged, self._move(final, staged)))
        except BaseException as exc:
            for final, staged, backup in reversed(done):
                with contextlib.suppress(OSError):
                    os.rename(final, staged)
                    if backup is not None:
                        os.rename(backup, final)
            if isinstance(exc, OSError) and not isinstance(exc, OutputError):
                raise write_error(done[-1][0] if done else "output", exc) from exc
            raise
        finally:
            self.abort()
        self.committed = [final for final, _, _ in done]
        _committed.extend(self.committed)
        return self.committed

    def abort(self) -> None:
        """Remove every staging folder (and whatever is still in them)."""
        for stage in self._stages.values():
            shutil.rmtree(stage, ignore_errors=True)
        self._stages.clear()


@contextlib.contextmanager
def staged_outputs(*, force: bool = False) -> Iterator[StagedOutputs]:
    """A :class:`StagedOutputs` committed when the block ends normally, removed otherwise.

    Examples
    --------
    >>> folder = Path(tempfile.mkdtemp())
    >>> with staged_outputs() as job:
    ...     _ = write_text(job.file(folder / "a.txt"), "A")
    ...     _ = write_text(job.file(folder / "new" / "b.txt"), "B")
    >>> sorted(p.name for p in folder.rglob("*"))
    ['a.txt', 'b.txt', 'new']
    """
    job = StagedOutputs(force=force)
    try:
        yield job
    except BaseException:
        job.abort()
        raise
    job.commit()
