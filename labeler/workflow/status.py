"""What a project holds (``labeler status``): tiles per state, per image and per annotator,
and the annotation effort per model version (:mod:`labeler.workflow.effort`)."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

from labeler.project import Project
from labeler.workflow.effort import VersionEffort, effort_by_model
from labeler.workflow.encoders import ENCODER_KIND, IMAGENET
from labeler.workflow.features import head_encoder
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
    proposing_head : str or None
        The head ``labeler propose`` uses (the newest), None before any retrain.
    proposing_encoder : str
        The encoder version it reads: a row name (``"encoder-2"``) or ``"imagenet"``
        (with the head's own version string when no row of the project holds it).
    newest_encoder : str
        The newest encoder version (what the next retrain uses): a name or ``"imagenet"``.
    effort : list of VersionEffort
        Per model version, oldest first: median actions and seconds per saved tile and
        the share accepted unchanged (:func:`labeler.workflow.effort.effort_by_model`).
    shared : bool
        The project lives on a database server (a team's shared project).
    team : dict
        The settings the team shares, kept in the database (empty when none are).
    holds : list of (int, str, float)
        Tile id, holder and minutes left before the hold lapses without a heartbeat.
    image_root : Path or None
        Where this machine reaches the team's shared image folder (None: not set).
    weights_missing : list of str
        Trained versions whose weights the database does not hold yet (made before it
        kept them; ``labeler upgrade`` on the machine that made them reads them in).
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
    proposing_head: str | None = None
    proposing_encoder: str = IMAGENET
    newest_encoder: str = IMAGENET
    effort: list[VersionEffort] = field(default_factory=list)
    shared: bool = False
    team: dict = field(default_factory=dict)
    holds: list[tuple[int, str, float]] = field(default_factory=list)
    image_root: Path | None = None
    weights_missing: list[str] = field(default_factory=list)


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
    encoders = [m for m in models if m.kind == ENCODER_KIND]
    heads = [m for m in models if m.kind == "head"]
    newest_encoder = encoders[-1].name if encoders else IMAGENET
    proposing_encoder = newest_encoder
    if heads:
        wanted = head_encoder(heads[-1])
        names = {m.encoder_version: m.name for m in encoders}
        proposing_encoder = names.get(wanted) or (
            IMAGENET if wanted is None or "-ssl-" not in wanted else str(wanted)
        )
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
        proposing_head=heads[-1].name if heads else None,
        proposing_encoder=proposing_encoder,
        newest_encoder=newest_encoder,
        effort=effort_by_model(project),
        shared=not store.is_sqlite,
        team=store.team_settings() or {},
        holds=[(tid, who, left / 60) for tid, who, left in store.current_holds()],
        image_root=project.image_root,
        weights_missing=[
            m.name for m in models if m.kind != "cold_start" and m.weights_sha256 is None
        ],
    )
