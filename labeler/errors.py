"""User-facing errors: each carries one clear message (the CLI prints it, exit code 1).

Every message names the file, setting or record concerned, what was expected, what was
found, and what to do about it. The command line (:mod:`labeler.cli`) prints ``str(err)``
of a :class:`LabelerError` as one line; anything else that escapes a command is turned
into one line there too (:mod:`labeler.cli.boundary`).
"""

from __future__ import annotations

__all__ = [
    "LabelerError",
    "InputError",
    "MaskImportError",
    "SettingsError",
    "StoreError",
    "DamagedRecordError",
    "ConflictError",
    "NotFoundError",
    "STORE_PROBLEMS",
]


class LabelerError(Exception):
    """An error the user can act on; ``str(err)`` is the whole message."""


class InputError(LabelerError, ValueError):
    """Bad input: a file, a value or a path that cannot be used (names the file)."""


class MaskImportError(InputError):
    """A mask file that cannot be imported; the message names the file and the problem."""


class SettingsError(InputError):
    """A project setting that cannot be used.

    The message starts with where the value came from (``labeler.toml line 12`` or the
    ``LABELER_*`` variable) and names the option.

    Attributes
    ----------
    option : str
        ``section.option`` (or the section, or the file, when no single option is at fault).
    origin : str
        Where the value came from, e.g. ``"proj/labeler.toml line 12"`` or
        ``"LABELER_MODEL_EPOCHS"``; empty when set by a program.
    """

    def __init__(self, message: str, *, option: str = "", origin: str = "") -> None:
        super().__init__(message)
        self.option = option
        self.origin = origin


#: The kinds of :class:`StoreError`, each with its meaning.
STORE_PROBLEMS = {
    "url": "the store URL cannot be parsed",
    "driver": "the database driver the URL names is not installed or unknown",
    "connect": "the database cannot be reached or opened",
    "missing": "the project's database file is missing",
    "empty": "the project's database file is empty",
    "not_a_database": "the file is not a database",
    "not_a_project": "the database holds no labeler project",
    "version": "the database was written by another labeler release",
    "damaged": "the database (or one of its rows) is damaged",
    "locked": "another process holds the write lock for too long",
    "full": "the disk (or the database's quota) is full",
    "read_only": "the database cannot be written by this user",
    "permission": "the database refuses this user",
    "io": "the disk failed while reading or writing",
    "server": "the database server reported a problem",
    "classes": "the project's classes do not fit the saved masks",
}


class StoreError(LabelerError):
    """The project database cannot do what was asked; nothing was changed.

    Attributes
    ----------
    kind : str
        One of :data:`STORE_PROBLEMS` (for callers and tests that sort problems).
    """

    def __init__(self, message: str, *, kind: str) -> None:
        if kind not in STORE_PROBLEMS:
            raise ValueError(f"kind: expected one of {', '.join(STORE_PROBLEMS)}, got {kind!r}")
        super().__init__(message)
        self.kind = kind


class DamagedRecordError(StoreError, ValueError):
    """A stored row that cannot be decoded (e.g. mask bytes that are not a PNG)."""

    def __init__(self, message: str) -> None:
        super().__init__(message, kind="damaged")


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
