"""Adding images to a project (``labeler add``).

Each image is all or nothing: its format is checked from its bytes, every tile window is
read once (a damaged file is found now, not in the middle of labelling), the file is copied
into ``images/`` by :func:`labeler.imagery.intake.copy_image` and the image and its tiles
are written to the store in one transaction; a failure removes the copy again.

A team sets an image root (``store.image_root``, a folder every machine mounts): the
file is then copied there under its SHA-256 (:func:`labeler.imagery.intake.
put_in_image_root`) and found there by every machine. The SHA-256 is read once, in
chunks, and kept with the file's size; an image is "already in the project" only when a
stored image has the same SHA-256, and when this machine cannot reach the stored copy,
the file given is put under the root for the team.

Capture dates. Images of the same ground from different dates give ``labeler adapt``
its revisit pairs. An image's capture date is the one given (``labeler add --date``), else
the date its TIFF/EXIF tags give (:func:`labeler.imagery.capture_date.read_capture_time`);
it is kept in the event log as a ``capture_date`` event (detail: image id, ISO date and
where it came from), so the tables stay as they are; the newest such event of an image
holds (:func:`capture_dates`). Adding an image that is already present with ``--date``
records the new date for it.
"""

from __future__ import annotations

import os
import re
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import date
from pathlib import Path

from labeler.errors import InputError, LabelerError
from labeler.fileio import sha256_file
from labeler.imagery.capture_date import read_capture_time
from labeler.imagery.intake import (
    ROOT_PREFIX,
    ImageCopy,
    copy_image,
    put_in_image_root,
    reserve_image_name,
)
from labeler.imagery.read import open_image
from labeler.imagery.tiling import tile_grid
from labeler.project import Project
from labeler.store import NewImage
from labeler.workflow.progress import Progress, no_progress

__all__ = ["CAPTURE_EVENT", "AddResult", "add_images", "capture_dates", "set_capture_date"]

#: Event kind that records an image's capture date.
CAPTURE_EVENT = "capture_date"


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
    captured : date or None
        The capture date recorded for it (None: neither given nor in its tags).
    date_source : str
        ``"given"``, the tag it came from (``"DateTimeOriginal"``, ...) or ``""``.
    """

    path: Path
    status: str
    name: str
    tiles: int = 0
    message: str = ""
    captured: date | None = None
    date_source: str = ""


def set_capture_date(project: Project, image_id: int, captured: date, *, source: str) -> None:
    """Record the capture date of an image (the newest record holds).

    Parameters
    ----------
    project : Project
        An open project.
    image_id : int
        The image.
    captured : date
        The day it was taken.
    source : str
        Where the date came from (``"given"`` or a tag name).
    """
    project.store.log_event(
        CAPTURE_EVENT,
        detail={"image_id": int(image_id), "date": captured.isoformat(), "source": source},
    )


def capture_dates(project: Project) -> dict[int, date]:
    """The capture date of every image that has one.

    Parameters
    ----------
    project : Project
        An open project.

    Returns
    -------
    dict of int -> date
        Image id to its newest recorded capture date.
    """
    out: dict[int, date] = {}
    for e in project.store.events(kind=CAPTURE_EVENT):
        d = e.detail or {}
        try:
            out[int(d["image_id"])] = date.fromisoformat(str(d["date"]))
        except (KeyError, TypeError, ValueError):
            continue  # a damaged record gives no date
    return out


def _tag_date(path: Path) -> tuple[date | None, str]:
    try:
        found = read_capture_time(path)
    except InputError:  # tags unreadable by Pillow: no date from them
        return None, ""
    return (None, "") if found is None else (found.when.date(), found.tag)


def add_images(
    project: Project,
    paths: Sequence[str | os.PathLike[str]],
    *,
    copy: bool = True,
    keep_going: bool = False,
    on_result: Callable[[AddResult], None] | None = None,
    captured: date | None = None,
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
    captured : date, optional
        The capture date of every image given (``labeler add --date``); default the
        date each image's TIFF/EXIF tags give, if any. Also recorded for an image that
        is already present.
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
                project,
                src,
                copy=copy,
                known=known,
                n=n,
                total=len(paths),
                captured=captured,
                progress=progress,
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
    captured: date | None,
    progress: Progress,
) -> AddResult:
    """Add one image (all or nothing); ``known`` gets its name."""
    settings = project.settings
    store = project.store
    # the header's size against tiles.max_image_px, before any tile is made
    with open_image(src, max_pixels=settings.tiles.max_image_px) as reader:
        info = reader.info
        sha = sha256_file(src)
        size = src.stat().st_size
        existing = store.image_by_sha(sha)
        if existing is not None:
            if captured is not None:
                set_capture_date(project, existing.id, captured, source="given")
            shared = _share_missing(project, existing, src)
            return AddResult(
                src,
                "skipped",
                existing.name,
                message=f"{src}: already in the project as {existing.name!r} (same content)"
                + ("; put under the shared image root for the team" if shared else ""),
                captured=captured,
                date_source="given" if captured is not None else "",
            )
        windows = tile_grid(
            info.height, info.width, size=settings.tiles.size, overlap=settings.tiles.overlap
        )
        for k, w in enumerate(windows):
            reader.read(w)
            progress(n, total, f"{src.name}: checked tile {k + 1}/{len(windows)}")
    # the date before anything is stored: an unreadable tag block leaves no half-added image
    when, source = (captured, "given") if captured is not None else _tag_date(src)
    # the name is claimed until the image is in the store: no other add takes it, and
    # what a killed add leaves is found by the claim (labeler.imagery.intake)
    name, claimed = reserve_image_name(project.images_dir, _safe_name(src.stem), taken=known)
    with claimed:
        copied: ImageCopy | None = None
        stored_path = str(src.resolve())
        root = project.image_root
        if copy and root is not None:
            kept, copied = put_in_image_root(src, root, sha256=sha)
            stored_path = ROOT_PREFIX + kept.relative_to(root).as_posix()
        elif copy:
            copied = copy_image(src, project.images_dir, name, sha256=sha)
            stored_path = str(copied.image.relative_to(project.root))
        g = info.georef
        try:
            record = store.add_image(
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
                    size=size,
                ),
                windows,
                overlap_share=settings.agreement.overlap_share,
                overlap_seed=settings.picker.seed,
            )
        except BaseException:
            # a copy under the root is the team's once a stored image names its content
            if copied is not None and (root is None or store.image_by_sha(sha) is None):
                copied.remove()
            raise
    known.add(name)
    if when is not None:
        set_capture_date(project, record.id, when, source=source)
    return AddResult(src, "added", name, tiles=len(windows), captured=when, date_source=source)


def _share_missing(project: Project, image, src: Path) -> bool:
    """Put ``src`` under the image root when this machine cannot reach ``image``'s file.

    ``src`` has the stored image's SHA-256 (the caller checked). Returns True when a
    copy was made.
    """
    root = project.image_root
    if root is None or project.read_only:
        return False
    try:
        if project.image_path(image).is_file():
            return False  # reachable and unchanged
    except InputError:
        pass
    if not (image.path.startswith(ROOT_PREFIX) or not Path(image.path).is_absolute()):
        return False  # an in-place file elsewhere: the team must put it back itself
    _, copied = put_in_image_root(src, root, sha256=image.sha256)
    return copied is not None
