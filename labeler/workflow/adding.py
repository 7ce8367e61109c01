"""Adding images to a project (``labeler add``).

Each image is all or nothing: its format is checked from its bytes, every tile window is
read once (a damaged file is found now, not in the middle of labelling), the file is copied
into ``images/`` by :func:`labeler.imagery.intake.copy_image` and the image and its tiles
are written to the store in one transaction; a failure removes the copy again.
"""

from __future__ import annotations

import os
import re
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path

from labeler.errors import InputError, LabelerError
from labeler.fileio import sha256_file
from labeler.imagery.intake import ImageCopy, copy_image, reserve_image_name
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
    status : {"added", "skipped", "failed"}
        ``skipped`` when the same content is already in the project; ``failed`` when the
        file cannot be used (only with ``keep_going``; nothing of it was kept).
    name : str
        The image's name in the project (of the earlier copy when skipped).
    tiles : int
        Tiles cut from it (0 when skipped).
    message : str
        Why it was skipped, or the one-line error of a failed image.
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
    keep_going: bool = False,
    on_result: Callable[[AddResult], None] | None = None,
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
    keep_going : bool
        An image that cannot be used (:class:`InputError`) is reported as a ``failed``
        result and the next one is added; by default the first one raises.
    on_result : callable, optional
        Called with each result as soon as it is known (so a caller can report what was
        added even when a later image stops the run with an error).
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
        For the first image that cannot be used (unless ``keep_going``); images before it
        stay added, the failing one leaves no trace (no copy, no rows).
    LabelerError
        If the project is read-only for this user.
    """
    if project.read_only:
        raise LabelerError(
            f"{project.root}: the project is read-only for you (its labeler.db cannot be "
            "written); adding images needs write access: ask its owner for it, or work on a "
            "copy of the project folder"
        )
    results: list[AddResult] = []
    known = {im.name for im in project.store.images()}

    def report(result: AddResult) -> None:
        results.append(result)
        if on_result is not None:
            on_result(result)

    for n, raw in enumerate(paths):
        src = Path(raw)
        try:
            result = _add_one(
                project, src, copy=copy, known=known, n=n, total=len(paths), progress=progress
            )
        except InputError as exc:
            if not keep_going:
                raise
            result = AddResult(src, "failed", "", message=str(exc))
        report(result)
        progress(n + 1, len(paths), src.name)
    return results


def _add_one(
    project: Project,
    src: Path,
    *,
    copy: bool,
    known: set[str],
    n: int,
    total: int,
    progress: Progress,
) -> AddResult:
    """Add one image (all or nothing); ``known`` gets its name."""
    settings = project.settings
    store = project.store
    # the header's size against tiles.max_image_px, before any tile is made
    with open_image(src, max_pixels=settings.tiles.max_image_px) as reader:
        info = reader.info
        sha = sha256_file(src)
        existing = store.image_by_sha(sha)
        if existing is not None:
            return AddResult(
                src,
                "skipped",
                existing.name,
                message=f"{src}: already in the project as {existing.name!r} (same content)",
            )
        windows = tile_grid(
            info.height, info.width, size=settings.tiles.size, overlap=settings.tiles.overlap
        )
        for k, w in enumerate(windows):
            reader.read(w)
            progress(n, total, f"{src.name}: checked tile {k + 1}/{len(windows)}")
    # the name is claimed until the image is in the store: no other add takes it, and
    # what a killed add leaves is found by the claim (labeler.imagery.intake)
    name, claimed = reserve_image_name(project.images_dir, _safe_name(src.stem), taken=known)
    with claimed:
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
    return AddResult(src, "added", name, tiles=len(windows))
