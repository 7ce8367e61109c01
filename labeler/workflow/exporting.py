"""Export of masks: GeoJSON, PNG class masks, manifest (``labeler export``)."""

from __future__ import annotations

import os
import warnings
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from affine import Affine

from labeler.classes import UNLABELLED
from labeler.errors import LabelerError
from labeler.export.geojson import (
    NotRFC7946Warning,
    TileInfo,
    image_feature_collection,
    merge_feature_collections,
    write_geojson,
)
from labeler.export.manifest import MANIFEST_NAME, manifest_row, write_manifest
from labeler.export.pngmasks import write_image_masks
from labeler.imagery.read import open_image
from labeler.imagery.tiling import stitch
from labeler.project import Project
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
    """One image's stitched export mask and where each tile's part came from."""

    image: ImageRecord
    mask: np.ndarray  # (H, W) uint8, 255 where no exported tile covers
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
        The stitched (H, W) uint8 mask, the windows and tile details of every part.
    """
    store = project.store
    wanted = set(states)
    masks, windows, infos, tile_states = [], [], [], []
    names = {m.id: m.name for m in store.model_versions()}
    filled = 0
    for tile in store.tiles(image_id=image.id):
        tile_states.append(tile.state)
        ann = None
        if tile.state in wanted:
            ann = store.latest_annotation(tile.id, kind=KIND_FULL)
        if ann is not None:
            masks.append(ann.mask())
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
                masks.append(prop.mask())
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
    mask = stitch(masks, windows, shape=image.shape, fill=UNLABELLED)
    return ImageExport(
        image=image,
        mask=mask,
        windows=windows,
        tiles=infos,
        filled_from_proposals=filled,
        tile_states=tile_states,
    )


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
        Output folder (created if missing).
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
        For an unknown format or state, or images without georeferencing when GeoJSON
        is asked for without ``pixel_coordinates`` (nothing is written then).
    """
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
    folder = Path(out)
    result = ExportResult(folder=folder)
    collections = []
    rows = []
    es = project.settings.export
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
            georef = image.transform is not None and image.crs is not None
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", NotRFC7946Warning)  # the CLI says it once
                coll = image_feature_collection(
                    ex.mask,
                    image=image.name,
                    transform=_transform(image),
                    crs=image.crs,
                    windows=ex.windows,
                    tiles=ex.tiles,
                    schema=project.settings.classes,
                    pixel_coordinates=pixel_coordinates or not georef,
                    simplify_tolerance_px=es.simplify_tolerance_px,
                    min_area_px=es.min_area_px,
                )
            path = write_geojson(folder / "geojson" / f"{image.name}.geojson", coll)
            result.geojson.append(Path(path))
            result = _add(result, features=len(coll["features"]))
            collections.append(coll)
        if do_masks:
            rgb = None
            if previews:
                with open_image(project.image_path(image)) as reader:
                    rgb = reader.read()
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
    if do_geojson and collections:
        merged = merge_feature_collections(collections)
        path = write_geojson(folder / f"{project.root.resolve().name}.geojson", merged)
        result.geojson.append(Path(path))
    if do_masks and rows:
        path = write_manifest(folder / MANIFEST_NAME, rows)
        result = _replace(result, manifest=Path(path))
    progress(len(images), len(images), "done")
    store.log_event(
        "export",
        detail={
            "folder": str(folder),
            "format": formats,
            "images": result.images,
            "proposals": proposals,
        },
    )
    return result


def _add(r: ExportResult, **inc: int) -> ExportResult:
    return _replace(r, **{k: getattr(r, k) + v for k, v in inc.items()})


def _replace(r: ExportResult, **changes) -> ExportResult:
    from dataclasses import replace

    return replace(r, **changes)
