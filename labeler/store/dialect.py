"""The one place for database-specific statements.

SQLite (the embedded default) gets WAL journaling, foreign keys, a busy timeout, full
fsync on commit, and ``BEGIN IMMEDIATE`` for write transactions so that two writers
queue instead of failing half-way. PostgreSQL (for teams, through the psycopg 3 driver
of the ``labeler[postgres]`` extra) runs at READ COMMITTED: writers that must see each
other lock the tile row (``SELECT ... FOR UPDATE``, ignored by SQLite, whose writers are
already serialised), and rows that two processes may create at once are written with
``INSERT ... ON CONFLICT`` (:func:`insert_ignoring`, :func:`upsert`), which both
dialects speak. URLs are shown with the password hidden (:func:`shown_url`).

A SQLite file this user cannot write (a read-only copy, a shared folder, a read-only
disk) is opened read-only (``mode=ro``), and without switching the journal mode, so
reading commands work on it; when even the folder is read-only and no other process has
the database open (no ``-wal`` file), it is opened as immutable, the only way SQLite reads
a WAL database there (https://www.sqlite.org/wal.html, "Read-Only Databases").
"""

from __future__ import annotations

import hashlib
import os
import sqlite3
from collections.abc import Mapping, Sequence
from pathlib import Path
from urllib.parse import quote

import sqlalchemy as sa
from sqlalchemy import event
from sqlalchemy.dialects import postgresql, sqlite
from sqlalchemy.exc import ArgumentError, DBAPIError

from labeler.errors import LabelerError

__all__ = [
    "take_turns",
    "BUSY_TIMEOUT_MS",
    "make_engine",
    "integrity_check",
    "is_sqlite",
    "sqlite_file",
    "sqlite_access",
    "shown_url",
    "insert_ignoring",
    "upsert",
    "is_retryable",
]

#: SQLSTATE codes of a transaction the server gave up and that may simply be run again:
#: serialization failure and deadlock (PostgreSQL manual, appendix A "Error Codes").
RETRYABLE_SQLSTATES = frozenset({"40001", "40P01"})

#: Milliseconds a SQLite writer waits for another writer before giving up.
BUSY_TIMEOUT_MS = 30_000


def is_sqlite(engine: sa.Engine) -> bool:
    """Whether an engine is the embedded SQLite store.

    Parameters
    ----------
    engine : sqlalchemy.Engine

    Returns
    -------
    bool
        True for SQLite, False for a server (PostgreSQL).
    """
    return engine.dialect.name == "sqlite"


def sqlite_file(url: str) -> Path | None:
    """The database file of a SQLite URL; None for other databases and in-memory SQLite.

    Parameters
    ----------
    url : str
        SQLAlchemy database URL.

    Returns
    -------
    Path or None
        The file, or None.

    Raises
    ------
    sqlalchemy.exc.ArgumentError
        If ``url`` is not a URL at all.
    """
    parsed = sa.engine.make_url(url)
    if parsed.get_backend_name() != "sqlite" or parsed.database in (None, "", ":memory:"):
        return None
    if parsed.database.startswith("file:"):
        return None  # a SQLite URI: the caller chose its own open mode
    return Path(parsed.database)


def sqlite_access(path: Path) -> tuple[bool, bool]:
    """How to open the existing database file ``path``: ``(read_only, immutable)``.

    Read-only when this user may not write the file or its folder (SQLite writes its
    ``-wal`` and ``-shm`` files beside the database); immutable when, besides, the folder
    is read-only and no ``-wal`` file shows another process using the database.

    Parameters
    ----------
    path : Path
        An existing SQLite database file.

    Returns
    -------
    read_only, immutable : bool
        How to open it.
    """
    folder = path.parent
    writable = os.access(path, os.W_OK) and os.access(folder, os.W_OK)
    if writable:
        return False, False
    wal = Path(f"{path}-wal")
    return True, not os.access(folder, os.W_OK) and not wal.exists()


def _connect_read_only(path: Path, *, immutable: bool):
    uri = f"file:{quote(str(path.resolve()))}?mode=ro" + ("&immutable=1" if immutable else "")

    def connect():
        timeout = BUSY_TIMEOUT_MS / 1000
        return sqlite3.connect(uri, uri=True, timeout=timeout, check_same_thread=False)

    return connect


def make_engine(url: str, *, read_only: bool = False, immutable: bool = False) -> sa.Engine:
    """Create an engine for ``url`` with the dialect's safety settings.

    Write transactions are opened with ``connection.execution_options(write=True)``.
    SQLite runs in WAL mode with full synchronous writes, foreign keys on, a busy timeout,
    and ``BEGIN IMMEDIATE`` for write transactions; a server engine checks its pooled
    connections before use.

    Parameters
    ----------
    url : str
        SQLAlchemy database URL (``sqlite:///...`` or ``postgresql+psycopg://...``).
    read_only, immutable : bool
        SQLite only: open the file read-only (see :func:`sqlite_access`); a write then
        fails with SQLite's read-only error instead of changing anything.

    Returns
    -------
    sqlalchemy.Engine
    """
    if url.startswith("sqlite"):
        path = sqlite_file(url)
        if read_only and path is not None:
            engine = sa.create_engine(url, creator=_connect_read_only(path, immutable=immutable))
        else:
            engine = sa.create_engine(url, connect_args={"timeout": BUSY_TIMEOUT_MS / 1000})
            read_only = False

        @event.listens_for(engine, "connect")
        def _on_connect(dbapi_conn, _record):  # pragma: no cover - exercised by every test
            # let us emit BEGIN ourselves (pysqlite's implicit BEGIN is deferred only)
            dbapi_conn.isolation_level = None
            cur = dbapi_conn.cursor()
            if not read_only:  # switching the journal mode writes the file
                cur.execute("PRAGMA journal_mode=WAL")
            cur.execute("PRAGMA synchronous=FULL")
            cur.execute("PRAGMA foreign_keys=ON")
            cur.execute(f"PRAGMA busy_timeout={BUSY_TIMEOUT_MS}")
            cur.close()

        @event.listens_for(engine, "begin")
        def _on_begin(conn):
            if conn.get_execution_options().get("write"):
                conn.exec_driver_sql("BEGIN IMMEDIATE")
            else:
                conn.exec_driver_sql("BEGIN")

        return engine
    parsed = sa.make_url(url)
    if parsed.drivername == "postgresql":  # no driver named: the one of the postgres extra
        parsed = parsed.set(drivername="postgresql+psycopg")
    return sa.create_engine(parsed, pool_pre_ping=True)  # a missing driver: failures.py


def shown_url(url: str) -> str:
    """A database URL as it may be shown: the password replaced by ``***``.

    Parameters
    ----------
    url : str
        SQLAlchemy URL, possibly with a password.

    Returns
    -------
    str
        The URL with its password hidden; a string that is not a URL is returned as is.
    """
    try:
        return sa.make_url(url).render_as_string(hide_password=True)
    except ArgumentError:
        return url


def _dialect_insert(conn: sa.Connection, table: sa.Table):
    name = conn.dialect.name
    if name == "sqlite":
        return sqlite.insert(table)
    if name == "postgresql":
        return postgresql.insert(table)
    raise LabelerError(  # pragma: no cover - the store supports these two
        f"store: dialect {name!r} is not supported; use SQLite or PostgreSQL"
    )


def insert_ignoring(
    conn: sa.Connection,
    table: sa.Table,
    rows: Sequence[Mapping[str, object]] | Mapping[str, object],
    *,
    keys: Sequence[str] | None,
) -> int:
    """Insert rows, skipping any whose ``keys`` are already taken (insert-or-read).

    ``INSERT ... ON CONFLICT (keys) DO NOTHING``: two processes creating the same row
    at once both succeed and one row is written.

    Parameters
    ----------
    conn : sqlalchemy.Connection
        Inside the caller's transaction.
    table : sqlalchemy.Table
    rows : mapping or sequence of mappings
        Column values.
    keys : sequence of str or None
        Columns of a unique constraint of ``table``; None skips a row that collides
        with any unique constraint.

    Returns
    -------
    int
        For one row: 1 when written, 0 when skipped; for several: -1 (drivers do not
        all count the rows of a many-row statement).
    """
    if not rows:
        return 0
    stmt = _dialect_insert(conn, table).on_conflict_do_nothing(
        index_elements=None if keys is None else list(keys)
    )
    if isinstance(rows, Mapping):  # one row: RETURNING tells whether it was written
        written = stmt.values(**rows).returning(*table.primary_key.columns)
        return len(conn.execute(written).all())
    conn.execute(stmt, list(rows))
    return -1


def upsert(
    conn: sa.Connection,
    table: sa.Table,
    values: Mapping[str, object],
    *,
    keys: Sequence[str],
) -> None:
    """Insert a row or, when its ``keys`` are taken, overwrite the other columns.

    ``INSERT ... ON CONFLICT (keys) DO UPDATE``: one statement, so two processes
    writing the same row at once leave the last one's values and raise nothing.

    Parameters
    ----------
    conn : sqlalchemy.Connection
    table : sqlalchemy.Table
    values : mapping
        Every column to write.
    keys : sequence of str
        Columns of a unique constraint of ``table``.

    Returns
    -------
    None
    """
    stmt = _dialect_insert(conn, table).values(**values)
    changed = {k: stmt.excluded[k] for k in values if k not in keys}
    conn.execute(stmt.on_conflict_do_update(index_elements=list(keys), set_=changed))


def take_turns(conn: sa.Connection, key: str) -> None:
    """Hold a lock named ``key`` until the caller's transaction ends: writers take turns.

    On PostgreSQL a transaction-level advisory lock (``pg_advisory_xact_lock``) on a
    64-bit number made from ``key``; on SQLite nothing is needed, as ``BEGIN IMMEDIATE``
    already lets one writer in at a time. Used where a write reads what it builds on
    and no row exists yet to lock (the next number of a model version, a new project's
    tables).

    Parameters
    ----------
    conn : sqlalchemy.Connection
        Inside the caller's write transaction.
    key : str
        What the lock is for; the same key, the same lock.

    Returns
    -------
    None
    """
    if conn.dialect.name != "postgresql":
        return
    number = int.from_bytes(hashlib.sha256(key.encode()).digest()[:8], "big", signed=True)
    conn.execute(sa.select(sa.func.pg_advisory_xact_lock(number)))


def is_retryable(exc: BaseException) -> bool:
    """Whether a database error is a serialization failure or deadlock (run it again).

    Parameters
    ----------
    exc : BaseException

    Returns
    -------
    bool
    """
    orig = getattr(exc, "orig", None) if isinstance(exc, DBAPIError) else None
    return getattr(orig, "sqlstate", None) in RETRYABLE_SQLSTATES


def integrity_check(engine: sa.Engine) -> str:
    """Run the database's own consistency check.

    SQLite: ``PRAGMA integrity_check``. Other dialects: a trivial query (their servers
    check themselves).

    Parameters
    ----------
    engine : sqlalchemy.Engine

    Returns
    -------
    str
        ``"ok"`` when sound, else the problems the database reports, joined by ``"; "``.
    """
    with engine.connect() as conn:
        if is_sqlite(engine):
            rows = conn.exec_driver_sql("PRAGMA integrity_check").fetchall()
            return "; ".join(str(r[0]) for r in rows)
        conn.execute(sa.text("SELECT 1"))
        return "ok"
