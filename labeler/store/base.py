"""Opening a project database, and the plumbing every part of the store shares.

:class:`StoreBase` opens (or creates) the database and checks its schema version; it
gives the other parts of the store their transactions (:meth:`StoreBase._write` opens a
write transaction, ``BEGIN IMMEDIATE`` on SQLite, see :mod:`labeler.store.dialect`), the
annotator ids every row refers to, and the one way to append to the event log.
"""

from __future__ import annotations

import os
from collections.abc import Iterator
from contextlib import contextmanager
from datetime import UTC, datetime
from pathlib import Path
from typing import Self

import sqlalchemy as sa
from sqlalchemy.exc import OperationalError

from labeler.classes import DEFAULT_SCHEMA, ClassSchema
from labeler.errors import LabelerError, StoreError
from labeler.store import dialect
from labeler.store import schema as t
from labeler.store.class_record import check_classes, record_classes
from labeler.store.dialect import (
    insert_ignoring,
    integrity_check,
    is_sqlite,
    make_engine,
    shown_url,
    sqlite_access,
    sqlite_file,
    take_turns,
)
from labeler.store.failures import display_name, engine_failure, install

__all__ = ["StoreBase", "now", "clock", "as_utc", "DEFAULT_LEASE_SECONDS"]

#: How long a hold lasts without a heartbeat from its editor: 30 minutes.
DEFAULT_LEASE_SECONDS = 1800.0

#: The settings file beside the database (named in messages only).
SETTINGS_NAME = "labeler.toml"


def now() -> datetime:
    """The current time.

    Returns
    -------
    datetime
        UTC, timezone-aware.
    """
    return datetime.now(UTC)


def clock(conn: sa.Connection) -> datetime:
    """The time by the database's clock: the server's for PostgreSQL.

    Every machine of a team stamps rows (and judges whether a hold has expired) by one
    clock, the server's, so a machine whose clock runs wrong changes nothing. SQLite
    runs on this machine, so its clock is this machine's.

    Parameters
    ----------
    conn : sqlalchemy.Connection
        An open connection (inside a transaction the server's time is the time the
        transaction began).

    Returns
    -------
    datetime
        UTC, timezone-aware.
    """
    if conn.dialect.name == "sqlite":
        return now()
    return as_utc(conn.execute(sa.select(sa.func.now())).scalar()).astimezone(UTC)


def as_utc(value: datetime | None) -> datetime | None:
    """A stored time as a timezone-aware UTC time (SQLite returns naive times).

    Parameters
    ----------
    value : datetime or None
        A time read from the database, naive (meaning UTC) or aware.

    Returns
    -------
    datetime or None
        ``value`` with UTC as its zone when it had none; None stays None.
    """
    if value is None:
        return None
    return value if value.tzinfo is not None else value.replace(tzinfo=UTC)


def _check_file(path: Path, *, create: bool) -> None:
    """Refuse a missing or empty database file (unless creating); create a new one.

    Connecting to a missing SQLite file would create an empty database in its place, so
    a project whose ``labeler.db`` was deleted or truncated is reported as it is and left
    alone. A new database file is made here, before SQLite opens it, so that it gets the
    permissions of every other file the program writes (``0o666`` less the umask).
    """
    if create:
        if not path.exists():
            try:
                os.close(os.open(path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o666))
            except FileExistsError:
                pass
            except OSError as exc:
                raise StoreError(
                    f"{path}: cannot create the database ({exc.strerror}); check that the "
                    "folder exists and that you may write in it",
                    kind="connect",
                ) from None
        return
    if not path.exists():
        raise StoreError(
            f"{path}: the project database is missing (deleted, moved or not copied); put "
            f"labeler.db back from a backup. To start again from scratch, move {SETTINGS_NAME} "
            "and images/ away first: 'labeler init' refuses a folder that holds a project",
            kind="missing",
        )
    if path.is_file() and path.stat().st_size == 0:
        raise StoreError(
            f"{path}: the project database is empty (0 bytes: truncated by a full disk or a "
            "failed copy); put labeler.db back from a backup; the empty file was left as it is",
            kind="empty",
        )


class StoreBase:
    """A project database: connection, transactions, annotators, the event log writer.

    Parameters
    ----------
    url : str
        SQLAlchemy URL (``sqlite:////abs/path/labeler.db`` by default).
    schema : ClassSchema
        Label classes; saved masks are checked against them.
    create : bool
        Create the tables when the database is new. Without it, opening a database
        that has no tables is an error (a mistyped project path must not create one).
    lease_seconds : float
        How long a hold lasts without a heartbeat from its editor (default 30 min).

    Attributes
    ----------
    read_only : bool
        The SQLite file was opened read-only (this user may not write it); reading works,
        a write raises :class:`~labeler.errors.StoreError` of kind ``"read_only"``.

    Raises
    ------
    StoreError
        If the URL cannot be used, the database file is missing or empty (unless
        ``create``), cannot be opened, is not a database, has no tables and ``create``
        is false, or was written by a labeler with another schema version. Every failure
        of a later statement that a user can act on is a ``StoreError`` too
        (:mod:`labeler.store.failures`).
    """

    def __init__(
        self,
        url: str,
        *,
        schema: ClassSchema = DEFAULT_SCHEMA,
        create: bool = False,
        lease_seconds: float = DEFAULT_LEASE_SECONDS,
    ) -> None:
        if not lease_seconds >= 0:
            raise ValueError(f"lease_seconds: expected 0 or more seconds, got {lease_seconds}")
        self.url = url
        self.schema = schema
        self.lease_seconds = float(lease_seconds)
        self.read_only = False
        where = display_name(url)
        try:
            path = sqlite_file(url)
        except Exception as exc:  # noqa: BLE001 - sorted by engine_failure
            raise engine_failure(exc, url=url) or exc from None
        immutable = False
        if path is not None:
            _check_file(path, create=create)
            self.read_only, immutable = sqlite_access(path) if path.exists() else (False, False)
        try:
            self.engine = make_engine(url, read_only=self.read_only, immutable=immutable)
        except Exception as exc:  # noqa: BLE001 - sorted by engine_failure
            raise engine_failure(exc, url=url) or exc from None
        install(self.engine, url=url, busy_seconds=dialect.BUSY_TIMEOUT_MS / 1000)
        try:
            self._open(create=create, where=where)
        except BaseException:
            self.engine.dispose()
            raise

    @property
    def shown_url(self) -> str:
        """The database URL with its password hidden, for messages."""
        return shown_url(self.url)

    @property
    def is_sqlite(self) -> bool:
        """Whether the database is the embedded SQLite file (else a server)."""
        return is_sqlite(self.engine)

    def _open(self, *, create: bool, where: str) -> None:
        """Check (or create) the tables, the schema version and the class record."""
        schema = self.schema
        try:
            insp = sa.inspect(self.engine)
            has_tables = insp.has_table("meta")
        except OperationalError as exc:
            raise StoreError(
                f"{where}: cannot open the database ({exc.orig})", kind="connect"
            ) from None
        if not has_tables:
            if not create:
                raise StoreError(
                    f"{where}: holds no labeler project (no tables); if this is the project's "
                    "database, restore it from a backup; to start a new project use "
                    "'labeler init' on another folder",
                    kind="not_a_project",
                )
            from labeler.store.migrate import stamp_new  # alembic loads only here

            with self._write() as conn:
                # two 'labeler init' on one empty database: the second waits here for
                # the first and then finds its tables (its claim is then refused)
                take_turns(conn, "labeler:create_tables")
                if not sa.inspect(conn).has_table("meta"):
                    t.metadata.create_all(conn)
                    conn.execute(
                        t.meta.insert(),
                        [{"key": "schema_version", "value": str(t.SCHEMA_VERSION)}],
                    )
                    record_classes(conn, schema)
                    stamp_new(conn)
                    return
            self._check_version(where)
        else:
            self._check_version(where)

    def _check_version(self, where: str) -> None:
        """Refuse a database of another schema version; check its class record."""
        schema = self.schema
        with self.engine.connect() as conn:
            found = conn.execute(
                sa.select(t.meta.c.value).where(t.meta.c.key == "schema_version")
            ).scalar()
        if found != str(t.SCHEMA_VERSION):
            older = found is not None and found.isdigit() and int(found) < t.SCHEMA_VERSION
            fix = (
                "upgrade it with 'labeler upgrade DIR' (a SQLite file is backed up first)"
                if older
                else "use the matching labeler release"
            )
            raise StoreError(
                f"{where}: database schema version {found}, this labeler reads "
                f"{t.SCHEMA_VERSION}; {fix}",
                kind="version",
            )
        check_classes(self.engine, schema, where=where, read_only=self.read_only)

    # -- transactions -------------------------------------------------------------------
    @contextmanager
    def _write(self) -> Iterator[sa.Connection]:
        """A write transaction: committed on success, rolled back on any error."""
        with self.engine.connect().execution_options(write=True) as conn:
            with conn.begin():
                yield conn

    @contextmanager
    def _read(self) -> Iterator[sa.Connection]:
        """A read transaction (one consistent snapshot)."""
        with self.engine.connect() as conn:
            with conn.begin():
                yield conn

    def close(self) -> None:
        """Release the database connections.

        Returns
        -------
        None
        """
        self.engine.dispose()

    def __enter__(self) -> Self:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def integrity_check(self) -> str:
        """Run the database's own consistency check.

        Returns
        -------
        str
            ``"ok"`` when sound, else the problems the database reports.
        """
        return integrity_check(self.engine)

    # -- the event log writer -----------------------------------------------------------
    @staticmethod
    def _event(
        conn: sa.Connection,
        kind: str,
        *,
        tile_id: int | None = None,
        annotator_id: int | None = None,
        detail: dict | None = None,
    ) -> None:
        """Append one row to the event log inside the caller's transaction."""
        conn.execute(
            t.events.insert().values(
                at=clock(conn), kind=kind, tile_id=tile_id, annotator_id=annotator_id, detail=detail
            )
        )

    # -- annotators ---------------------------------------------------------------------
    @staticmethod
    def _annotator_id(conn: sa.Connection, name: str) -> int:
        """The id of annotator ``name`` (blanks around it dropped); a new name is added."""
        name = name.strip() if isinstance(name, str) else name
        if not name:
            raise LabelerError(
                "annotator: expected a non-empty name, got an empty one; pass --annotator NAME"
            )
        found = conn.execute(
            sa.select(t.annotators.c.id).where(t.annotators.c.name == name)
        ).scalar()
        if found is not None:
            return int(found)
        # insert-or-read: another process may add the same name at the same moment
        insert_ignoring(
            conn, t.annotators, {"name": name, "created_at": clock(conn)}, keys=["name"]
        )
        return int(
            conn.execute(sa.select(t.annotators.c.id).where(t.annotators.c.name == name)).scalar()
        )

    @staticmethod
    def _known_annotator_id(conn: sa.Connection, name: str) -> int | None:
        """The id of annotator ``name`` exactly as given, or None when never seen."""
        return conn.execute(
            sa.select(t.annotators.c.id).where(t.annotators.c.name == name)
        ).scalar()

    def annotators(self) -> list[str]:
        """Names of every annotator, in order of first appearance.

        Returns
        -------
        list of str
        """
        with self._read() as conn:
            return list(
                conn.execute(sa.select(t.annotators.c.name).order_by(t.annotators.c.id)).scalars()
            )

    def ensure_annotator(self, name: str) -> int:
        """The id of annotator ``name``, created if new.

        Parameters
        ----------
        name : str
            The annotator's name (surrounding blanks are dropped).

        Returns
        -------
        int
            The annotator's id.

        Raises
        ------
        LabelerError
            If ``name`` is empty.
        """
        with self._write() as conn:
            return self._annotator_id(conn, name)
