"""What the editor window saves through: the backend interface and an in-memory backend.

The window never touches the store; it calls an :class:`EditorBackend`. In a project the
backend is :class:`labeler.workflow.editing.StoreBackend`, which implements the same four
methods over the store.

Kinds passed to :meth:`EditorBackend.save`
    ``kind=KIND_FULL`` with the whole mask, or ``kind=KIND_WEAK`` with the weak label
    (class index where marked, 255 elsewhere); the constants are
    :data:`labeler.states.KIND_FULL` and :data:`labeler.states.KIND_WEAK`.

Learning on the tile
    :meth:`EditorBackend.relearn` takes the annotator's marks (class index where marked,
    255 elsewhere; :attr:`labeler.editor.state.EditorState.marks`) and returns a new
    proposal of the whole tile, or None when there is no trained model; in a project the
    newest head is re-fitted on the tile (:mod:`labeler.workflow.learning`). The editor
    stays free of the model: it sees masks only.

The annotation state of a save
    The editor proposes none. The backend decides what the save records and returns that
    state; in a project the workflow decides it (``accepted`` when the full mask equals
    the proposal it started from, ``amended`` when changed, ``settled`` when a reviewer
    settles, ``weak`` for a weak label; :func:`labeler.workflow.annotating.save_state`). The
    editor reports the returned state.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Protocol, runtime_checkable

import numpy as np

from labeler.errors import ConflictError
from labeler.states import AMENDED, KIND_FULL, KIND_WEAK

__all__ = ["Draft", "SavedDraft", "SavedLabel", "EditorBackend", "MemoryBackend", "SAVE_KINDS"]

#: What a save sends: the whole mask, or the weak label alone.
SAVE_KINDS = (KIND_FULL, KIND_WEAK)


@dataclass(frozen=True)
class Draft:
    """Unsaved work kept between sessions.

    Parameters
    ----------
    mask : ndarray, shape (H, W), uint8
    weak_label : ndarray, shape (H, W), uint8
        Class index where marked, 255 elsewhere.
    actions : int
        Edit actions spent so far.
    seconds : float
        Active seconds spent so far.
    """

    mask: np.ndarray
    weak_label: np.ndarray
    actions: int = 0
    seconds: float = 0.0


class SavedDraft(Protocol):
    """What :meth:`EditorBackend.load_draft` returns: a :class:`Draft` or any object with
    the same four attributes."""

    mask: np.ndarray
    weak_label: np.ndarray
    actions: int
    seconds: float


@runtime_checkable
class EditorBackend(Protocol):
    """Where the editor saves one tile's labels and drafts."""

    def save(self, mask: np.ndarray, *, kind: str, actions: int, seconds: float) -> str:
        """Save a label as a new version; the backend decides its annotation state.

        Parameters
        ----------
        mask : ndarray, shape (H, W), uint8
            The mask (``kind=KIND_FULL``) or the weak label (``kind=KIND_WEAK``, 255
            where not marked).
        kind : {KIND_FULL, KIND_WEAK}
            One of :data:`SAVE_KINDS`.
        actions, seconds : int, float
            Edit actions and active seconds spent.

        Returns
        -------
        state : str
            The annotation state recorded for this save.

        Raises
        ------
        labeler.errors.ConflictError
            When someone saved the tile since it was opened; nothing was written. Its
            ``theirs`` carries their mask as (H, W) uint8 when known.
        """
        ...

    def save_draft(
        self, mask: np.ndarray, weak_label: np.ndarray, *, actions: int, seconds: float
    ) -> None:
        """Keep unsaved work (replacing an earlier draft of the same tile)."""
        ...

    def load_draft(self) -> SavedDraft | None:
        """The draft left by an earlier session, or None."""
        ...

    def discard_draft(self) -> None:
        """Forget the draft (no error when there is none)."""
        ...

    def relearn(self, marks: np.ndarray) -> np.ndarray | None:
        """A new proposal of the tile learnt from ``marks``, or None without a model.

        Parameters
        ----------
        marks : ndarray, shape (H, W), uint8
            Class index where the annotator marked, 255 elsewhere.

        Returns
        -------
        mask : ndarray, shape (H, W), uint8, or None
        """
        ...

    def heartbeat(self) -> bool:
        """Renew the hold on the tile; False when it is no longer held by this editor."""
        ...


@dataclass(frozen=True)
class SavedLabel:
    """One call of :meth:`MemoryBackend.save` that succeeded.

    Parameters
    ----------
    mask : ndarray, shape (H, W), uint8
    kind : str
    actions : int
    seconds : float
    """

    mask: np.ndarray
    kind: str
    actions: int
    seconds: float


@dataclass
class MemoryBackend:
    """An in-memory backend for tests and scripts.

    Parameters
    ----------
    draft : Draft, optional
        A draft to offer back at start.
    conflict : ndarray or bool
        When not False, every :meth:`save` raises ``ConflictError``; an (H, W) uint8 array
        is passed as ``theirs``.
    tile_id : int
        Tile id reported in a conflict.
    state : str
        The annotation state every save reports. This backend decides nothing: a test or
        script sets the answer it wants the editor to show.
    learner : callable, optional
        What :meth:`relearn` calls (marks -> mask); None: no model, relearn returns None.
    """

    draft: Draft | None = None
    conflict: np.ndarray | bool = False
    tile_id: int = 0
    state: str = AMENDED
    learner: Callable[[np.ndarray], np.ndarray] | None = None
    saved: list[SavedLabel] = field(default_factory=list)
    drafts_written: int = 0
    relearned: int = 0
    heartbeats: int = 0

    def save(self, mask: np.ndarray, *, kind: str, actions: int, seconds: float) -> str:
        """Keep the label in :attr:`saved` and return :attr:`state` (see the class)."""
        if kind not in SAVE_KINDS:
            raise ValueError(f"kind: expected one of {SAVE_KINDS}, got {kind!r}")
        if self.conflict is not False:
            theirs = None if self.conflict is True else np.array(self.conflict, np.uint8)
            raise ConflictError(
                f"tile {self.tile_id}: someone saved it while you were editing; "
                "nothing was written",
                tile_id=self.tile_id, parent_version=1, current_version=2, theirs=theirs,
            )
        self.saved.append(SavedLabel(np.array(mask, np.uint8), kind, int(actions),
                                     float(seconds)))
        return self.state

    def save_draft(
        self, mask: np.ndarray, weak_label: np.ndarray, *, actions: int, seconds: float
    ) -> None:
        """Keep the draft in :attr:`draft`, counting the writes."""
        self.draft = Draft(np.array(mask, np.uint8), np.array(weak_label, np.uint8),
                           int(actions), float(seconds))
        self.drafts_written += 1

    def load_draft(self) -> Draft | None:
        """The draft kept, or None."""
        return self.draft

    def discard_draft(self) -> None:
        """Forget the draft."""
        self.draft = None

    def relearn(self, marks: np.ndarray) -> np.ndarray | None:
        """``learner(marks)`` (counted in :attr:`relearned`), or None without a learner."""
        if self.learner is None:
            return None
        self.relearned += 1
        return np.asarray(self.learner(np.array(marks, np.uint8)), np.uint8)

    def heartbeat(self) -> bool:
        """Count the renewal; the hold is always there."""
        self.heartbeats += 1
        return True
