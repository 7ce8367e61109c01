"""What makes a database one project a team shares: its identity and its team settings.

A project lives in its database. ``labeler init DIR --store URL`` makes the project
there (and refuses a database that already holds one); ``labeler join DIR --store URL``
makes a working folder on another machine for the same project. The settings every
member must agree on (the label classes, the tile grid, agreement and picker
settings) are kept in the ``meta`` table as JSON, written once by ``init``; on a shared
server they override each machine's settings file. Machine-local settings (threads,
cache folder, editor look) stay in the file.
"""

from __future__ import annotations

import json
import uuid

import sqlalchemy as sa

from labeler.errors import LabelerError
from labeler.store import schema as t
from labeler.store.base import StoreBase, clock
from labeler.store.dialect import insert_ignoring, make_engine, upsert

__all__ = ["TeamMixin", "TEAM_SECTIONS", "read_team_settings"]

#: Settings sections the whole team shares (besides the ``classes`` table).
TEAM_SECTIONS = ("tiles", "agreement", "picker")

_ID, _CREATED, _SETTINGS = "project_id", "project_created_at", "team_settings"


def read_team_settings(url: str) -> dict | None:
    """The team settings kept in the database at ``url``, read before the store opens.

    The project's classes must be known before :class:`~labeler.store.Store` checks
    them against its saved masks, so they are read here first.

    Parameters
    ----------
    url : str
        SQLAlchemy URL of a shared project database.

    Returns
    -------
    dict or None
        As :meth:`TeamMixin.team_settings`; None when the database has none or holds
        no project yet (opening the store then says what is wrong).
    """
    try:
        engine = make_engine(url)
    except Exception:  # noqa: BLE001 - a bad URL or driver: the store's opening says which
        return None
    try:
        with engine.connect() as conn:
            if not sa.inspect(conn).has_table("meta"):
                return None
            value = conn.execute(
                sa.select(t.meta.c.value).where(t.meta.c.key == _SETTINGS)
            ).scalar()
    except sa.exc.SQLAlchemyError:
        return None  # the store's own opening reports why in one line
    finally:
        engine.dispose()
    return None if value is None else json.loads(value)


class TeamMixin(StoreBase):
    """Project identity and team settings of :class:`labeler.store.Store`."""

    def claim_project(self, team_settings: dict) -> str:
        """Give a new database its project identity and team settings (once).

        Parameters
        ----------
        team_settings : dict
            ``{"classes": {...}, "tiles": {...}, "agreement": {...}, "picker": {...}}``,
            JSON-serialisable.

        Returns
        -------
        str
            The project's id (a random UUID, hex).

        Raises
        ------
        LabelerError
            If the database already has a project identity (another ``init`` got there
            first); nothing is changed.
        """
        pid = uuid.uuid4().hex
        with self._write() as conn:
            written = insert_ignoring(conn, t.meta, {"key": _ID, "value": pid}, keys=["key"])
            if not written:
                raise LabelerError(
                    f"store {self.shown_url}: already holds a labeler project; join it with "
                    "'labeler join DIR --store URL', or give init an empty database"
                )
            conn.execute(
                t.meta.insert(),
                [
                    {"key": _CREATED, "value": clock(conn).isoformat()},
                    {"key": _SETTINGS, "value": json.dumps(team_settings, sort_keys=True)},
                ],
            )
            self._event(conn, "project_claimed", detail={"project_id": pid})
        return pid

    def project_id(self) -> str | None:
        """The project's id, or None for a database made before projects had one.

        Returns
        -------
        str or None
        """
        return self._meta(_ID)

    def team_settings(self) -> dict | None:
        """The settings the team shares, as written by ``init``.

        Returns
        -------
        dict or None
            Section name to options (``classes``: name to ``{"index", "colour"}``);
            None when the database has none (made before they were kept here).
        """
        value = self._meta(_SETTINGS)
        return None if value is None else json.loads(value)

    def set_team_settings(self, team_settings: dict) -> None:
        """Replace the settings the team shares (every member sees them on next open).

        Parameters
        ----------
        team_settings : dict
            As for :meth:`claim_project`.

        Returns
        -------
        None
        """
        with self._write() as conn:
            value = json.dumps(team_settings, sort_keys=True)
            upsert(conn, t.meta, {"key": _SETTINGS, "value": value}, keys=["key"])
            self._event(conn, "team_settings", detail=team_settings)

    def _meta(self, key: str) -> str | None:
        with self._read() as conn:
            return conn.execute(sa.select(t.meta.c.value).where(t.meta.c.key == key)).scalar()
