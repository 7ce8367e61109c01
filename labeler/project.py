"""A project folder: settings, store and paths, opened once per command.

Layout of a project folder::

    labeler.toml     settings (see labeler.settings)
    labeler.db       the store (SQLite default; the URL is a setting)
    images/          copies of the added images (unless added in place)
    models/          trained heads (checkpoints named by model version)
    cache/           derivable data (encoder features); safe to delete at any time
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

from labeler.errors import InputError, LabelerError
from labeler.fileio import atomic_write_text
from labeler.settings import SETTINGS_FILE, Settings, default_settings_text, load_settings
from labeler.store import Store
from labeler.store.records import ImageRecord

__all__ = ["Project", "init_project", "open_project", "inside"]


def inside(root: Path, candidate: Path) -> bool:
    """True if ``candidate`` (resolved) lies inside ``root`` (resolved)."""
    try:
        candidate.resolve().relative_to(root.resolve())
    except ValueError:
        return False
    return True


@dataclass
class Project:
    """An open project: its folder, settings and store."""

    root: Path
    settings: Settings
    store: Store

    @property
    def images_dir(self) -> Path:
        return self.root / "images"

    @property
    def models_dir(self) -> Path:
        return self.root / "models"

    @property
    def cache_dir(self) -> Path:
        return self.settings.cache_dir

    def resolve(self, stored_path: str, *, what: str = "path") -> Path:
        """The file a stored path names.

        Relative paths are relative to the project folder and must stay inside it;
        absolute paths (images added in place) are used as they are.

        Raises
        ------
        InputError
            If a relative path leaves the project folder (e.g. ``../../x``).
        """
        p = Path(stored_path)
        if p.is_absolute():
            return p
        full = self.root / p
        if not inside(self.root, full):
            raise InputError(
                f"{what} {stored_path!r}: leaves the project folder {self.root}; refusing to use it"
            )
        return full

    def image_path(self, image: ImageRecord) -> Path:
        """Where the image's pixels are."""
        return self.resolve(image.path, what=f"image {image.name}")

    def close(self) -> None:
        self.store.close()

    def __enter__(self) -> Project:
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def init_project(folder: str | os.PathLike[str]) -> Project:
    """Create a project folder (settings file, store, sub-folders).

    Raises
    ------
    LabelerError
        If the folder already holds a project, or is a file.
    """
    root = Path(folder)
    if root.exists() and not root.is_dir():
        raise LabelerError(f"{root}: exists and is not a folder")
    if (root / SETTINGS_FILE).exists() or (root / "labeler.db").exists():
        raise LabelerError(
            f"{root}: already holds a labeler project; use it, or choose another folder"
        )
    root.mkdir(parents=True, exist_ok=True)
    atomic_write_text(root / SETTINGS_FILE, default_settings_text())
    for sub in ("images", "models", "cache"):
        (root / sub).mkdir(exist_ok=True)
    settings = load_settings(root)
    store = Store(settings.db_url, schema=settings.classes, create=True)
    store.log_event("project_created", detail={"folder": root.name})
    return Project(root=root, settings=settings, store=store)


def open_project(folder: str | os.PathLike[str]) -> Project:
    """Open an existing project folder.

    Raises
    ------
    LabelerError
        If the folder holds no project (suggesting ``labeler init``) or its settings
        file is malformed (naming the option).
    """
    root = Path(folder)
    if not root.is_dir():
        raise LabelerError(f"{root}: no such project folder; create one with 'labeler init {root}'")
    if not (root / SETTINGS_FILE).exists():
        raise LabelerError(
            f"{root}: no {SETTINGS_FILE} here, so not a labeler project; run 'labeler init {root}'"
        )
    try:
        settings = load_settings(root)
    except ValueError as exc:
        raise LabelerError(str(exc)) from None
    store = Store(settings.db_url, schema=settings.classes, create=False)
    return Project(root=root, settings=settings, store=store)
