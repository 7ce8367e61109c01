"""What a project holds (``labeler status``): tiles per state, per image and per annotator."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

from labeler.project import Project
from labeler.workflow.naming import model_label

__all__ = ["ProjectStatus", "project_status"]


@dataclass(frozen=True)
class ProjectStatus:
    """Counts for ``labeler status``.

    Attributes
    ----------
    folder : Path
        The project folder.
    images, tiles : int
        Images and tiles in the project.
    by_state : dict of str to int
        Tiles per state, every state listed (zeros included).
    by_image : list of (str, int, dict of str to int, bool)
        Per image: name, tiles, tiles per state, and whether it is georeferenced.
    by_annotator : dict of str to dict of str to float
        Per annotator: ``tiles`` saved, ``weak_labels`` (weak-label saves), ``actions`` and
        ``seconds`` of editing.
    model_versions : int
        Model versions recorded (cold starts and trained heads).
    latest_model : str or None
        Name of the newest model version.
    latest_miou : float or None
        Its validation mean IoU (None for a cold start).
    """

    folder: Path
    images: int
    tiles: int
    by_state: dict[str, int]
    by_image: list[tuple[str, int, dict[str, int], bool]] = field(default_factory=list)
    by_annotator: dict[str, dict[str, float]] = field(default_factory=dict)
    model_versions: int = 0
    latest_model: str | None = None
    latest_miou: float | None = None


def project_status(project: Project) -> ProjectStatus:
    """Tiles per state, per image and per annotator, and the newest model.

    Parameters
    ----------
    project : Project
        An open project.

    Returns
    -------
    ProjectStatus
        The counts; reading them changes nothing.
    """
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
        latest_model=None if latest is None else model_label(latest, models),
        latest_miou=None if latest is None else latest.miou,
    )
