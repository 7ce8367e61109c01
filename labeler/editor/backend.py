"""What the editor window saves through: the backend interface and an in-memory backend.

The window never touches the store; it calls an :class:`EditorBackend`. The project's
store-backed backend (written beside the CLI) implements the same four methods.

Kinds and states passed to :meth:`EditorBackend.save`
    ``kind="full"`` with the whole mask and ``state`` ``"accepted"`` (the mask equals the
    proposal) or ``"amended"`` (it differs); ``kind="scribble"`` with the scribble mask
    (class index where scribbled, 255 elsewhere) as a weak label and ``state="amended"``.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Protocol, runtime_checkable

import numpy as np

from labeler.errors import ConflictError

__all__ = ["Draft", "SavedLabel", "EditorBackend", "MemoryBackend", "SAVE_KINDS", "SAVE_STATES"]

SAVE_KINDS = ("full", "scribble")
SAVE_STATES = ("accepted", "amended")


@dataclass(frozen=True)
class Draft:
    """Unsaved work kept between sessions.

    Parameters
    ----------
    mask : ndarray, shape (H, W), uint8
    scribbles : ndarray, shape (H, W), uint8
        Class index where scribbled, 255 elsewhere.
    actions : int
        Edit actions spent so far.
    seconds : float
        Active seconds spent so far.
    """

    mask: np.ndarray
    scribbles: np.ndarray
    actions: int = 0
    seconds: float = 0.0


@runtime_checkable
class EditorBackend(Protocol):
    """Where the editor saves one tile's labels and drafts."""

    def save(
        self, mask: np.ndarray, *, kind: str, state: str, actions: int, seconds: float
    ) -> None:
        """Save a label as a new version.

        Raises
        ------
        labeler.errors.ConflictError
            When someone saved the tile since it was opened; nothing was written. Its
            ``theirs`` carries their mask as (H, W) uint8 when known.
        """
        ...

    def save_draft(
        self, mask: np.ndarray, scribbles: np.ndarray, *, actions: int, seconds: float
    ) -> None:
        """Keep unsaved work (replacing an earlier draft of the same tile)."""
        ...

    def load_draft(self) -> Draft | None:
        """The draft left by an earlier session, or None."""
        ...

    def discard_draft(self) -> None:
        """Forget the draft (no error when there is none)."""
        ...


@dataclass(frozen=True)
class SavedLabel:
    """One call of :meth:`MemoryBackend.save` that succeeded."""

    mask: np.ndarray
    kind: str
    state: str
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
    """

    draft: Draft | None = None
    conflict: np.ndarray | bool = False
    tile_id: int = 0
    saved: list[SavedLabel] = field(default_factory=list)
    drafts_written: int = 0

    def save(
        self, mask: np.ndarray, *, kind: str, state: str, actions: int, seconds: float
    ) -> None:
        if kind not in SAVE_KINDS:
            raise ValueError(f"kind: expected one of {SAVE_KINDS}, got {kind!r}")
        if state not in SAVE_STATES:
            raise ValueError(f"state: expected one of {SAVE_STATES}, got {state!r}")
        if self.conflict is not False:
            theirs = None if self.conflict is True else np.array(self.conflict, np.uint8)
            raise ConflictError(
                f"tile {self.tile_id}: someone saved it while you were editing; "
                "nothing was written",
                tile_id=self.tile_id, parent_version=1, current_version=2, theirs=theirs,
            )
        self.saved.append(SavedLabel(np.array(mask, np.uint8), kind, state, int(actions),
                                     float(seconds)))

    def save_draft(
        self, mask: np.ndarray, scribbles: np.ndarray, *, actions: int, seconds: float
    ) -> None:
        self.draft = Draft(np.array(mask, np.uint8), np.array(scribbles, np.uint8),
                           int(actions), float(seconds))
        self.drafts_written += 1

    def load_draft(self) -> Draft | None:
        return self.draft

    def discard_draft(self) -> None:
        self.draft = None
