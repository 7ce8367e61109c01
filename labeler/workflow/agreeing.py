"""Inter-annotator agreement of a project (``labeler agreement``) and contested tiles."""

from __future__ import annotations

import contextlib
import os
from collections import defaultdict
from datetime import date, datetime
from pathlib import Path

import numpy as np

from labeler.agreement import AgreementSummary, ComparedImage, summarise_agreement
from labeler.export.report import OverlaySource, ReportFiles, write_agreement_report
from labeler.imagery.read import open_image
from labeler.imagery.tiling import LazyRaster, StitchedMask, TileLayout
from labeler.project import Project
from labeler.states import CONTESTED, KIND_FULL, SETTLED
from labeler.workflow.annotating import QueueRow, queue_rows
from labeler.workflow.progress import Progress, no_progress

__all__ = ["compared_images", "agreement_summary", "write_agreement", "contested_tiles"]


def compared_images(project: Project) -> list[ComparedImage]:
    """Every image that two or more annotators labelled, with their stitched masks.

    The masks are :class:`~labeler.imagery.tiling.StitchedMask` objects: stitched
    window by window as they are read (``mask[r0:r1]``), never whole, the tile masks
    kept PNG-compressed until a window needs them.

    Each annotator's mask of an image is stitched from their newest full mask of every
    tile they saved (imported masks count like any other; a reviewer's settled masks
    do not, they are decisions, not opinions). Pixels of tiles an annotator did not
    save are unlabelled (255) in that annotator's mask, so pair figures pool exactly
    the image pixels both labelled, each once.

    Parameters
    ----------
    project : Project
        An open project.

    Returns
    -------
    list of ComparedImage
        In image order; images with fewer than two annotators are left out.
    """
    store = project.store
    tiles = {t.id: t for t in store.tiles()}
    newest: dict[tuple[int, str], object] = {}
    for a in store.annotations(kind=KIND_FULL):
        if a.state == SETTLED:
            continue
        newest[(a.tile_id, a.annotator)] = a  # oldest first: the last one wins
    per_image: dict[int, dict[str, list]] = defaultdict(lambda: defaultdict(list))
    for (tile_id, who), ann in newest.items():
        per_image[tiles[tile_id].image_id][who].append(ann)
    out = []
    for image in store.images():
        by_who = per_image.get(image.id, {})
        if len(by_who) < 2:
            continue
        masks, saved_at, tile_windows = {}, {}, {}
        for who, anns in by_who.items():
            windows = [tiles[a.tile_id].window for a in anns]
            masks[who] = StitchedMask(
                TileLayout(windows, shape=image.shape), lambda k, anns=anns: anns[k].mask()
            )
            saved_at[who] = max(a.created_at for a in anns)
            for a in anns:
                tile_windows[str(a.tile_id)] = tiles[a.tile_id].window
        out.append(
            ComparedImage(image=image.name, masks=masks, saved_at=saved_at, tiles=tile_windows)
        )
    return out


def _summarise(
    project: Project,
    items: list[ComparedImage],
    since: date | datetime | None,
    progress: Progress,
) -> AgreementSummary:
    return summarise_agreement(
        items,
        schema=project.settings.classes,
        metric=project.settings.agreement.metric,
        since=since,
        progress=lambda done, total: progress(done, total, "comparing masks"),
    )


def agreement_summary(
    project: Project, *, since: date | datetime | None = None, progress: Progress = no_progress
) -> AgreementSummary:
    """Agreement figures of the project: per annotator pair, class, image, tile and day.

    Parameters
    ----------
    project : Project
        An open project.
    since : date or datetime, optional
        Only pairs whose later save is on or after this day or moment count.
    progress : Progress
        Called as ``progress(done, total, label)`` over the images compared.

    Returns
    -------
    AgreementSummary
        Cohen's kappa with its Landis & Koch band and IoU per pair and class, pooled and
        per image, tile and day; the metric of the ``agreement.metric`` setting.
    """
    return _summarise(project, compared_images(project), since, progress)


def write_agreement(
    project: Project,
    out_dir: str | os.PathLike[str],
    *,
    since: date | datetime | None = None,
    least: int = 10,
    progress: Progress = no_progress,
) -> tuple[AgreementSummary, ReportFiles]:
    """Compute the summary and write the HTML report, plots and CSV into ``out_dir``.

    Parameters
    ----------
    project : Project
        An open project.
    out_dir : path-like
        Report folder (created if missing); its files are replaced atomically.
    since : date or datetime, optional
        Only pairs whose later save is on or after this day or moment count.
    least : int
        How many least-agreed images the report shows side by side.
    progress : Progress
        Called as ``progress(done, total, label)``.

    Returns
    -------
    summary : AgreementSummary
        The figures (as :func:`agreement_summary`).
    files : ReportFiles
        Paths of the HTML report, the CSV and the plots.
    """
    items = compared_images(project)
    summary = _summarise(project, items, since, progress)
    wanted = {e.image for e in summary.least_agreed(least)}
    by_name = {im.name: im for im in project.store.images()}
    overlays = {}
    with contextlib.ExitStack() as stack:  # images read by window while the report draws
        for item in items:
            if item.image in wanted:
                reader = stack.enter_context(open_image(project.image_path(by_name[item.image])))
                rgb = LazyRaster(reader.read, shape=(*reader.info.shape, 3))
                overlays[item.image] = OverlaySource(rgb=rgb, masks=dict(item.masks))
        files = write_agreement_report(
            summary, Path(out_dir), schema=project.settings.classes, overlays=overlays, least=least
        )
    return summary, files


def contested_tiles(project: Project) -> list[QueueRow]:
    """Queue rows of the tiles a reviewer must settle, least agreed first.

    Parameters
    ----------
    project : Project
        An open project.

    Returns
    -------
    list of QueueRow
        The ``contested`` tiles, lowest agreement first (unknown agreement last).
    """
    rows = [r for r in queue_rows(project) if r.state == CONTESTED]
    rows.sort(key=lambda r: (np.inf if r.agreement is None else r.agreement, r.tile_id))
    return rows
