"""Adding images to a project, and its status."""

from __future__ import annotations

import os
import re
import shutil
import tempfile
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

from labeler.errors import InputError
from labeler.imagery.read import open_image, sha256_file
from labeler.imagery.tiling import tile_grid
from labeler.project import Project
from labeler.store import NewImage

__all__ = [
    "Progress",
    "AddResult",
    "add_images",
    "ProjectStatus",
    "project_status",
]

#: ``progress(done, total, label)``; the CLI draws a bar, the queue a progress widget.
Progress = Callable[[int, int, str], None]


def _no_progress(done: int, total: int, label: str) -> None:
    return None


def _safe_name(stem: str) -> str:
    name = re.sub(r"[^A-Za-z0-9._-]+", "_", stem).strip("._") or "image"
    return name[:200]


@dataclass(frozen=True)
class AddResult:
    """What happened to one image given to :func:`add_images`."""

    path: Path
    status: str  # "added" or "skipped"
    name: str
    tiles: int = 0
    message: str = ""


def add_images(
    project: Project,
    paths: Sequence[str | os.PathLike[str]],
    *,
    copy: bool = True,
    progress: Progress = _no_progress,
) -> list[AddResult]:
    """Add images to the project, each all-or-nothing.

    For each image: the format is checked from its bytes, every tile window is read
    once (a damaged file is found now, not in the middle of labelling), the file is
    copied into ``images/`` (unless ``copy=False``) and the image and its tiles are
    written to the store in one transaction. An image already present (same sha256)
    is skipped with a message.

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
        sha = None
        with open_image(src) as reader:
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
        target: Path | None = None
        stored_path = str(src.resolve())
        if copy:
            project.images_dir.mkdir(parents=True, exist_ok=True)
            target = project.images_dir / f"{name}{src.suffix.lower()}"
            fd, tmp = tempfile.mkstemp(prefix=f".{name}.", suffix=".part", dir=project.images_dir)
            os.close(fd)
            try:
                shutil.copyfile(src, tmp)
                if sha256_file(tmp) != sha:
                    raise InputError(
                        f"{src}: the file changed while it was being copied; add it again"
                    )
                os.replace(tmp, target)
                # world file / .prj beside the copy keep the georeferencing of PNG/JPEG
                for side in _sidecars(src):
                    shutil.copyfile(side, project.images_dir / f"{name}{side.suffix.lower()}")
            except BaseException:
                Path(tmp).unlink(missing_ok=True)
                raise
            stored_path = str(target.relative_to(project.root))
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
            if target is not None:
                target.unlink(missing_ok=True)
                for side in _sidecars(src):
                    (project.images_dir / f"{name}{side.suffix.lower()}").unlink(missing_ok=True)
            raise
        known.add(name)
        results.append(AddResult(src, "added", name, tiles=len(windows)))
        progress(n + 1, len(paths), src.name)
    return results


def _sidecars(src: Path) -> list[Path]:
    from labeler.imagery.georef import find_world_file

    out = []
    wf = find_world_file(src)
    if wf is not None:
        out.append(wf)
    prj = src.with_suffix(".prj")
    if prj.is_file():
        out.append(prj)
    return out


@dataclass(frozen=True)
class ProjectStatus:
    """Counts for ``labeler status``."""

    folder: Path
    images: int
    tiles: int
    by_state: dict[str, int]
    by_image: list[tuple[str, int, dict[str, int], bool]] = field(
        default_factory=list
    )  # name, tiles, states, georef
    by_annotator: dict[str, dict[str, float]] = field(default_factory=dict)
    model_versions: int = 0
    latest_model: str | None = None
    latest_miou: float | None = None


def project_status(project: Project) -> ProjectStatus:
    """Tiles per state, per image and per annotator."""
    store = project.store
    images = store.images()
    per_image = []
    for im in images:
        counts = store.state_counts(image_id=im.id)
        per_image.append((im.name, sum(counts.values()), counts, im.transform is not None))
    total = store.state_counts()
    models = store.model_versions()
    latest = models[-1] if models else None
    return ProjectStatus(
        folder=project.root,
        images=len(images),
        tiles=sum(total.values()),
        by_state=total,
        by_image=per_image,
        by_annotator=store.annotator_counts(),
        model_versions=len(models),
        latest_model=None if latest is None else latest.name,
        latest_miou=None if latest is None else latest.miou,
    )
