"""The one place for database-specific statements.

SQLite (the embedded default) gets WAL journaling, foreign keys, a busy timeout, full
fsync on commit, and ``BEGIN IMMEDIATE`` for write transactions so that two writers
queue instead of failing half-way. PostgreSQL (for teams, through the psycopg 3 driver
of the ``labeler[postgres]`` extra) runs at READ COMMITTED: writers that must see each
other lock the tile row (``SELECT ... FOR UPDATE``, ignored by SQLite, whose writers are
already serialised), and rows that two processes may create at once are written with
``INSERT ... ON CONFLICT`` (:func:`insert_ignoring`, :func:`upsert`), which both
dialects speak. URLs are shown with the password hidden (:func:`shown_url`).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import sqlalchemy as sa
from sqlalchemy import event
from sqlalchemy.dialects import postgresql, sqlite
from sqlalchemy.exc import ArgumentError, DBAPIError

from labeler.errors import LabelerError

__all__ = [
    "make_engine",
    "integrity_check",
    "is_sqlite",
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


def make_engine(url: str) -> sa.Engine:
    """Create an engine for ``url`` with the dialect's safety settings.

    Write transactions are opened with ``connection.execution_options(write=True)``.
    SQLite runs in WAL mode with full synchronous writes, foreign keys on, a busy timeout,
    and ``BEGIN IMMEDIATE`` for write transactions; a server engine checks its pooled
    connections before use.

    Parameters
    ----------
    url : str
        SQLAlchemy database URL (``sqlite:///...`` or ``postgresql+psycopg://...``).

    Returns
    -------
    sqlalchemy.Engine
    """
    if url.startswith("sqlite"):
        engine = sa.create_engine(url, connect_args={"timeout": BUSY_TIMEOUT_MS / 1000})

        @event.listens_for(engine, "connect")
        def _on_connect(dbapi_conn, _record):  # pragma: no cover - exercised by every test
            # let us emit BEGIN ourselves (pysqlite's implicit BEGIN is deferred only)
            dbapi_conn.isolation_level = None
            cur = dbapi_conn.cursor()
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
    try:
        return sa.create_engine(parsed, pool_pre_ping=True)
    except ModuleNotFoundError as exc:
        raise LabelerError(
            f"store {shown_url(url)}: the database driver {exc.name!r} is not installed; "
            "install it with: pip install 'labeler[postgres]'"
        ) from None


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
        Rows written (those skipped not counted).
    """
    if not rows:
        return 0
    stmt = _dialect_insert(conn, table).on_conflict_do_nothing(
        index_elements=None if keys is None else list(keys)
    )
    res = conn.execute(stmt, rows if not isinstance(rows, Mapping) else [rows])
    return int(res.rowcount)


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
