"""Bringing an image file into a project folder: the copy and its georeferencing side files.

A PNG or JPEG is georeferenced by a world file (``.pgw``, ``.jgw``, ``.wld``, ...) and a
``.prj`` beside it; the copy keeps them, renamed after the copy, so that the copy reads
with the same georeferencing as the original. Every file is written atomically
(:func:`labeler.fileio.atomic_copy_file`), and the image copy is checked against the
hash the caller read before it is renamed into place.

An add in progress holds a claim on its image name (:func:`reserve_image_name`, a marker
``images/.adding-<name>``), so two adds at once never pick the same name (and never copy
over each other's files). An add that was killed leaves its claim behind, maybe with a
half-made copy; :func:`remove_leftovers` (run when a project is opened) removes what such
an add left, unless the image made it into the store.

A team shares its images through an *image root*, a folder every machine mounts (the
``store.image_root`` setting). There an image is kept under its content's SHA-256,
``<root>/<sha[:2]>/<sha><suffix>`` (:func:`root_image_path`), with its side files named
the same way: two machines adding the same file find one copy, two different files can
never take each other's name, and a reader can tell a file from its name alone. The
SHA-256 is read in 1 MiB chunks (:func:`labeler.fileio.sha256_file`), so a 2 GB
orthomosaic is hashed in constant memory at add time, once.
"""

from __future__ import annotations

import os
import re
from collections.abc import Callable, Collection
from dataclasses import dataclass
from pathlib import Path

from labeler.fileio import Claim, atomic_copy_file, claim, claim_is_live
from labeler.imagery.georef import find_world_file

__all__ = [
    "CLAIM_PREFIX",
    "ImageCopy",
    "side_files",
    "copy_image",
    "files_named",
    "reserve_image_name",
    "remove_leftovers",
    "ROOT_PREFIX",
    "root_image_path",
    "put_in_image_root",
]

#: Start of the stored path of an image kept under the team's image root.
ROOT_PREFIX = "@image_root/"

#: Marker of an add in progress: ``images/.adding-<image name>``.
CLAIM_PREFIX = ".adding-"
#: Temporary files of atomic copies: ``.<target>.<random>.part`` (labeler.fileio).
_PART = re.compile(r"^\.(?P<target>.+)\.[A-Za-z0-9_]+\.part$")
#: Temporary files of a claim being made: ``.<marker>.<random>.tmp`` (labeler.fileio).
_CLAIM_TMP = re.compile(rf"^\.{re.escape(CLAIM_PREFIX)}.+\.[A-Za-z0-9_]+\.tmp$")


@dataclass(frozen=True)
class ImageCopy:
    """The files :func:`copy_image` wrote.

    Attributes
    ----------
    image : Path
        The copy of the image.
    side_files : tuple of Path
        Copies of its world file and ``.prj``, if the original had them.
    """

    image: Path
    side_files: tuple[Path, ...] = ()

    def remove(self) -> None:
        """Delete every file of the copy (those already gone are skipped)."""
        for path in (self.image, *self.side_files):
            path.unlink(missing_ok=True)


def side_files(image: str | os.PathLike[str]) -> list[Path]:
    """The georeferencing side files of ``image``: its world file and ``.prj``, if present.

    Parameters
    ----------
    image : path-like
        An image file.

    Returns
    -------
    list of Path
        The world file first (if any), then the ``.prj`` (if any).
    """
    src = Path(image)
    out = []
    world = find_world_file(src)
    if world is not None:
        out.append(world)
    prj = src.with_suffix(".prj")
    if prj.is_file():
        out.append(prj)
    return out


def copy_image(
    source: str | os.PathLike[str],
    folder: str | os.PathLike[str],
    name: str,
    *,
    sha256: str | None = None,
) -> ImageCopy:
    """Copy an image and its side files into ``folder`` as ``name`` plus lower-case suffix.

    Parameters
    ----------
    source : path-like
        The image file.
    folder : path-like
        Target folder (created if missing).
    name : str
        File stem of the copy; the suffixes are the originals', in lower case.
    sha256 : str, optional
        Expected SHA-256 of the image; a copy that differs is dropped.

    Returns
    -------
    ImageCopy
        The files written; :meth:`ImageCopy.remove` undoes the copy.

    Raises
    ------
    labeler.errors.InputError
        If the image changed while it was copied; nothing is left behind.
    """
    src = Path(source)
    target = Path(folder)
    image = atomic_copy_file(src, target / f"{name}{src.suffix.lower()}", sha256=sha256)
    written: list[Path] = []
    try:
        for side in side_files(src):
            written.append(atomic_copy_file(side, target / f"{name}{side.suffix.lower()}"))
    except BaseException:
        ImageCopy(image, tuple(written)).remove()
        raise
    return ImageCopy(image, tuple(written))


def _stem(name: str) -> str:
    """The file name without its last suffix (``plot-a.tif`` -> ``plot-a``)."""
    return name[: -len(Path(name).suffix)] if Path(name).suffix else name


def files_named(folder: str | os.PathLike[str], name: str) -> list[Path]:
    """The files of image ``name`` in ``folder``: the copy and its side files.

    Exactly ``<name>.<suffix>`` (``plot-a.tif``, ``plot-a.tfw``); ``plot-a-2.tif`` or
    ``plot-a.b.tif`` belong to other images.
    """
    root = Path(folder)
    if not root.is_dir():
        return []
    return sorted(p for p in root.iterdir() if p.suffix and _stem(p.name) == name)


def reserve_image_name(
    folder: str | os.PathLike[str], base: str, *, taken: Collection[str]
) -> tuple[str, Claim]:
    """Claim a free image name in ``folder``: ``base``, else ``base-2``, ``base-3``, ...

    A name is free when no stored image has it (``taken``), no file of that name is in
    the folder and no other add holds it.

    Parameters
    ----------
    folder : path-like
        The project's ``images/`` folder (created if missing).
    base : str
        The wanted name (already made safe for a file name).
    taken : collection of str
        Names of the images in the store.

    Returns
    -------
    name : str
    claim : Claim
        Held until the image is in the store (or its add failed); release it then.
    """
    root = Path(folder)
    root.mkdir(parents=True, exist_ok=True)
    name, i = base, 2
    while True:
        if name not in taken and not files_named(root, name):
            held = claim(root / f"{CLAIM_PREFIX}{name}", text=f"labeler add of image {name}\n")
            if held is not None:
                return name, held
        name, i = f"{base}-{i}", i + 1


def remove_leftovers(
    folder: str | os.PathLike[str], *, stored: Callable[[], Collection[str]]
) -> list[Path]:
    """Remove what killed adds left in ``folder``; files of live adds are not touched.

    For every claim no running process holds: when its image is not in the store, the
    image's files (a copy that was renamed into place before the kill) are deleted; the
    claim is deleted either way. Temporary copies (``.part``) are deleted unless a live
    add holds their image's name.

    Parameters
    ----------
    folder : path-like
        The project's ``images/`` folder.
    stored : callable
        Returns the names of the images in the store (called only when a claim is found).

    Returns
    -------
    list of Path
        The files deleted.
    """
    root = Path(folder)
    if not root.is_dir():
        return []
    entries = [p for p in root.iterdir() if p.name.startswith(".")]
    claims = [
        p for p in entries if p.name.startswith(CLAIM_PREFIX) and not _CLAIM_TMP.match(p.name)
    ]
    live = {p.name[len(CLAIM_PREFIX) :] for p in claims if claim_is_live(p)}
    removed: list[Path] = []
    names: Collection[str] | None = None
    for marker in claims:
        name = marker.name[len(CLAIM_PREFIX) :]
        if name in live:
            continue
        if names is None:
            names = set(stored())
        if name not in names:
            for path in files_named(root, name):
                path.unlink(missing_ok=True)
                removed.append(path)
        marker.unlink(missing_ok=True)
        removed.append(marker)
    for path in entries:
        part = _PART.match(path.name)
        if part and _stem(part.group("target")) not in live:
            path.unlink(missing_ok=True)
            removed.append(path)
        elif _CLAIM_TMP.match(path.name) and not claim_is_live(path):
            path.unlink(missing_ok=True)
            removed.append(path)
    return removed


def root_image_path(sha256: str, suffix: str) -> str:
    """Where an image is kept under an image root, relative to it.

    Parameters
    ----------
    sha256 : str
        The file's SHA-256 (64 hex digits).
    suffix : str
        Its file suffix (``".tif"``); kept in lower case.

    Returns
    -------
    str
        ``"<sha[:2]>/<sha><suffix>"``.

    Raises
    ------
    ValueError
        If ``sha256`` is not 64 hex digits.
    """
    if not re.fullmatch(r"[0-9a-f]{64}", sha256 or ""):
        raise ValueError(f"sha256: expected 64 lower-case hex digits, got {sha256!r}")
    return f"{sha256[:2]}/{sha256}{suffix.lower()}"


def put_in_image_root(
    source: str | os.PathLike[str], root: str | os.PathLike[str], *, sha256: str
) -> tuple[Path, ImageCopy | None]:
    """Copy an image (and its side files) into the image root under its SHA-256.

    Parameters
    ----------
    source : path-like
        The image file, already hashed by the caller.
    root : path-like
        The image root folder.
    sha256 : str
        The file's SHA-256; the copy is checked against it before it is renamed in.

    Returns
    -------
    path : Path
        The image's file under the root.
    copy : ImageCopy or None
        What this call wrote (to undo when the add fails); None when a file of that
        size was already there (another machine put it there: never removed here).

    Raises
    ------
    labeler.errors.InputError
        If the image changed while it was copied; nothing is left behind.
    """
    src = Path(source)
    target = Path(root) / root_image_path(sha256, src.suffix)
    try:
        if target.stat().st_size == src.stat().st_size:
            return target, None
    except FileNotFoundError:
        pass
    copied = copy_image(src, target.parent, sha256, sha256=sha256)
    return copied.image, copied
