"""Export (GeoJSON, PNG class masks, manifest) and import of masks (``labeler export/import``)."""

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
from labeler.export.importing import match_mask_to_image, read_mask_file
from labeler.export.manifest import MANIFEST_NAME, manifest_row, write_manifest
from labeler.export.pngmasks import write_image_masks
from labeler.imagery.read import open_image
from labeler.imagery.tiling import stitch
from labeler.project import Project
from labeler.states import (
    ACCEPTED,
    AMENDED,
    IMPORTED,
    KIND_FULL,
    KIND_WEAK,
    SETTLED,
    STATES,
    WEAK,
)
from labeler.store import NewAnnotation
from labeler.store.records import ImageRecord
from labeler.workflow.progress import Progress, no_progress

__all__ = [
    "EXPORT_FORMATS",
    "DEFAULT_EXPORT_STATES",
    "ImageExport",
    "ExportResult",
    "image_export_mask",
    "export_project",
    "ImportResult",
    "import_masks",
]

EXPORT_FORMATS = ("geojson", "masks", "all")
#: Tile states whose saved masks are exported by default.
DEFAULT_EXPORT_STATES = (ACCEPTED, AMENDED, SETTLED)


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


@dataclass(frozen=True)
class ImportResult:
    """What ``labeler import`` saved."""

    files: list[tuple[Path, str]]  # (mask file, image name)
    full_tiles: int
    weak_tiles: int
    empty_tiles: int


def import_masks(
    project: Project,
    files: Sequence[str | os.PathLike[str]],
    *,
    annotator: str,
    image: str | None = None,
    fill: str = "unlabelled",
    progress: Progress = no_progress,
) -> ImportResult:
    """Read PNG class masks or GeoJSON polygons into annotations of ``annotator``.

    Each file is matched to its image by name (``<stem>.png``, ``<stem>_mask.png``,
    ``<stem>_annotation.png``, or ``.geojson``) or by ``image``, read and checked in the
    image's pixel grid, and cut into tiles. A tile the file covers completely becomes a
    full annotation (``imported``); a tile with unlabelled pixels (255) becomes a weak
    label (kind :data:`~labeler.states.KIND_WEAK`, state ``weak``); a tile the file does
    not touch is left alone. Every file is read and checked before anything is saved, and
    all tiles are saved in ONE transaction: on any error nothing is imported.

    Parameters
    ----------
    project : Project
        An open project.
    files : sequence of path-like
        PNG class masks or GeoJSON files.
    annotator : str
        Whose masks these are.
    image : str, optional
        The image of a single file whose name does not tell.
    fill : {"unlabelled", "soil"}
        GeoJSON only: pixels no polygon covers stay unlabelled (a weak label), or are
        soil (the polygons cover every non-soil pixel, as labeler's own export writes).
    progress : Progress
        Called as ``progress(done, total, label)`` per file.

    Returns
    -------
    ImportResult
        The files and their images, and how many tiles became full, weak or stayed
        uncovered.

    Raises
    ------
    InputError
        Naming the file: unmatched name, wrong size, unknown class, invalid geometry,
        wrong CRS, polygons outside the image.
    """
    if fill not in ("unlabelled", "soil"):
        raise LabelerError(f"--fill: expected 'unlabelled' or 'soil', got {fill!r}")
    if image is not None and len(files) != 1:
        raise LabelerError("--image: name one mask file when giving its image explicitly")
    store = project.store
    schema = project.settings.classes
    images = {im.name: im for im in store.images()}
    if not images:
        raise LabelerError("the project has no images; add them with 'labeler add' first")
    planned: list[tuple[Path, ImageRecord, np.ndarray]] = []
    for n, raw in enumerate(files):
        path = Path(raw)
        progress(n, len(files), f"reading {path.name}")
        if image is not None:
            if image not in images:
                raise LabelerError(
                    f"--image: {image!r} is not in this project; known: {', '.join(sorted(images))}"
                )
            name = image
        else:
            name = match_mask_to_image(path, images)
        rec = images[name]
        mask = read_mask_file(
            path,
            shape=rec.shape,
            transform=_transform(rec),
            crs=rec.crs,
            schema=schema,
            fill=0 if fill == "soil" else UNLABELLED,
            image=name,
        )
        planned.append((path, rec, mask))
    items: list[NewAnnotation] = []
    full = weak = empty = 0
    store.ensure_annotator(annotator)
    for path, rec, mask in planned:
        for tile in store.tiles(image_id=rec.id):
            part = np.ascontiguousarray(mask[tile.window.slices])
            unl = part == UNLABELLED
            if unl.all():
                empty += 1
                continue
            kind, state = (KIND_WEAK, WEAK) if unl.any() else (KIND_FULL, IMPORTED)
            full += kind == KIND_FULL
            weak += kind == KIND_WEAK
            items.append(
                NewAnnotation(
                    tile_id=tile.id,
                    annotator=annotator,
                    mask=part,
                    parent_version=store.lineage_head(tile.id, annotator),
                    kind=kind,
                    state=state,
                    source=f"import:{path.name}",
                )
            )
    store.save_annotations(items)
    store.log_event(
        "import",
        annotator=annotator,
        detail={"files": [str(p) for p, _, _ in planned], "full": full, "weak": weak},
    )
    progress(len(files), len(files), "saved")
    return ImportResult(
        files=[(p, r.name) for p, r, _ in planned],
        full_tiles=full,
        weak_tiles=weak,
        empty_tiles=empty,
    )
