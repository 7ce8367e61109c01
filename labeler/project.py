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

import dataclasses
import json
import os
from dataclasses import dataclass, field
from pathlib import Path

from labeler.classes import ClassSchema
from labeler.errors import InputError, LabelerError, StoreError
from labeler.fileio import atomic_write_text, sha256_file
from labeler.imagery.intake import ROOT_PREFIX, remove_leftovers, root_image_path
from labeler.settings import SETTINGS_FILE, Settings, default_settings_text, load_settings
from labeler.store import Store
from labeler.store.records import ImageRecord, ModelVersionRecord
from labeler.store.team import TEAM_SECTIONS, read_team_settings

__all__ = [
    "Project",
    "init_project",
    "join_project",
    "open_project",
    "upgrade_project",
    "inside",
    "team_settings",
]


def team_settings(settings: Settings) -> dict:
    """The settings a team must share, as plain data for the store.

    Parameters
    ----------
    settings : Settings

    Returns
    -------
    dict
        ``classes`` (name to ``{"index", "colour"}``) and the options of every section
        of :data:`labeler.store.team.TEAM_SECTIONS`.
    """
    out: dict = {name: dataclasses.asdict(getattr(settings, name)) for name in TEAM_SECTIONS}
    out["classes"] = {
        c.name: {"index": c.index, **({"colour": c.colour} if c.colour else {})}
        for c in settings.classes
    }
    return out


def _with_team(settings: Settings, team: dict | None) -> Settings:
    """``settings`` with the team's sections put in (the database's word wins)."""
    if not team:
        return settings
    sections = {name: team[name] for name in TEAM_SECTIONS if name in team}
    out = settings.replace(**sections)
    if "classes" in team:
        out = out.replace(classes=ClassSchema.from_mapping(team["classes"]))
    return out


def _settings_text(store_url: str | None, image_root: str | None = None) -> str:
    text = default_settings_text()
    lines = {
        '# url = "postgresql+psycopg://user@server/labeler"   # default: labeler.db in this '
        "folder": None if store_url is None else f"url = {json.dumps(store_url)}",
        '# image_root = "/mnt/farm-images"   # the team\'s shared image folder, as this machine '
        "mounts it": None if image_root is None else f"image_root = {json.dumps(str(image_root))}",
    }
    for line, value in lines.items():
        if line not in text:  # pragma: no cover - the default text names the options
            raise AssertionError(f"the default settings text lost its line {line!r}")
        if value is not None:
            text = text.replace(line, value)
    return text


def _open_store(settings: Settings, *, create: bool) -> Store:
    try:
        return Store(
            settings.db_url,
            schema=settings.classes,
            create=create,
            lease_seconds=settings.holds.lease_minutes * 60,
        )
    except StoreError as exc:
        if settings.store.url and exc.kind in ("url", "driver", "connect", "permission"):
            origin = settings.origin("store.url")
            raise StoreError(f"store.url (from {origin}): {exc}", kind=exc.kind) from None
        raise


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

    @property
    def image_root(self) -> Path | None:
        """The team's shared image folder as this machine reaches it (None: not set).

        The ``store.image_root`` setting; a relative path is relative to the project.
        """
        value = self.settings.store.image_root
        if not value:
            return None
        root = Path(value).expanduser()
        return root if root.is_absolute() else self.root / root

    def image_path(self, image: ImageRecord) -> Path:
        """Where the image's pixels are on this machine, checked by SHA-256 first.

        An image kept under the team's image root (``store.image_root``) is found there
        by its SHA-256 on every machine; so is an image copied into another machine's
        ``images/`` folder, when this machine lacks that file and the root holds it. An
        image added in place (``labeler add --in-place``) stays where it was.

        A file under the root or in place may be changed or replaced after it was
        added, so before its pixels are used it is checked: a size other than the one
        added is a change found at once; otherwise the SHA-256 is read (in chunks, once)
        and remembered with the file's size, modification time and inode (in
        ``cache/``), so an unchanged file is hashed once per machine, even a 2 GB
        orthomosaic.

        Raises
        ------
        InputError
            If the file is gone, not reachable on this machine (the message names the
            setting to set) or its content differs from what was added.
        """
        if image.path.startswith(ROOT_PREFIX):
            root = self.image_root
            if root is None:
                raise InputError(
                    f"image {image.name!r}: kept under the team's image root, which is not "
                    "set on this machine; set store.image_root in labeler.toml (or "
                    "LABELER_STORE_IMAGE_ROOT) to where this machine mounts the shared "
                    "image folder"
                )
            path = root / image.path[len(ROOT_PREFIX) :]
            self._check_in_place(image, path, where="the shared image root")
            return path
        path = self.resolve(image.path, what=f"image {image.name}")
        if Path(image.path).is_absolute():
            self._check_in_place(image, path)
        elif not path.exists() and self.image_root is not None:
            shared = self.image_root / root_image_path(image.sha256, Path(image.path).suffix)
            if shared.exists():  # added on another machine, found in the team's root
                self._check_in_place(image, shared, where="the shared image root")
                return shared
        return path

    def _check_in_place(self, image: ImageRecord, path: Path, *, where: str = "") -> None:
        how = f"kept under {where}" if where else "added in place"
        try:
            st = path.stat()
        except FileNotFoundError:
            fix = (
                "check that the shared image folder is mounted where store.image_root says"
                if where
                else "put it back where it was"
            )
            raise InputError(
                f"{path}: image {image.name!r} was {how} and the file is gone; {fix}"
            ) from None
        key = (st.st_size, st.st_mtime_ns, st.st_ino)
        if image.size is None or st.st_size == image.size:
            known = self._checked.get(str(path)) or self._in_place_cache().get(str(path))
            if known is not None and tuple(known[:3]) == key and known[3] == image.sha256:
                self._checked[str(path)] = (*key, image.sha256)
                return
            found = sha256_file(path)
        else:
            found = None  # another size: changed, no need to read 2 GB to know it
        if found != image.sha256:
            seen = (
                f"SHA-256 {found[:12]}..., added as {image.sha256[:12]}..."
                if found is not None
                else f"{st.st_size} bytes, added as {image.size} bytes"
            )
            raise InputError(
                f"{path}: image {image.name!r} was {how}, but the file has changed "
                f"since ({seen}); put the original back, or add the new file as a new image"
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

    # -- model versions' weights -----------------------------------------------------
    def model_weights(self, version: ModelVersionRecord) -> bytes:
        """The weights of a model version, as the database keeps them.

        A version made before the database kept weights (schema version 2) has only its
        file in ``models/`` of the machine that made it; when this machine has that
        file, it is read into the database here (once, for the whole team).

        Parameters
        ----------
        version : ModelVersionRecord
            A head or adapted encoder version.

        Returns
        -------
        bytes
            The weights file's bytes.

        Raises
        ------
        LabelerError
            If the database keeps no weights for the version and this machine does not
            have its file (the message names the machine-side fix).
        """
        data = self.store.model_weights(version.id)
        if data is not None:
            return data
        path = self.resolve(version.checkpoint or "", what=f"weights of model {version.name}")
        if not version.checkpoint or not path.is_file():
            raise LabelerError(
                f"model {version.name}: its weights are not in the project's database and "
                f"this machine has no file {version.checkpoint or '(none recorded)'}; run "
                "'labeler upgrade DIR' in the folder of the machine that made it, or retrain "
                "('labeler retrain')"
            )
        data = path.read_bytes()
        if not self.read_only:
            self.store.put_model_weights(version.id, data)
        return data

    def model_file(self, version: ModelVersionRecord, *, data: bytes | None = None) -> Path:
        """A file on this machine holding the weights of a model version.

        For readers that need a path (cluster workers, the encoder loader): the copy in
        ``models/`` named by the weights' SHA-256, written from the database the first
        time it is needed (:func:`labeler.model.checkpoint.keep_weights_file`).

        Parameters
        ----------
        version : ModelVersionRecord
        data : bytes, optional
            The weights when the caller has read them already.

        Returns
        -------
        Path
            ``models/<kind>-<sha256[:12]>.pt`` (the file of a version made before the
            database kept weights is that file itself).

        Raises
        ------
        LabelerError
            As :meth:`model_weights`.
        """
        from labeler.model.checkpoint import keep_weights_file

        if version.weights_sha256 is not None and data is None:
            known = self.models_dir / f"{version.kind}-{version.weights_sha256[:12]}.pt"
            if known.is_file():
                return known
        if version.weights_sha256 is None and version.checkpoint:
            own = self.resolve(version.checkpoint, what=f"weights of model {version.name}")
            if own.is_file():  # made before the database kept weights, on this machine
                return own
        if data is None:
            data = self.model_weights(version)
        try:
            return keep_weights_file(
                self.models_dir, version.kind, data, sha256=version.weights_sha256
            )
        except OSError as exc:
            raise LabelerError(
                f"{self.models_dir}: cannot keep a copy of the weights of model "
                f"{version.name} ({exc.strerror or exc}); check that you may write there"
            ) from None

    def read_in_model_files(self) -> list[str]:
        """Read into the database every model file of this folder it does not keep yet.

        Run by ``labeler upgrade``: versions made before the database kept weights are
        files in ``models/`` of the machine that made them.

        Returns
        -------
        list of str
            Names of the versions whose weights were read in.
        """
        done = []
        for version in self.store.model_versions():
            if version.weights_sha256 is not None or not version.checkpoint:
                continue
            path = self.resolve(version.checkpoint, what=f"weights of model {version.name}")
            if path.is_file() and self.store.put_model_weights(version.id, path.read_bytes()):
                done.append(version.name)
        return done

    @property
    def database_name(self) -> str:
        """The project's database URL, its password hidden (for messages)."""
        return self.store.shown_url

    def close(self) -> None:
        self.store.close()

    def __enter__(self) -> Project:
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def init_project(
    folder: str | os.PathLike[str],
    *,
    store_url: str | None = None,
    image_root: str | os.PathLike[str] | None = None,
) -> Project:
    """Create a project: its database (made and claimed) and its working folder.

    Parameters
    ----------
    folder : path
        The working folder to create (settings file, ``images/``, ``models/``,
        ``cache/``).
    store_url : str, optional
        Database URL of a shared project (PostgreSQL); default the folder's own
        SQLite file (or ``LABELER_STORE_URL``). Written into the settings file.
    image_root : path, optional
        Where this machine mounts the team's shared image folder (``store.image_root``);
        written into the settings file.

    Returns
    -------
    Project
        The open project.

    Raises
    ------
    LabelerError
        If the folder already holds a project or is a file, or the database already
        holds a project (join that one with :func:`join_project`); nothing is made.
    """
    root = _check_new_folder(folder)
    settings = load_settings(root)
    if store_url is not None:
        settings = settings.replace(store={"url": store_url})
    if settings.store.url:
        # the database is checked (and claimed) before the folder is made
        store = _open_store(settings, create=True)
        try:
            store.claim_project(team_settings(settings))
        except BaseException:
            store.close()
            raise
        _make_folder(root, _settings_text(store_url, _root_text(image_root)))
        settings = load_settings(root)
        if store_url is not None:
            settings = settings.replace(store={"url": store_url})
    else:
        _make_folder(root, _settings_text(None, _root_text(image_root)))
        settings = load_settings(root)
        store = _open_store(settings, create=True)
        store.claim_project(team_settings(settings))
    store.log_event("project_created", detail={"folder": root.name})
    return Project(root=root, settings=settings, store=store)


def join_project(
    folder: str | os.PathLike[str],
    *,
    store_url: str,
    image_root: str | os.PathLike[str] | None = None,
) -> Project:
    """Make a working folder on this machine for a project kept in a shared database.

    Parameters
    ----------
    folder : path
        The working folder to create.
    store_url : str
        Database URL of the project (as its ``init`` was given).
    image_root : path, optional
        Where this machine mounts the team's shared image folder (``store.image_root``).

    Returns
    -------
    Project
        The open project, with the team's settings from the database.

    Raises
    ------
    LabelerError
        If the folder already holds a project, or the database holds no project
        (suggesting ``labeler init``); nothing is made.
    """
    root = _check_new_folder(folder)
    team = read_team_settings(store_url)
    settings = _with_team(load_settings(root).replace(store={"url": store_url}), team)
    store = _open_store(settings, create=False)
    try:
        _make_folder(root, _settings_text(store_url, _root_text(image_root)))
        store.log_event("project_joined", detail={"folder": root.name})
    except BaseException:
        store.close()
        raise
    settings = _with_team(load_settings(root).replace(store={"url": store_url}), team)
    return Project(root=root, settings=settings, store=store)


def upgrade_project(folder: str | os.PathLike[str]) -> tuple[int, int, Path | None]:
    """Bring the project's database up to this release's schema (``labeler upgrade``).

    Parameters
    ----------
    folder : path
        A project folder (its settings name the database).

    Returns
    -------
    (from_version, to_version, backup) : (int, int, Path or None)
        The schema versions before and after, and the copy of a SQLite database made
        before any change (None on a server, or when nothing changed).

    Raises
    ------
    LabelerError
        If the folder holds no project, or its database holds none or one of a newer
        release.
    """
    from labeler.store.migrate import upgrade_database

    root = Path(folder)
    if not (root / SETTINGS_FILE).exists():
        raise LabelerError(f"{root}: no {SETTINGS_FILE} here, so not a labeler project")
    try:
        settings = load_settings(root)
    except ValueError as exc:
        raise LabelerError(str(exc)) from None
    result = upgrade_database(settings.db_url)
    return result.from_version, result.to_version, result.backup


def _root_text(image_root: str | os.PathLike[str] | None) -> str | None:
    """The image root as written into the settings file (absolute; a link stays a link)."""
    return None if image_root is None else str(Path(image_root).expanduser().absolute())


def _check_new_folder(folder: str | os.PathLike[str]) -> Path:
    root = Path(folder)
    if root.exists() and not root.is_dir():
        raise LabelerError(f"{root}: exists and is not a folder")
    if (root / SETTINGS_FILE).exists() or (root / "labeler.db").exists():
        raise LabelerError(
            f"{root}: already holds a labeler project; use it, or choose another folder"
        )
    return root


def _make_folder(root: Path, settings_text: str) -> None:
    root.mkdir(parents=True, exist_ok=True)
    atomic_write_text(root / SETTINGS_FILE, settings_text)
    for sub in ("images", "models", "cache"):
        (root / sub).mkdir(exist_ok=True)


def open_project(folder: str | os.PathLike[str]) -> Project:
    """Open an existing project folder.

    On a shared server the team's settings kept in the database (classes, tiles,
    agreement, picker) replace the file's; a SQLite project's file is its own word.

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
    if settings.store.url and not settings.db_url.startswith("sqlite"):
        # a shared project: the team's settings in its database win over the file's
        settings = _with_team(settings, read_team_settings(settings.db_url))
    store = _open_store(settings, create=False)
    project = Project(root=root, settings=settings, store=store)
    if not project.read_only:
        try:
            remove_leftovers(project.images_dir, stored=lambda: [im.name for im in store.images()])
        except OSError:
            pass  # tidying is a courtesy; the command itself must still run
    return project
