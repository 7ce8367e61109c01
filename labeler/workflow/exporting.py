"""Export of masks: GeoJSON, PNG class masks, manifest (``labeler export``)."""

from __future__ import annotations

import contextlib
import os
import warnings
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

from affine import Affine

from labeler.classes import UNLABELLED, ClassSchema
from labeler.errors import LabelerError
from labeler.export.geojson import NotRFC7946Warning, TileInfo, image_features
from labeler.export.geojson_stream import FeatureCollectionWriter
from labeler.export.manifest import MANIFEST_NAME, manifest_row, write_manifest
from labeler.export.pngmasks import write_image_masks
from labeler.fileio import check_output_folder, staged_folder
from labeler.imagery.read import open_image
from labeler.imagery.tiling import LazyRaster, StitchedMask, TileLayout
from labeler.project import Project
from labeler.settings import ExportSettings
from labeler.states import ACCEPTED, AMENDED, IMPORTED, KIND_FULL, SETTLED, STATES
from labeler.store.records import ImageRecord
from labeler.workflow.progress import Progress, no_progress

__all__ = [
    "EXPORT_FORMATS",
    "DEFAULT_EXPORT_STATES",
    "ImageExport",
    "ExportResult",
    "image_export_mask",
    "export_project",
]

EXPORT_FORMATS = ("geojson", "masks", "all")
#: Tile states whose saved masks are exported by default.
DEFAULT_EXPORT_STATES = (ACCEPTED, AMENDED, IMPORTED, SETTLED)


@dataclass(frozen=True)
class ImageExport:
    """One image's export mask and where each tile's part came from.

    ``mask`` is a :class:`~labeler.imagery.tiling.StitchedMask` of shape (H, W), uint8,
    255 where no exported tile covers: it is stitched window by window as it is read
    (``mask[r0:r1]``), so a big image's mask is never held whole.
    """

    image: ImageRecord
    mask: StitchedMask
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
    return ImageExport(
        image=image,
        mask=mask,
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
) -> tuple[Path, int]:
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
        Its features.
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
    with FeatureCollectionWriter(path, pixel_coordinates=pixel) as out:
        for batch in made.batches():
            out.write(batch)
            merged.write(batch)
    return path, out.count


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
    ``masks/<image>_preview.png`` and ``manifest.jsonl`` (one JSON object per image).

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
        ``"source": "proposal"`` in the GeoJSON and the manifest).
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
                path, count = _write_image_geojson(
                    folder / "geojson" / f"{image.name}.geojson",
                    ex,
                    merged,
                    pixel_coordinates=pixel_coordinates,
                    schema=project.settings.classes,
                    settings=es,
                )
                result.geojson.append(path)
                result = _add(result, features=count)
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
                rows.append(
                    manifest_row(
                        image_path=project.image_path(image),
                        mask_path=files.mask,
                        manifest_dir=folder,
                        mask=ex.mask,
                        image_sha256=image.sha256,
                        schema=project.settings.classes,
                        tile_states=ex.tile_states,
                        filled_from_proposals=ex.filled_from_proposals,
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


def _add(r: ExportResult, **inc: int) -> ExportResult:
    return _replace(r, **{k: getattr(r, k) + v for k, v in inc.items()})


def _replace(r: ExportResult, **changes) -> ExportResult:
    from dataclasses import replace

    return replace(r, **changes)
