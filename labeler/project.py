"""A project folder: settings, store and paths, opened once per command.

Layout of a project folder::

    labeler.toml     settings (see labeler.settings)
    labeler.db       the store (SQLite default; the URL is a setting)
    images/          copies of the added images (unless added in place)
    models/          trained heads (checkpoints named by model version)
    cache/           derivable data (encoder features); safe to delete at any time
    exports/         what ``labeler export`` writes by default

Opening a project also tidies what a killed ``labeler add`` left in ``images/``
(:func:`labeler.imagery.intake.remove_leftovers`; never while another add runs), unless
the project is read-only for this user. An image added in place (outside the project)
is checked against the SHA-256 it was added with before its pixels are used
(:meth:`Project.image_path`).
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass, field
from pathlib import Path

from labeler.errors import InputError, LabelerError, StoreError
from labeler.fileio import atomic_write_text, sha256_file
from labeler.imagery.intake import remove_leftovers
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
    #: in-place images found unchanged in this run: path -> (size, mtime_ns, inode, sha256)
    _checked: dict[str, tuple[int, int, int, str]] = field(default_factory=dict, repr=False)

    @property
    def read_only(self) -> bool:
        """The project's database cannot be written by this user (reading works)."""
        return bool(getattr(self.store, "read_only", False))

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
        """Where the image's pixels are; an image added in place is checked first.

        An image added in place (``labeler add --in-place``) stays where it was, so it
        may be changed or replaced after it was added. Before its pixels are used, its
        SHA-256 is compared with the one it was added with; the result is remembered by
        the file's size, modification time and inode (in ``cache/``), so an unchanged
        file is hashed once.

        Raises
        ------
        InputError
            If the in-place image is gone or its content differs from what was added.
        """
        path = self.resolve(image.path, what=f"image {image.name}")
        if Path(image.path).is_absolute():
            self._check_in_place(image, path)
        return path

    def _check_in_place(self, image: ImageRecord, path: Path) -> None:
        try:
            st = path.stat()
        except FileNotFoundError:
            raise InputError(
                f"{path}: image {image.name!r} was added in place and the file is gone; put "
                "it back where it was"
            ) from None
        key = (st.st_size, st.st_mtime_ns, st.st_ino)
        known = self._checked.get(str(path)) or self._in_place_cache().get(str(path))
        if known is not None and tuple(known[:3]) == key and known[3] == image.sha256:
            self._checked[str(path)] = (*key, image.sha256)
            return
        found = sha256_file(path)
        if found != image.sha256:
            raise InputError(
                f"{path}: image {image.name!r} was added in place, but the file has changed "
                f"since (SHA-256 {found[:12]}..., added as {image.sha256[:12]}...); put the "
                "original back, or add the new file as a new image"
            )
        self._checked[str(path)] = (*key, found)
        if not self.read_only:
            cache = self._in_place_cache()
            cache[str(path)] = [*key, found]
            try:
                atomic_write_text(self._in_place_file, json.dumps(cache, sort_keys=True))
            except OSError:
                pass  # derivable: the next run hashes again

    @property
    def _in_place_file(self) -> Path:
        return self.cache_dir / "in_place_checked.json"

    def _in_place_cache(self) -> dict[str, list]:
        try:
            data = json.loads(self._in_place_file.read_text(encoding="utf-8"))
        except (OSError, ValueError):
            return {}
        return data if isinstance(data, dict) else {}

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
        If the folder holds no project (suggesting ``labeler init``), its settings file
        is missing or malformed (naming the option and where it came from), or its store
        cannot be opened (:class:`~labeler.errors.StoreError`, naming the database file,
        or the ``store.url`` setting and where it came from).
    """
    root = Path(folder)
    if not root.is_dir():
        raise LabelerError(f"{root}: no such project folder; create one with 'labeler init {root}'")
    if not (root / SETTINGS_FILE).exists():
        if (root / "labeler.db").exists():
            raise LabelerError(
                f"{root / SETTINGS_FILE}: the settings file is missing, but the project's "
                f"labeler.db is here; put {SETTINGS_FILE} back from a backup, or create an "
                "empty one (every option has a default)"
            )
        raise LabelerError(
            f"{root}: no {SETTINGS_FILE} here, so not a labeler project; run 'labeler init {root}'"
        )
    try:
        settings = load_settings(root)
    except LabelerError:
        raise
    except ValueError as exc:
        raise LabelerError(str(exc)) from None
    try:
        store = Store(settings.db_url, schema=settings.classes, create=False)
    except StoreError as exc:
        if settings.store.url and exc.kind in ("url", "driver", "connect", "permission"):
            origin = settings.origin("store.url")
            raise StoreError(f"store.url (from {origin}): {exc}", kind=exc.kind) from None
        raise
    project = Project(root=root, settings=settings, store=store)
    if not project.read_only:
        try:
            remove_leftovers(project.images_dir, stored=lambda: [im.name for im in store.images()])
        except OSError:
            pass  # tidying is a courtesy; the command itself must still run
    return project
