"""Importing masks made elsewhere (``labeler import``): a save like any other, tile by tile.

Each mask file is matched to its image, checked, and cut into the image's tiles, a band
of rows at a time (never the whole mask at once). What happens to each tile is decided
here, against what the tile held when the import began (:meth:`Store.tile_work`):

* a tile the file does not cover (all unlabelled) is left as it was;
* a tile that already holds exactly this mask gets no new version;
* a ``contested`` tile is skipped: a reviewer settles it first;
* reviewed work is skipped unless ``replace`` is given: a tile a reviewer ``settled``,
  and an ordinary tile whose newest mask (full mask, accepted proposal, earlier import or
  weak label) was saved by another annotator. On an overlap tile every annotator keeps
  an own lineage, so an import there stands beside the others' masks, is compared with
  them and may make the tile ``contested``, as an editor save would (a settled overlap
  tile whose decision an import replaced is compared again the same way);
* every other tile is saved as a new version of the importing annotator: a tile the
  file covers completely as a full mask (annotation state and tile state
  ``imported``), a partly covered tile as a weak label (the tile's state unchanged).

All saves go in ONE transaction, each with the optimistic version check against the
version the import began from: a tile someone saved while the import ran is skipped and
reported, never overwritten, and two imports at once never replace each other
silently. Replaced versions stay in the history. Every file is read and checked before
anything is saved: a file with a problem imports nothing.
"""

from __future__ import annotations

import contextlib
import os
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from affine import Affine

from labeler.classes import UNLABELLED
from labeler.errors import LabelerError
from labeler.export.importing import check_mask_path, match_mask_to_image, open_mask_file
from labeler.project import Project
from labeler.states import CONTESTED, IMPORTED, KIND_FULL, KIND_WEAK, SETTLED, WEAK
from labeler.store import NewAnnotation
from labeler.store.records import ImageRecord, TileRecord, TileWork
from labeler.workflow.annotating import after_save
from labeler.workflow.progress import Progress, no_progress

__all__ = ["SKIP_REASONS", "ImportResult", "import_masks"]

#: Why a tile was not saved, and what the user can do about it (``{n}`` tiles).
SKIP_REASONS = {
    "others": "skipped {n} tiles holding a mask another annotator saved (pass --replace to "
    "replace them; the earlier versions stay in the history)",
    "settled": "skipped {n} tiles a reviewer settled (pass --replace to replace them; the "
    "earlier versions stay in the history)",
    "contested": "skipped {n} contested tiles: a reviewer settles them first "
    "('labeler edit DIR TILE --settle')",
    "changed": "skipped {n} tiles saved by someone else while this import ran; nothing was "
    "overwritten (import again to see them)",
}
#: Tile ids shown per line of the summary.
_SHOWN = 12


def _listed(ids: Sequence[int]) -> str:
    shown = ", ".join(str(i) for i in ids[:_SHOWN])
    more = f" and {len(ids) - _SHOWN} more" if len(ids) > _SHOWN else ""
    return f": tiles {shown}{more}"


@dataclass(frozen=True)
class ImportResult:
    """What ``labeler import`` did, tile by tile.

    Attributes
    ----------
    files : list of (Path, str)
        Each mask file and the image it was read for.
    annotator : str
        Whose masks the saved ones are.
    saved_full, saved_weak : list of int
        Tiles saved as full masks (``imported``) and as weak labels.
    replaced : list of int
        Of the saved tiles, those whose reviewed work was replaced (``replace``).
    unchanged : list of int
        Tiles that already held exactly the file's mask (nothing saved).
    not_covered : list of int
        Tiles the files do not cover (left as they were).
    skipped : dict of str to list of int
        Tiles not saved, by reason (keys of :data:`SKIP_REASONS`).
    """

    files: list[tuple[Path, str]]
    annotator: str
    saved_full: list[int] = field(default_factory=list)
    saved_weak: list[int] = field(default_factory=list)
    replaced: list[int] = field(default_factory=list)
    unchanged: list[int] = field(default_factory=list)
    not_covered: list[int] = field(default_factory=list)
    skipped: dict[str, list[int]] = field(default_factory=dict)

    @property
    def full_tiles(self) -> int:
        """Number of tiles saved as full masks."""
        return len(self.saved_full)

    @property
    def weak_tiles(self) -> int:
        """Number of tiles saved as weak labels."""
        return len(self.saved_weak)

    @property
    def empty_tiles(self) -> int:
        """Number of tiles the files do not cover."""
        return len(self.not_covered)

    def summary_lines(self) -> list[str]:
        """One line per file and one per outcome group (groups with no tile left out).

        Returns
        -------
        list of str
        """
        lines = [f"{path} -> image {name}" for path, name in self.files]
        lines.append(
            f"imported {self.full_tiles} full masks and {self.weak_tiles} partial masks "
            f"(weak labels) as {self.annotator}"
        )
        if self.replaced:
            lines.append(
                f"replaced reviewed work on {len(self.replaced)} tiles (--replace; the earlier "
                f"versions stay in the history){_listed(self.replaced)}"
            )
        if self.unchanged:
            lines.append(f"{len(self.unchanged)} tiles already held these masks; nothing saved")
        for key, text in SKIP_REASONS.items():
            ids = self.skipped.get(key, [])
            if ids:
                lines.append(text.format(n=len(ids)) + _listed(ids))
        if self.not_covered:
            lines.append(f"{self.empty_tiles} tiles not covered by the files (left as they were)")
        return lines


def _transform(image: ImageRecord) -> Affine | None:
    return None if image.transform is None else Affine(*image.transform)


def _reviewed(work: TileWork, annotator: str) -> str | None:
    """The skip reason of reviewed work on the tile (None: free to save)."""
    if work.tile.state == SETTLED:
        return "settled"
    if work.tile.overlap:
        return None  # an own lineage: the others' masks are compared, not replaced
    newest = work.full_by if work.full_by is not None else work.weak_by
    if newest is not None and newest != annotator:
        return "others"
    return None


def _bands(tiles: Sequence[TileRecord]) -> list[tuple[int, int, list[TileRecord]]]:
    """Tiles grouped into bands of rows, top to bottom: (start, stop, tiles by column)."""
    rows: dict[int, list[TileRecord]] = {}
    for tile in tiles:
        rows.setdefault(tile.row, []).append(tile)
    return [
        (row, max(t.row + t.height for t in group), sorted(group, key=lambda t: t.col))
        for row, group in sorted(rows.items())
    ]


@dataclass
class _Plan:
    """What the import decided before saving; filled while the files are read."""

    result: ImportResult
    pending: list[tuple[int, str, bool]] = field(default_factory=list)  # tile, kind, replaces


def _tile_saves(
    project: Project,
    planned: Sequence[tuple[Path, ImageRecord]],
    work: dict[int, TileWork],
    plan: _Plan,
    *,
    annotator: str,
    fill: int,
    replace: bool,
    progress: Progress,
) -> Iterator[NewAnnotation]:
    """Read every file band by band and yield the saves; record every other outcome."""
    result = plan.result
    store = project.store
    schema = project.settings.classes
    total = sum(rec.height for _, rec in planned)
    done = 0
    for path, rec in planned:
        source = open_mask_file(
            path, shape=rec.shape, transform=_transform(rec), crs=rec.crs, schema=schema,
            fill=fill, image=rec.name,
        )
        with contextlib.closing(source):
            for start, stop, tiles in _bands(store.tiles(image_id=rec.id)):
                progress(done + start, total, f"reading {path.name}")
                band = source.read_rows(start, stop)
                parts = []
                for tile in tiles:
                    part = np.ascontiguousarray(
                        band[tile.row - start : tile.row - start + tile.height,
                             tile.col : tile.col + tile.width]
                    )
                    unlabelled = part == UNLABELLED
                    if unlabelled.all():
                        result.not_covered.append(tile.id)
                        continue
                    parts.append((tile, part, KIND_WEAK if unlabelled.any() else KIND_FULL))
                # the versions these saves would be based on, to leave identical masks alone
                heads = store.annotations_at(
                    [(t.id, work[t.id].head) for t, _, kind in parts
                     if work[t.id].head is not None and work[t.id].head_kind == kind]
                )
                for tile, part, kind in parts:
                    w = work[tile.id]
                    head = heads.get((tile.id, w.head))
                    if head is not None and np.array_equal(head.mask(), part):
                        result.unchanged.append(tile.id)
                        continue
                    if w.tile.state == CONTESTED:
                        result.skipped.setdefault("contested", []).append(tile.id)
                        continue
                    reason = _reviewed(w, annotator)
                    if reason is not None and not replace:
                        result.skipped.setdefault(reason, []).append(tile.id)
                        continue
                    plan.pending.append((tile.id, kind, reason is not None))
                    yield NewAnnotation(
                        tile_id=tile.id,
                        annotator=annotator,
                        mask=part,
                        parent_version=w.head,
                        kind=kind,
                        state=IMPORTED if kind == KIND_FULL else WEAK,
                        source=f"import:{path.name}"[:32],
                    )
        done += rec.height


def import_masks(
    project: Project,
    files: Sequence[str | os.PathLike[str]],
    *,
    annotator: str,
    image: str | None = None,
    fill: str = "unlabelled",
    replace: bool = False,
    progress: Progress = no_progress,
) -> ImportResult:
    """Read PNG class masks or GeoJSON polygons into saves of ``annotator``, tile by tile.

    See the module docstring for what becomes of each tile.

    Parameters
    ----------
    project : Project
        An open project.
    files : sequence of path-like
        PNG class masks or GeoJSON files, at most one per image.
    annotator : str
        Whose masks these are.
    image : str, optional
        The image of a single file whose name does not tell.
    fill : {"unlabelled", "soil"}
        GeoJSON only: pixels no polygon covers stay unlabelled (a weak label), or are
        soil (the polygons cover every non-soil pixel, as labeler's own export writes).
    replace : bool
        Also save over reviewed work (settled tiles, other annotators' masks); the
        replaced versions stay in the history. Contested tiles are never imported into.
    progress : Progress
        Called as ``progress(done, total, label)`` over the rows read.

    Returns
    -------
    ImportResult
        Every tile's outcome, by group.

    Raises
    ------
    InputError
        Naming the file: not a regular file, unmatched name, wrong size, unknown class,
        invalid geometry, wrong CRS, polygons outside the image, damaged PNG.
    LabelerError
        For bad options, an empty annotator name, a project without images, or two
        files for one image. Nothing is saved on any error.
    """
    if fill not in ("unlabelled", "soil"):
        raise LabelerError(f"--fill: expected 'unlabelled' or 'soil', got {fill!r}")
    if image is not None and len(files) != 1:
        raise LabelerError("--image: name one mask file when giving its image explicitly")
    who = annotator.strip() if isinstance(annotator, str) else ""
    if not who:
        raise LabelerError(
            f"--annotator: expected a non-empty name, got {annotator!r}; pass --annotator NAME"
        )
    store = project.store
    images = {im.name: im for im in store.images()}
    if not images:
        raise LabelerError("the project has no images; add them with 'labeler add' first")
    if image is not None and image not in images:
        raise LabelerError(
            f"--image: {image!r} is not in this project; known: {', '.join(sorted(images))}"
        )
    planned: list[tuple[Path, ImageRecord]] = []
    for raw in files:
        path = Path(raw)
        check_mask_path(path)
        name = image if image is not None else match_mask_to_image(path, images)
        planned.append((path, images[name]))
    by_image: dict[str, list[str]] = {}
    for path, rec in planned:
        by_image.setdefault(rec.name, []).append(str(path))
    twice = {n: p for n, p in by_image.items() if len(p) > 1}
    if twice:
        n, paths = next(iter(twice.items()))
        raise LabelerError(
            f"{len(paths)} files are for image {n!r} ({', '.join(paths)}); import one file "
            "per image (merge them first, or import them one after the other)"
        )
    # what every tile holds now: the versions this import's saves are based on
    work = {w.tile.id: w for _, rec in planned for w in store.tile_work(who, image_id=rec.id)}
    plan = _Plan(result=ImportResult(files=[(p, r.name) for p, r in planned], annotator=who))
    outcomes = store.save_if_unchanged(
        _tile_saves(
            project, planned, work, plan, annotator=who,
            fill=0 if fill == "soil" else UNLABELLED, replace=replace, progress=progress,
        )
    )
    result = plan.result
    for (tile_id, kind, replaces), outcome in zip(plan.pending, outcomes, strict=True):
        if outcome.version is None:
            result.skipped.setdefault("changed", []).append(tile_id)
            continue
        (result.saved_full if kind == KIND_FULL else result.saved_weak).append(tile_id)
        if replaces:
            result.replaced.append(tile_id)
    for tile_id in result.saved_full:
        if work[tile_id].tile.overlap:
            after_save(project, tile_id)  # compared with the others' masks, as any save
    store.log_event(
        "import",
        annotator=who,
        detail={
            "files": [str(p) for p, _ in planned],
            "full": result.saved_full,
            "weak": result.saved_weak,
            "replaced": result.replaced,
            "unchanged": len(result.unchanged),
            "skipped": result.skipped,
        },
    )
    progress(1, 1, "saved")
    return result
