"""The project store: every read and write of the database goes through :class:`Store`.

:class:`Store` is a facade put together from one part per concept, each in its own
module of this package:

- :mod:`~labeler.store.base`: opening the database, transactions, annotators;
- :mod:`~labeler.store.images`: images and their tiles;
- :mod:`~labeler.store.holds`: tile state moves (the one life-cycle check), holds,
  who a tile is handed to;
- :mod:`~labeler.store.annotations`: versioned saves, conflicts;
- :mod:`~labeler.store.history`: saved versions read back, lineage, who sees what;
- :mod:`~labeler.store.drafts`: unsaved edits;
- :mod:`~labeler.store.models`: model versions;
- :mod:`~labeler.store.proposals`: proposals and picks (queue orders);
- :mod:`~labeler.store.events`: the event log and counts;
- :mod:`~labeler.store.team`: the project's identity and the settings its team shares.

Every change of a tile's state, saves included, passes
:func:`labeler.store.holds.checked_move`, which applies
:func:`labeler.states.check_move`. Which state a save records is decided by the caller
(the workflow); the store checks and writes it.
"""

from __future__ import annotations

from labeler.store.annotations import AnnotationsMixin, NewAnnotation
from labeler.store.base import now
from labeler.store.drafts import DraftsMixin
from labeler.store.events import EventsMixin
from labeler.store.images import NewImage
from labeler.store.models import ModelsMixin
from labeler.store.proposals import NewProposal, ProposalsMixin
from labeler.store.team import TeamMixin

__all__ = ["Store", "NewImage", "NewAnnotation", "NewProposal", "now"]


class Store(AnnotationsMixin, DraftsMixin, ProposalsMixin, ModelsMixin, EventsMixin, TeamMixin):
    """A project database.

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

    Raises
    ------
    LabelerError
        If the database cannot be opened, has no tables and ``create`` is false, or
        was written by a labeler with another schema version.

    Notes
    -----
    Use it as a context manager (or call :meth:`close`) to release the connections.
    """
