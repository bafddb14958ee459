"""The desk's library database: pieces, students, takes and the job queue.

SQLAlchemy Core (no ORM) over SQLite by default or PostgreSQL for a school with several
teachers. The schema carries its own version table; :data:`MIGRATIONS` lists the steps that
bring a database from one version to the next, run inside one transaction each.

Conventions
-----------
- Every id is an integer chosen by the database; files in the library folder are named by
  id (``audio/<take>.<ext>``, ``parts/<piece>.<ext>``, ``outputs/<take>/``).
- Dates of takes are ISO ``YYYY-MM-DD`` text; times of rows are Unix seconds (float).
- SQLite runs in WAL mode (readers never wait for the job writer) with foreign keys on and
  ``synchronous=FULL`` (a commit survives a killed process and a power cut).
- Deleting a student or a piece deletes its takes (``ON DELETE CASCADE``); a job keeps its
  log line when its take goes (``ON DELETE SET NULL``).
"""

from __future__ import annotations

import time
from pathlib import Path

import sqlalchemy as sa
from sqlalchemy import event

from ..errors import InputError

__all__ = ["SCHEMA_VERSION", "MIGRATIONS", "metadata", "pieces", "students", "takes", "jobs", "seen_files",
           "open_engine", "sqlite_url", "schema_version", "migrate", "now"]

metadata = sa.MetaData()

pieces = sa.Table(
    "pieces", metadata,
    sa.Column("id", sa.Integer, primary_key=True),
    sa.Column("title", sa.String(200), nullable=False),
    sa.Column("instrument", sa.String(100), nullable=False),
    sa.Column("part_file", sa.String(200), nullable=False),
    sa.Column("part_name", sa.String(200)),
    sa.Column("created", sa.Float, nullable=False),
)

students = sa.Table(
    "students", metadata,
    sa.Column("id", sa.Integer, primary_key=True),
    sa.Column("name", sa.String(200), nullable=False),
    sa.Column("created", sa.Float, nullable=False),
)

takes = sa.Table(
    "takes", metadata,
    sa.Column("id", sa.Integer, primary_key=True),
    sa.Column("student_id", sa.Integer, sa.ForeignKey("students.id", ondelete="CASCADE"), nullable=False,
              index=True),
    sa.Column("piece_id", sa.Integer, sa.ForeignKey("pieces.id", ondelete="CASCADE"), nullable=False, index=True),
    sa.Column("date", sa.String(10), nullable=False),
    sa.Column("label", sa.String(300), nullable=False),
    sa.Column("audio_file", sa.String(200), nullable=False),
    sa.Column("status", sa.String(20), nullable=False),
    sa.Column("message", sa.Text),
    sa.Column("created", sa.Float, nullable=False),
)

jobs = sa.Table(
    "jobs", metadata,
    sa.Column("id", sa.Integer, primary_key=True),
    sa.Column("take_id", sa.Integer, sa.ForeignKey("takes.id", ondelete="SET NULL"), index=True),
    sa.Column("label", sa.String(300), nullable=False),
    sa.Column("status", sa.String(20), nullable=False, index=True),
    sa.Column("stage", sa.String(300)),
    sa.Column("fraction", sa.Float, nullable=False, default=0.0),
    sa.Column("attempt", sa.Integer, nullable=False, default=0),
    sa.Column("message", sa.Text),
    sa.Column("created", sa.Float, nullable=False),
    sa.Column("finished", sa.Float),
)

seen_files = sa.Table(
    "seen_files", metadata,
    sa.Column("key", sa.String(600), primary_key=True),
    sa.Column("created", sa.Float, nullable=False),
)

_version = sa.Table("schema_version", sa.MetaData(), sa.Column("version", sa.Integer, nullable=False))


def now() -> float:
    """Unix seconds, the time unit of every row."""
    return time.time()


def _v1(conn) -> None:
    """Version 1: pieces, students, takes, jobs and the watched folder's memory."""
    metadata.create_all(conn)


# (version reached, step); a later schema change appends a step here and never edits one
MIGRATIONS = ((1, _v1),)
SCHEMA_VERSION = MIGRATIONS[-1][0]


def sqlite_url(path) -> str:
    """The SQLAlchemy URL of an SQLite file."""
    return f"sqlite:///{Path(path).resolve()}"


def _sqlite_pragmas(dbapi_connection, _record) -> None:
    cursor = dbapi_connection.cursor()
    cursor.execute("PRAGMA journal_mode=WAL")
    cursor.execute("PRAGMA foreign_keys=ON")
    cursor.execute("PRAGMA synchronous=FULL")
    cursor.execute("PRAGMA busy_timeout=10000")
    cursor.close()


def open_engine(url: str, *, pool: bool = True) -> sa.engine.Engine:
    """An engine for ``url`` (SQLite or PostgreSQL) with the desk's connection settings.

    Parameters
    ----------
    url : str
        ``sqlite:///path`` or ``postgresql://user@host:port/name``.
    pool : bool
        False in job processes (one short-lived connection each).

    Raises
    ------
    InputError
        For a URL of another kind of database.
    """
    if not (url.startswith("sqlite:") or url.startswith("postgresql")):
        raise InputError(f"{url.split(':', 1)[0]}: the desk stores its library in SQLite or PostgreSQL only;"
                         " give a sqlite:/// or postgresql:// URL")
    options = {} if pool else {"poolclass": sa.pool.NullPool}
    if url.startswith("sqlite:"):
        # SQLite is opened by the web threads and the queue thread alike
        engine = sa.create_engine(url, connect_args={"check_same_thread": False, "timeout": 10}, **options)
        event.listen(engine, "connect", _sqlite_pragmas)
    else:
        engine = sa.create_engine(_postgres_driver(url), pool_pre_ping=True, **options)
    return engine


def _postgres_driver(url: str) -> str:
    """A plain ``postgresql://`` URL with the driver that is installed (psycopg 3, else psycopg2)."""
    if not url.startswith("postgresql://"):
        return url
    try:
        import psycopg  # noqa: F401
        return url
    except ImportError:
        return "postgresql+psycopg2://" + url[len("postgresql://"):]


def schema_version(conn) -> int:
    """The version a database is at (0 for an empty one)."""
    if not sa.inspect(conn).has_table("schema_version"):
        return 0
    value = conn.execute(sa.select(_version.c.version)).scalar()
    return int(value or 0)


def migrate(engine) -> int:
    """Bring the database to :data:`SCHEMA_VERSION`, one transaction per step; returns the version.

    Raises
    ------
    InputError
        When the database was written by a newer takescribe (its version is higher).
    """
    with engine.begin() as conn:
        if not sa.inspect(conn).has_table("schema_version"):
            _version.create(conn)
            conn.execute(_version.insert().values(version=0))
        current = schema_version(conn)
    if current > SCHEMA_VERSION:
        raise InputError(f"the library database is at schema version {current}, newer than this takescribe"
                         f" understands ({SCHEMA_VERSION}); update takescribe before opening it")
    for version, step in MIGRATIONS:
        if version <= current:
            continue
        with engine.begin() as conn:
            step(conn)
            conn.execute(_version.update().values(version=version))
        current = version
    return current
