"""Mask files given to an import: which paths are read, and which image each belongs to.

A mask file must be a regular file (not a folder, pipe, device or socket: reading a pipe
or a device could wait for ever or never end), with a name that prints on one line (no
control characters, valid UTF-8), with one of the extensions of
:data:`MASK_FILE_EXTENSIONS`. Its name ties it to an image of the project
(:func:`match_mask_to_image`). Readers of mask files share one way of being read, a band
of rows at a time (:class:`MaskSource`).
"""

from __future__ import annotations

import difflib
import os
import stat
from collections.abc import Iterable
from pathlib import Path
from typing import Protocol

import numpy as np

from labeler.errors import MaskImportError

__all__ = [
    "MASK_NAME_SUFFIXES",
    "MASK_FILE_EXTENSIONS",
    "MaskSource",
    "check_mask_path",
    "match_mask_to_image",
]

#: Name endings that tie a mask file to the image ``<stem>``: ``<stem>.png``,
#: ``<stem>_mask.png``, ``<stem>_annotation.png`` (and the same with ``.geojson``).
MASK_NAME_SUFFIXES = ("", "_mask", "_annotation")
#: File extensions read as masks.
MASK_FILE_EXTENSIONS = (".png", ".geojson", ".json")


class MaskSource(Protocol):
    """A mask file opened for reading, checked against its image's size.

    Attributes
    ----------
    path : Path
        The file.
    shape : (int, int)
        ``(height, width)`` of the mask, equal to its image's.
    """

    path: Path
    shape: tuple[int, int]

    def read_rows(self, start: int, stop: int) -> np.ndarray:
        """The checked class mask of rows ``[start, stop)``, (rows, width) uint8."""
        ...  # pragma: no cover - a protocol

    def close(self) -> None:
        """Release the file."""
        ...  # pragma: no cover - a protocol


def check_mask_path(path: str | os.PathLike[str]) -> int:
    """Refuse a mask path that is not an existing regular file; return its size in bytes.

    Parameters
    ----------
    path : path-like

    Returns
    -------
    int
        The file's size in bytes.

    Raises
    ------
    MaskImportError
        Naming the path: a name with control characters or not UTF-8 (it could not be
        shown on one line), missing, a folder, a pipe, device or socket, or not readable.
    """
    p = Path(path)
    text = str(p)
    if any(ord(ch) < 32 or ord(ch) == 127 for ch in text):
        raise MaskImportError(
            f"{text!r}: a file name with control characters (newline, tab, ...) is not read; "
            "rename the file"
        )
    try:
        text.encode("utf-8")
    except UnicodeEncodeError:
        raise MaskImportError(
            f"{text!r}: the file name is not valid UTF-8 text; rename the file"
        ) from None
    try:
        st = p.stat()
    except FileNotFoundError:
        raise MaskImportError(f"{p}: no such file") from None
    except OSError as err:
        raise MaskImportError(f"{p}: cannot be read ({err.strerror or err})") from None
    if stat.S_ISDIR(st.st_mode):
        raise MaskImportError(
            f"{p}: is a folder, not a mask file; name the mask files in it "
            f"(e.g. {p / '*.png'})"
        )
    if not stat.S_ISREG(st.st_mode):
        raise MaskImportError(
            f"{p}: not a regular file (a pipe, device or socket); save the mask to a file "
            "and import that"
        )
    if not os.access(p, os.R_OK):
        raise MaskImportError(f"{p}: cannot be read (permission denied); check its permissions")
    return int(st.st_size)


def match_mask_to_image(mask_path: str | os.PathLike[str], image_stems: Iterable[str]) -> str:
    """The image a mask file belongs to, by name.

    ``<stem>.png``, ``<stem>_mask.png`` and ``<stem>_annotation.png`` (or ``.geojson`` /
    ``.json``) belong to the image ``<stem>``.

    Parameters
    ----------
    mask_path : path
        The mask file (only its name is used).
    image_stems : iterable of str
        File names of the project's images without extension.

    Returns
    -------
    stem : str

    Raises
    ------
    MaskImportError
        When no image or more than one image matches; the message lists the candidates.
    """
    path = Path(mask_path)
    stems = sorted(set(image_stems))
    ext = path.suffix.lower()
    if ext not in MASK_FILE_EXTENSIONS:
        raise MaskImportError(
            f"{path}: expected a mask file ending in {', '.join(MASK_FILE_EXTENSIONS)}, "
            f"got {path.suffix or 'no extension'!r}"
        )
    base = path.name[: -len(path.suffix)]
    tried: list[str] = []
    for suffix in MASK_NAME_SUFFIXES:
        if suffix == "":
            tried.append(base)
        elif base.endswith(suffix) and len(base) > len(suffix):
            tried.append(base[: -len(suffix)])
    known = set(stems)
    matches = [s for s in dict.fromkeys(tried) if s in known]
    if len(matches) == 1:
        return matches[0]
    if matches:
        raise MaskImportError(
            f"{path}: the name fits several images ({', '.join(matches)}); rename the file "
            "or name the image explicitly"
        )
    close = difflib.get_close_matches(base, stems, n=5, cutoff=0.6)
    hint = f"; similar image names: {', '.join(close)}" if close else ""
    raise MaskImportError(
        f"{path}: no image of the project is called {' or '.join(repr(t) for t in tried)} "
        f"(a mask is named <image>.png, <image>_mask.png or <image>_annotation.png){hint}"
    )
