"""Bringing a project database made by an older release up to this one (Alembic).

The migrations live in ``labeler/store/migrations/versions/``, one revision per schema
version: ``0001`` is the baseline (the tables of the first release), each later one
changes what its docstring says. A new database is made from
:mod:`labeler.store.schema` and stamped with the newest revision; a database of the
first release has no ``alembic_version`` table and is stamped ``0001`` before it is
upgraded. A SQLite file is copied (SQLite's online backup) next to itself before any
change; on PostgreSQL each migration runs in one transaction (its DDL is
transactional), and the README tells how to take a ``pg_dump`` first.
"""

from __future__ import annotations

import sqlite3
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path

import sqlalchemy as sa
from alembic import command
from alembic.config import Config
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory

from labeler.errors import LabelerError
from labeler.store import schema as t
from labeler.store.dialect import make_engine, shown_url

__all__ = ["UpgradeResult", "upgrade_database", "stamp_new", "head_revision", "sqlite_backup"]

MIGRATIONS = Path(__file__).with_name("migrations")


def _config(conn: sa.Connection | None = None) -> Config:
    cfg = Config()
    cfg.set_main_option("script_location", str(MIGRATIONS))
    cfg.attributes["connection"] = conn
    return cfg


def head_revision() -> str:
    """The newest migration revision (the one this release's schema is).

    Returns
    -------
    str
    """
    return ScriptDirectory.from_config(_config()).get_current_head()


def stamp_new(conn: sa.Connection) -> None:
    """Mark a database just made from :mod:`labeler.store.schema` as the newest revision.

    Parameters
    ----------
    conn : sqlalchemy.Connection
        Inside the transaction that made the tables.

    Returns
    -------
    None
    """
    command.stamp(_config(conn), "head")


@dataclass(frozen=True)
class UpgradeResult:
    """What :func:`upgrade_database` did."""

    from_version: int
    to_version: int
    backup: Path | None  # the SQLite copy made first; None for a server or no change


def sqlite_backup(url: str) -> Path:
    """Copy a SQLite database next to itself with SQLite's online backup.

    Parameters
    ----------
    url : str
        ``sqlite:///...`` URL of the database.

    Returns
    -------
    Path
        ``<file>.v<version>-<UTC time>.bak``, a complete, consistent copy.
    """
    path = Path(sa.make_url(url).database)
    src = sqlite3.connect(path)
    try:
        version = src.execute("SELECT value FROM meta WHERE key = 'schema_version'").fetchone()
        stamp = datetime.now(UTC).strftime("%Y%m%dT%H%M%SZ")
        target = path.with_name(f"{path.name}.v{version[0] if version else 0}-{stamp}.bak")
        dst = sqlite3.connect(target)
        try:
            src.backup(dst)
        finally:
            dst.close()
    finally:
        src.close()
    return target


def _found_version(conn: sa.Connection) -> int | None:
    if not sa.inspect(conn).has_table("meta"):
        return None
    value = conn.execute(sa.select(t.meta.c.value).where(t.meta.c.key == "schema_version")).scalar()
    return None if value is None else int(value)


def upgrade_database(url: str) -> UpgradeResult:
    """Upgrade the project database at ``url`` to this release's schema.

    Parameters
    ----------
    url : str
        SQLAlchemy URL of the database.

    Returns
    -------
    UpgradeResult
        The versions before and after, and the SQLite backup made first (None when
        nothing had to change).

    Raises
    ------
    LabelerError
        If the database holds no labeler project, or one of a newer release.
    """
    engine = make_engine(url)
    try:
        with engine.connect() as conn:
            found = _found_version(conn)
        if found is None:
            raise LabelerError(
                f"store {shown_url(url)}: no labeler project database here; nothing to upgrade"
            )
        if found > t.SCHEMA_VERSION:
            raise LabelerError(
                f"store {shown_url(url)}: database schema version {found} is newer than "
                f"this labeler's {t.SCHEMA_VERSION}; install the newer labeler release"
            )
        if found == t.SCHEMA_VERSION:
            return UpgradeResult(found, found, None)
        backup = sqlite_backup(url) if engine.dialect.name == "sqlite" else None
        with engine.begin() as conn:
            if MigrationContext.configure(conn).get_current_revision() is None:
                command.stamp(_config(conn), f"{found:04d}")  # made before migrations existed
            command.upgrade(_config(conn), "head")
        with engine.connect() as conn:
            return UpgradeResult(found, int(_found_version(conn)), backup)
    finally:
        engine.dispose()
