"""Safe output: never clobber a user's file, never leave a partial one.

Every writer in takescribe goes through :func:`atomic_write`: the content is
written to a temporary file in the destination folder and renamed into place
(``os.replace`` is atomic on POSIX and Windows for files on one volume), so an
interruption leaves either the old file or the complete new one.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from pathlib import Path
from typing import Iterator

from .errors import OutputError

__all__ = ["atomic_write", "check_writable", "ensure_folder"]


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
        with os.fdopen(fd, mode, **({"encoding": "utf-8", "newline": ""} if mode == "w" else {})) as fh:
            yield fh
            fh.flush()
            os.fsync(fh.fileno())
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
