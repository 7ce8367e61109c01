"""Bringing an image file into a project folder: the copy and its georeferencing side files.

A PNG or JPEG is georeferenced by a world file (``.pgw``, ``.jgw``, ``.wld``, ...) and a
``.prj`` beside it; the copy keeps them, renamed after the copy, so that the copy reads
with the same georeferencing as the original. Every file is written atomically
(:func:`labeler.fileio.atomic_copy_file`), and the image copy is checked against the
hash the caller read before it is renamed into place.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

from labeler.fileio import atomic_copy_file
from labeler.imagery.georef import find_world_file

__all__ = ["ImageCopy", "side_files", "copy_image"]


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
