"""Export of masks: GeoJSON, PNG class masks, manifest (``labeler export``)."""

from __future__ import annotations

import contextlib
import os
import warnings
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from affine import Affine

from labeler.classes import UNLABELLED, ClassSchema
from labeler.errors import LabelerError
from labeler.export.footprint import footprint_features
from labeler.export.geojson import NotRFC7946Warning, TileInfo, image_features
from labeler.export.geojson_stream import FeatureCollectionWriter
from labeler.export.manifest import (
    MANIFEST_NAME,
    SOURCE_NONE,
    SOURCE_PROPOSAL,
    SOURCE_SAVED,
    tile_rows,
    write_manifest,
)
from labeler.export.pngmasks import write_image_masks, write_source_layer
from labeler.fileio import check_output_folder, staged_folder
from labeler.imagery.read import open_image
from labeler.imagery.tiling import LazyRaster, StitchedMask, TileLayout
from labeler.project import Project
from labeler.settings import ExportSettings
from labeler.states import (
    ACCEPTED,
    AMENDED,
    HELD,
    IMPORTED,
    KIND_FULL,
    PARKED,
    PROPOSED,
    SETTLED,
    STATES,
    UNSEEN,
)
from labeler.store.records import ImageRecord
from labeler.workflow.progress import Progress, no_progress

__all__ = [
    "EXPORT_FORMATS",
    "DEFAULT_EXPORT_STATES",
    "ImageExport",
    "ExportResult",
    "image_export_mask",
    "export_project",
    "empty_export_hints",
]

EXPORT_FORMATS = ("geojson", "masks", "all")
#: Suffix of an image's source layer next to its mask (``<image>_source.png``).
SOURCE_SUFFIX = "_source"
#: Tile states whose saved masks are exported by default.
DEFAULT_EXPORT_STATES = (ACCEPTED, AMENDED, IMPORTED, SETTLED)


@dataclass(frozen=True)
class ImageExport:
    """One image's export mask and where each tile's part came from.

    ``mask`` is a :class:`~labeler.imagery.tiling.StitchedMask` of shape (H, W), uint8,
    255 where no exported tile covers: it is stitched window by window as it is read
    (``mask[r0:r1]``), so a big image's mask is never held whole. ``source`` is the
    source layer stitched the same way (0 no label, 1 a saved mask, 2 a model proposal).
    """

    image: ImageRecord
    mask: StitchedMask
    source: StitchedMask
    windows: list
    tiles: list[TileInfo]
    filled_from_proposals: int
    tile_states: list[str]


@dataclass(frozen=True)
class ExportResult:
    """What ``labeler export`` wrote."""

    folder: Path
    geojson: list[Path] = field(default_factory=list)
    masks: list[Path] = field(default_factory=list)
    manifest: Path | None = None
    features: int = 0
    footprints: int = 0
    images: int = 0
    tiles_exported: int = 0
    tiles_from_proposals: int = 0
    skipped: list[str] = field(default_factory=list)


def _transform(image: ImageRecord) -> Affine | None:
    return None if image.transform is None else Affine(*image.transform)


def image_export_mask(
    project: Project,
    image: ImageRecord,
    *,
    states: Iterable[str] = DEFAULT_EXPORT_STATES,
    proposals: bool = False,
) -> ImageExport:
    """Stitch the exported mask of one image.

    A tile contributes its newest full mask when the tile's state is in ``states``
    (a settled tile its reviewer's mask). With ``proposals`` every other tile
    contributes its newest model proposal, marked as such, so a field manager gets a
    whole-field map. Tiles contributing nothing are unlabelled (255).

    Parameters
    ----------
    project : Project
        An open project.
    image : ImageRecord
        The image.
    states : iterable of str
        Tile states whose saved masks are exported.
    proposals : bool
        Fill the other tiles with their newest proposal.

    Returns
    -------
    ImageExport
        The (H, W) uint8 mask, stitched when read, the windows and tile details of
        every part. The tiles' masks stay PNG-compressed until a window needs them.
    """
    store = project.store
    wanted = set(states)
    records, windows, infos, tile_states = [], [], [], []
    names = {m.id: m.name for m in store.model_versions()}
    filled = 0
    for tile in store.tiles(image_id=image.id):
        tile_states.append(tile.state)
        ann = None
        if tile.state in wanted:
            ann = store.latest_annotation(tile.id, kind=KIND_FULL)
        if ann is not None:
            records.append(ann)
            windows.append(tile.window)
            mv = None
            if ann.proposal_id is not None:
                mv = names.get(store.proposal(ann.proposal_id).model_version_id)
            infos.append(
                TileInfo(
                    tile_id=str(tile.id),
                    state=tile.state,
                    annotator=ann.annotator,
                    model_version=mv,
                    source="annotation",
                )
            )
            continue
        if proposals:
            prop = store.latest_proposal(tile.id)
            if prop is not None:
                records.append(prop)
                windows.append(tile.window)
                infos.append(
                    TileInfo(
                        tile_id=str(tile.id),
                        state=tile.state,
                        annotator=None,
                        model_version=names.get(prop.model_version_id),
                        source="proposal",
                    )
                )
                filled += 1
    layout = TileLayout(windows, shape=image.shape)
    mask = StitchedMask(layout, lambda k: records[k].mask(), fill=UNLABELLED)
    codes = [SOURCE_PROPOSAL if t.source == "proposal" else SOURCE_SAVED for t in infos]
    source = StitchedMask(
        layout,
        lambda k: np.full((windows[k].height, windows[k].width), codes[k], np.uint8),
        fill=SOURCE_NONE,
    )
    return ImageExport(
        image=image,
        mask=mask,
        source=source,
        windows=windows,
        tiles=infos,
        filled_from_proposals=filled,
        tile_states=tile_states,
    )


def _write_image_geojson(
    path: Path,
    ex: ImageExport,
    merged: FeatureCollectionWriter,
    *,
    pixel_coordinates: bool,
    schema: ClassSchema,
    settings: ExportSettings,
) -> tuple[Path, int, int]:
    """Write one image's GeoJSON file feature batch by batch, and the same into ``merged``.

    Parameters
    ----------
    path : Path
        The image's GeoJSON file.
    ex : ImageExport
        The image's export mask and tiles.
    merged : FeatureCollectionWriter
        The project's GeoJSON file, open.
    pixel_coordinates : bool
        Write pixel positions (also for an image without georeferencing).
    schema : ClassSchema
    settings : ExportSettings
        Simplification tolerance and smallest region.

    Returns
    -------
    path : Path
        The file written.
    count : int
        Its class features.
    footprints : int
        Its ``looked_at`` outlines of saved tiles.
    """
    image = ex.image
    georef = image.transform is not None and image.crs is not None
    pixel = pixel_coordinates or not georef
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", NotRFC7946Warning)  # the CLI says it once
        made = image_features(
            ex.mask,
            image=image.name,
            transform=_transform(image),
            crs=image.crs,
            windows=ex.windows,
            tiles=ex.tiles,
            schema=schema,
            pixel_coordinates=pixel,
            simplify_tolerance_px=settings.simplify_tolerance_px,
            min_area_px=settings.min_area_px,
        )
    looked = footprint_features(
        ex.windows,
        ex.tiles,
        image=image.name,
        shape=image.shape,
        transform=_transform(image),
        crs=image.crs,
        pixel_coordinates=pixel,
    )
    with FeatureCollectionWriter(path, pixel_coordinates=pixel) as out:
        out.write(looked)
        merged.write(looked)
        for batch in made.batches():
            out.write(batch)
            merged.write(batch)
    return path, out.count - len(looked), len(looked)


def export_project(
    project: Project,
    out: str | os.PathLike[str],
    *,
    formats: str = "all",
    states: Sequence[str] = DEFAULT_EXPORT_STATES,
    proposals: bool = False,
    pixel_coordinates: bool = False,
    previews: bool = True,
    progress: Progress = no_progress,
) -> ExportResult:
    """Export the project's masks.

    Writes into ``out``: ``geojson/<image>.geojson`` per image and ``<project>.geojson``
    for the whole project (RFC 7946: WGS 84 longitude/latitude), and/or
    ``masks/<image>.png`` (single-channel class indices, 255 unlabelled) with
    ``masks/<image>_preview.png``, ``masks/<image>_source.png`` when proposals filled
    tiles (per pixel: 0 no label, 1 a saved mask, 2 a model proposal) and
    ``manifest.jsonl`` (one JSON object per exported tile, with its train/val side:
    :mod:`labeler.export.manifest`). The GeoJSON holds a ``looked_at`` outline of every
    saved tile besides the class polygons (:mod:`labeler.export.footprint`).

    Parameters
    ----------
    project : Project
        An open project.
    out : path-like
        Output folder (created if missing; files of an earlier export with the same
        names are replaced, others kept). Everything is written into a staging folder
        beside it first and moved into place at the end, so a failure half-way (a full
        disk) leaves ``out`` as it was.
    formats : {"geojson", "masks", "all"}
        What to write.
    states : sequence of str
        Tile states whose saved masks are exported.
    proposals : bool
        Fill tiles without an exported mask with their newest proposal (marked
        ``"source": "proposal"`` in the GeoJSON and the manifest, and per pixel in the
        source layer). Without it no proposal pixel is exported.
    pixel_coordinates : bool
        Allow images without georeferencing in GeoJSON, in pixel positions (such a
        file is NOT RFC 7946 GeoJSON).
    previews : bool
        Write the colour previews beside the PNG masks.
    progress : Progress
        Called as ``progress(done, total, label)`` per image.

    Returns
    -------
    ExportResult
        The files written and the counts of features, images and tiles.

    Raises
    ------
    LabelerError
        For an unknown format or state, ``out`` that is a file or lies under one, or
        images without georeferencing when GeoJSON is asked for without
        ``pixel_coordinates`` (nothing is written then).
    """
    folder = check_output_folder(out, what="--out")
    with staged_folder(folder) as stage:
        staged = _write_export(
            project,
            stage,
            formats=formats,
            states=states,
            proposals=proposals,
            pixel_coordinates=pixel_coordinates,
            previews=previews,
            progress=progress,
        )
    result = _replace(
        staged,
        folder=folder,
        geojson=[folder / p.relative_to(stage) for p in staged.geojson],
        masks=[folder / p.relative_to(stage) for p in staged.masks],
        manifest=None if staged.manifest is None else folder / staged.manifest.relative_to(stage),
    )
    if not project.store.read_only:  # a read-only project can still be exported elsewhere
        project.store.log_event(
            "export",
            detail={
                "folder": str(folder),
                "format": formats,
                "images": result.images,
                "proposals": proposals,
            },
        )
    return result


def _write_export(
    project: Project,
    folder: Path,
    *,
    formats: str,
    states: Sequence[str],
    proposals: bool,
    pixel_coordinates: bool,
    previews: bool,
    progress: Progress,
) -> ExportResult:
    """The body of :func:`export_project`: write every file into ``folder``."""
    if formats not in EXPORT_FORMATS:
        raise LabelerError(
            f"--format: expected one of {', '.join(EXPORT_FORMATS)}, got {formats!r}"
        )
    bad = [s for s in states if s not in STATES]
    if bad:
        raise LabelerError(
            f"--states: unknown state(s) {', '.join(bad)}; known: {', '.join(STATES)}"
        )
    store = project.store
    images = store.images()
    do_geojson = formats in ("geojson", "all")
    do_masks = formats in ("masks", "all")
    if do_geojson and not pixel_coordinates:
        plain = [im.name for im in images if im.transform is None or im.crs is None]
        if plain:
            raise LabelerError(
                f"images without georeferencing (no CRS or transform): {', '.join(plain)}; GeoJSON needs "
                "one. Pass --pixel-coordinates to write pixel positions (not RFC 7946 GeoJSON), or "
                "--format masks"
            )
    result = ExportResult(folder=folder)
    rows = []
    es = project.settings.export
    with contextlib.ExitStack() as whole:
        # the project's GeoJSON is written feature by feature beside the images' files,
        # opened with the first image that has features to give
        merged: FeatureCollectionWriter | None = None
        for n, image in enumerate(images):
            progress(n, len(images), image.name)
            ex = image_export_mask(project, image, states=states, proposals=proposals)
            result_tiles = len(ex.tiles)
            if result_tiles == 0:
                result.skipped.append(image.name)
                continue
            result = _add(
                result,
                images=1,
                tiles_exported=result_tiles,
                tiles_from_proposals=ex.filled_from_proposals,
            )
            if do_geojson:
                if merged is None:
                    merged = whole.enter_context(
                        FeatureCollectionWriter(
                            folder / f"{project.root.resolve().name}.geojson",
                            pixel_coordinates=pixel_coordinates,
                        )
                    )
                path, count, looked = _write_image_geojson(
                    folder / "geojson" / f"{image.name}.geojson",
                    ex,
                    merged,
                    pixel_coordinates=pixel_coordinates,
                    schema=project.settings.classes,
                    settings=es,
                )
                result.geojson.append(path)
                result = _add(result, features=count, footprints=looked)
            if do_masks:
                with contextlib.ExitStack() as stack:
                    rgb = None
                    if previews:
                        reader = stack.enter_context(open_image(project.image_path(image)))
                        rgb = LazyRaster(reader.read, shape=(*reader.info.shape, 3))
                    files = write_image_masks(
                        folder / "masks",
                        image.name,
                        ex.mask,
                        schema=project.settings.classes,
                        image=rgb,
                        opacity=project.settings.editor.opacity,
                    )
                result.masks.append(Path(files.mask))
                source_path = None
                if ex.filled_from_proposals:
                    source_path = write_source_layer(
                        folder / "masks" / f"{image.name}{SOURCE_SUFFIX}.png", ex.source
                    )
                    result.masks.append(source_path)
                rows.extend(
                    tile_rows(
                        image_path=project.image_path(image),
                        mask_path=files.mask,
                        manifest_dir=folder,
                        mask=ex.mask,
                        windows=ex.windows,
                        tiles=ex.tiles,
                        image_sha256=image.sha256,
                        source=None if source_path is None else ex.source,
                        source_path=source_path,
                        schema=project.settings.classes,
                        block_px=es.block_tiles * project.settings.tiles.size,
                        seed=es.seed,
                        val_share=es.val_share,
                    )
                )
    if merged is not None:
        result.geojson.append(merged.path)
    if do_masks and rows:
        path = write_manifest(folder / MANIFEST_NAME, rows)
        result = _replace(result, manifest=Path(path))
    progress(len(images), len(images), "done")
    return result


def empty_export_hints(states: Sequence[str], *, proposals: bool) -> list[str]:
    """What to try when an export wrote nothing, for the states and options asked.

    Parameters
    ----------
    states : sequence of str
        The ``--states`` asked for.
    proposals : bool
        Whether ``--proposals`` was given.

    Returns
    -------
    list of str
        One sentence each; empty when there is nothing to suggest.
    """
    unsaved = [s for s in states if s in (UNSEEN, PROPOSED, HELD, PARKED)]
    hints = []
    if unsaved and not proposals:
        hints.append(
            f"tiles in state {', '.join(unsaved)} have no saved mask, so they export nothing; "
            "add --proposals to export their model proposals (marked as such), or save them "
            "first (labeler queue, labeler edit)"
        )
    if not any(s in DEFAULT_EXPORT_STATES for s in states):
        hints.append(
            "saved masks are in the states " + ", ".join(DEFAULT_EXPORT_STATES)
            + " (the default --states); `labeler status` shows how many tiles each state has"
        )
    return hints


def _add(r: ExportResult, **inc: int) -> ExportResult:
    return _replace(r, **{k: getattr(r, k) + v for k, v in inc.items()})


def _replace(r: ExportResult, **changes) -> ExportResult:
    from dataclasses import replace

    return replace(r, **changes)
