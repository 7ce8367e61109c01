"""User-facing errors: each carries one clear message (the CLI prints it, exit code 1)."""

from __future__ import annotations

__all__ = ["LabelerError", "InputError", "MaskImportError", "ConflictError", "NotFoundError"]


class LabelerError(Exception):
    """An error the user can act on; ``str(err)`` is the whole message."""


class InputError(LabelerError, ValueError):
    """Bad input: a file, a value or a path that cannot be used (names the file)."""


class MaskImportError(InputError):
    """A mask file that cannot be imported; the message names the file and the problem."""


class NotFoundError(LabelerError, LookupError):
    """A tile, image, annotator or model version that does not exist."""

    def __str__(self) -> str:  # LookupError would quote the message
        return str(self.args[0]) if self.args else ""


class ConflictError(LabelerError):
    """A save based on a stale version: someone saved the tile first; nothing was written.

    Attributes
    ----------
    tile_id : int
        The tile.
    parent_version : int or None
        The version the rejected save was based on.
    current_version : int or None
        The newest saved version now in the store.
    theirs : object
        The newest saved annotation (the caller may show it), or None.
    """

    def __init__(
        self,
        message: str,
        *,
        tile_id: int,
        parent_version: int | None,
        current_version: int | None,
        theirs: object = None,
    ) -> None:
        super().__init__(message)
        self.tile_id = tile_id
        self.parent_version = parent_version
        self.current_version = current_version
        self.theirs = theirs
