"""What a project holds (``labeler status``): tiles per state, per image and per annotator."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

from labeler.project import Project

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
    shared : bool
        The project lives on a database server (a team's shared project).
    team : dict
        The settings the team shares, kept in the database (empty when none are).
    holds : list of (int, str, float)
        Tile id, holder and minutes left before the hold lapses without a heartbeat.
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
    shared: bool = False
    team: dict = field(default_factory=dict)
    holds: list[tuple[int, str, float]] = field(default_factory=list)


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
        latest_model=None if latest is None else latest.name,
        latest_miou=None if latest is None else latest.miou,
        shared=not store.is_sqlite,
        team=store.team_settings() or {},
        holds=[(tid, who, left / 60) for tid, who, left in store.current_holds()],
    )
