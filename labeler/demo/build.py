"""``labeler demo``: a project built from the committed demo plots in ``demo_fields/``."""

from __future__ import annotations

import shutil
from pathlib import Path

from labeler.errors import LabelerError
from labeler.project import Project, init_project

__all__ = ["DEMO_FIELDS", "DEMO_MARKER", "demo_images", "truth_path", "build_demo_project"]

#: The repository's committed demo plots.
DEMO_FIELDS = Path(__file__).resolve().parents[2] / "demo_fields"
#: File that marks a folder as a demo project (so ``--fresh`` never deletes real work).
DEMO_MARKER = ".labeler-demo"


def demo_images(fields: Path | None = None) -> list[Path]:
    """The plot images (GeoTIFFs) of a demo folder, sorted by name."""
    folder = DEMO_FIELDS if fields is None else fields
    if not folder.is_dir():
        raise LabelerError(
            f"{folder}: no demo plots here; regenerate them with 'python -m labeler.demo.fields {folder}'"
        )
    images = sorted(p for p in folder.glob("*.tif") if not p.name.startswith("."))
    if not images:
        raise LabelerError(f"{folder}: holds no demo plot images (*.tif)")
    return images


def truth_path(image: Path) -> Path:
    """The ground-truth PNG of a demo plot image."""
    return image.with_name(f"{image.stem}_truth.png")


def build_demo_project(
    out: Path, *, fields: Path | None = None, fresh: bool = False, progress=None
) -> tuple[Project, list[str]]:
    """Create a project in ``out`` holding every demo plot.

    Returns the open project and lines describing what was done.

    Raises
    ------
    LabelerError
        If ``out`` holds something other than an earlier demo project, or holds a demo
        project and ``fresh`` is not set.
    """
    from labeler.workflow import add_images

    lines: list[str] = []
    if out.exists():
        if not (out / DEMO_MARKER).exists():
            raise LabelerError(
                f"{out}: exists and is not a demo project; choose another folder with --out"
            )
        if not fresh:
            raise LabelerError(
                f"{out}: a demo project is already there; pass --fresh to rebuild it"
            )
        shutil.rmtree(out)
        lines.append(f"removed the earlier demo project in {out}")
    images = demo_images(fields)
    project = init_project(out)
    (out / DEMO_MARKER).write_text("built by 'labeler demo'; safe to delete\n", encoding="utf-8")
    try:
        results = add_images(project, images, progress=progress or (lambda *a: None))
    except BaseException:
        project.close()
        raise
    lines.append(f"built demo project {out} from {len(results)} plots")
    return project, lines
