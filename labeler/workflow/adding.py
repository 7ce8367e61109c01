"""Adding images to a project (``labeler add``).

Each image is all or nothing: its format is checked from its bytes, every tile window is
read once (a damaged file is found now, not in the middle of labelling), the file is copied
into ``images/`` by :func:`labeler.imagery.intake.copy_image` and the image and its tiles
are written to the store in one transaction; a failure removes the copy again.
"""

from __future__ import annotations

import os
import re
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

from labeler.fileio import sha256_file
from labeler.imagery.intake import ImageCopy, copy_image
from labeler.imagery.read import open_image
from labeler.imagery.tiling import tile_grid
from labeler.project import Project
from labeler.store import NewImage
from labeler.workflow.progress import Progress, no_progress

__all__ = ["AddResult", "add_images"]


def _safe_name(stem: str) -> str:
    name = re.sub(r"[^A-Za-z0-9._-]+", "_", stem).strip("._") or "image"
    return name[:200]


@dataclass(frozen=True)
class AddResult:
    """What happened to one image given to :func:`add_images`.

    Attributes
    ----------
    path : Path
        The file as given.
    status : {"added", "skipped"}
        ``skipped`` when the same content is already in the project.
    name : str
        The image's name in the project (of the earlier copy when skipped).
    tiles : int
        Tiles cut from it (0 when skipped).
    message : str
        Why it was skipped.
    """

    path: Path
    status: str
    name: str
    tiles: int = 0
    message: str = ""


def add_images(
    project: Project,
    paths: Sequence[str | os.PathLike[str]],
    *,
    copy: bool = True,
    progress: Progress = no_progress,
) -> list[AddResult]:
    """Add images to the project, each all-or-nothing.

    Parameters
    ----------
    project : Project
        An open project.
    paths : sequence of path-like
        PNG, JPEG, TIFF or GeoTIFF files.
    copy : bool
        Copy each file (with its world file and ``.prj``) into the project's ``images/``
        folder (default); ``False`` refers to the file where it is.
    progress : Progress
        Called as ``progress(done, total, label)``.

    Returns
    -------
    list of AddResult
        One per path, in order. An image already present (same SHA-256) is skipped with
        a message.

    Raises
    ------
    InputError
        For the first image that cannot be used; images before it stay added, the
        failing one leaves no trace (no copy, no rows).
    """
    results: list[AddResult] = []
    settings = project.settings
    store = project.store
    known = {im.name for im in store.images()}
    for n, raw in enumerate(paths):
        src = Path(raw)
        # the header's size against tiles.max_image_px, before any tile is made
        with open_image(src, max_pixels=settings.tiles.max_image_px) as reader:
            info = reader.info
            sha = sha256_file(src)
            existing = store.image_by_sha(sha)
            if existing is not None:
                results.append(
                    AddResult(
                        src,
                        "skipped",
                        existing.name,
                        message=f"{src}: already in the project as {existing.name!r} (same content)",
                    )
                )
                progress(n + 1, len(paths), src.name)
                continue
            windows = tile_grid(
                info.height, info.width, size=settings.tiles.size, overlap=settings.tiles.overlap
            )
            for k, w in enumerate(windows):
                reader.read(w)
                progress(n, len(paths), f"{src.name}: checked tile {k + 1}/{len(windows)}")
        base = _safe_name(src.stem)
        name, i = base, 2
        while name in known:
            name, i = f"{base}-{i}", i + 1
        copied: ImageCopy | None = None
        stored_path = str(src.resolve())
        if copy:
            copied = copy_image(src, project.images_dir, name, sha256=sha)
            stored_path = str(copied.image.relative_to(project.root))
        g = info.georef
        try:
            store.add_image(
                NewImage(
                    name=name,
                    path=stored_path,
                    sha256=sha,
                    width=info.width,
                    height=info.height,
                    bands=info.bands,
                    dtype=info.dtype,
                    crs=None if g is None else g.crs,
                    transform=None if g is None else g.coefficients,
                    georef_source=None if g is None else g.source,
                ),
                windows,
                overlap_share=settings.agreement.overlap_share,
                overlap_seed=settings.picker.seed,
            )
        except BaseException:
            if copied is not None:
                copied.remove()
            raise
        known.add(name)
        results.append(AddResult(src, "added", name, tiles=len(windows)))
        progress(n + 1, len(paths), src.name)
    return results
