"""The one place for database-specific statements.

SQLite (the embedded default) gets WAL journaling, foreign keys, a busy timeout, full
fsync on commit, and ``BEGIN IMMEDIATE`` for write transactions so that two writers
queue instead of failing half-way. Every other dialect (PostgreSQL for teams) uses the
portable defaults; the unique constraints in the schema keep saves race-free there.
"""

from __future__ import annotations

import sqlalchemy as sa
from sqlalchemy import event

__all__ = ["make_engine", "integrity_check", "is_sqlite"]

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
    return sa.create_engine(url, pool_pre_ping=True)


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
