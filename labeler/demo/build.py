"""``labeler demo``: a project built from the committed demo plots in ``demo_fields/``.

With the whole loop (the default) the demo also plays one round of the work: a
cold-start proposal, the picker's first batch corrected by two simulated annotators (the
overlap tiles by both, so agreement can be shown), a retrained head, new proposals, a new
queue order and an export. The simulated annotators are noisy copies of the invented
truth (:mod:`labeler.demo.annotator`); no real person's work is involved.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import numpy as np

from labeler.errors import LabelerError
from labeler.fileio import atomic_write_text, remove_marked_folder
from labeler.imagery.read import read_index_png
from labeler.metrics import format_iou
from labeler.project import Project, init_project
from labeler.settings import SETTINGS_FILE

__all__ = [
    "DEMO_FIELDS",
    "DEMO_MARKER",
    "DEMO_ANNOTATORS",
    "demo_images",
    "truth_path",
    "build_demo_project",
    "run_demo_round",
]

#: The repository's committed demo plots.
DEMO_FIELDS = Path(__file__).resolve().parents[2] / "demo_fields"
#: File that marks a folder as a demo project (so ``--fresh`` never deletes real work).
DEMO_MARKER = ".labeler-demo"
#: Simulated annotators of the demo and their skill (see labeler.demo.annotator).
DEMO_ANNOTATORS = (("ines", 0.9), ("tomas", 0.75))
#: Settings of a demo project: a short training and a share of overlap tiles.
DEMO_SETTINGS = """\
# demo project settings (see 'labeler init' for every option)
[model]
epochs = 25
[agreement]
overlap_share = 0.25
threshold = 0.92   # strict, so that the demo shows contested tiles
[picker]
k = 16
"""


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
    from labeler.project import open_project
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
        remove_marked_folder(out, marker=DEMO_MARKER)
        lines.append(f"removed the earlier demo project in {out}")
    images = demo_images(fields)
    init_project(out).close()
    atomic_write_text(out / SETTINGS_FILE, DEMO_SETTINGS)
    atomic_write_text(out / DEMO_MARKER, "built by 'labeler demo'; safe to delete\n")
    project = open_project(out)
    try:
        results = add_images(project, images, progress=progress or (lambda *a: None))
    except BaseException:
        project.close()
        raise
    lines.append(f"built demo project {out} from {len(results)} plots")
    return project, lines


def _truths(names: set[str], fields: Path | None) -> dict[str, np.ndarray]:
    """The ground-truth masks of the demo plots named ``names``, by name."""
    by_stem = {p.stem: p for p in demo_images(fields)}
    return {name: read_index_png(truth_path(by_stem[name])) for name in sorted(names)}


def run_demo_round(
    project: Project,
    *,
    fields: Path | None = None,
    seed: int = 7,
    progress: Callable[[int, int, str], None] | None = None,
    say: Callable[[str], None] = print,
) -> None:
    """Play one round of the loop on a demo project (see the module docstring)."""
    from labeler.demo.annotator import simulate_annotation
    from labeler.workflow import (
        pick_tiles,
        project_status,
        propose,
        queue_rows,
        retrain,
        save_basis,
        save_tile_mask,
        tile_places,
        write_agreement,
    )
    from labeler.workflow.exporting import export_project

    prog = progress or (lambda *a: None)
    places = tile_places(project)
    truths = _truths({p.image for p in places.values()}, fields)
    from labeler.workflow.naming import model_label
    from labeler.workflow.views import model_versions

    res = propose(project, progress=prog)
    say(
        f"1. proposed {res.proposed} tiles with the "
        f"{model_label(res.model_version, model_versions(project))} (no model trained yet)"
    )
    picked = pick_tiles(project, progress=prog)
    batch = [i.tile_id for i in picked.items if i.in_batch]
    why = f"; {picked.note}" if picked.note else ""
    say(
        f"2. the picker chose {len(batch)} tiles by {picked.strategy} (asked for "
        f"{picked.requested}{why}): {', '.join(map(str, batch))}"
    )
    rng = np.random.default_rng(seed)
    overlap = {tid for tid, p in places.items() if p.overlap}
    extra = sorted(overlap - set(batch))[:4]  # a few overlap tiles so both annotators meet
    saved = 0
    for tid in batch + extra:
        place = places[tid]
        truth = truths[place.image][place.window.slices]
        who = [a for a, _ in DEMO_ANNOTATORS] if tid in overlap else [DEMO_ANNOTATORS[saved % 2][0]]
        for name in who:
            skill = dict(DEMO_ANNOTATORS)[name]
            mask = simulate_annotation(truth, rng=rng, skill=skill)
            basis = save_basis(project, tid, name)
            save_tile_mask(
                project,
                tid,
                name,
                mask,
                parent_version=basis.parent_version,
                seconds=float(rng.uniform(20, 90)),
                actions=int(rng.integers(3, 25)),
                source="demo",
                proposal_id=basis.proposal_id,
            )
        saved += 1
    counts = project_status(project).by_state
    ag = project.settings.agreement
    say(
        f"3. simulated annotators saved {saved} tiles ({counts.get('contested', 0)} contested on "
        f"overlap tiles: the demo counts an overlap tile as contested below {ag.metric} "
        f"{ag.threshold:g}, stricter than the default 0.6, so that a reviewer has work to show)"
    )
    rep_dir = project.root / "reports" / "agreement"
    summary, files = write_agreement(project, rep_dir, progress=prog)
    if summary.pairs:
        p = summary.pairs[0]
        say(
            f"4. agreement {p.annotators[0]} vs {p.annotators[1]}: kappa {p.kappa:.3f} ({p.band}); report {files.html}"
        )
    trained = retrain(project, progress=prog)
    mv = trained.model_version
    say(
        f"5. retrained {mv.name} on {trained.n_full} tiles: validation IoU "
        f"{format_iou(mv.val_iou, digits=2)}"
    )
    res = propose(project, progress=prog)
    say(f"6. re-proposed {res.proposed} tiles with {res.model_version.name}")
    pick_tiles(project, progress=prog)
    top = queue_rows(project)[:3]
    say("7. the queue now starts with tiles " + ", ".join(f"{r.tile_id} ({r.reason})" for r in top))
    out = project.root / "exports"
    ex = export_project(project, out, proposals=True, progress=prog)
    say(
        f"8. exported {ex.features} GeoJSON features, {ex.footprints} outlines of saved tiles "
        f"and {len(ex.masks)} PNG files to {out} ({ex.tiles_from_proposals} tiles filled from "
        "proposals for a whole-field map: model output, not checked, marked 2 in "
        "masks/<image>_source.png and by proposal_share in manifest.jsonl)"
    )
