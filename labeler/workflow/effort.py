"""Annotation effort per model version: is the team's work falling as the model learns?

Every full save records the editing ``actions`` and active ``seconds`` it took and the
proposal the annotator started from (:func:`labeler.workflow.annotating.save_tile_mask`).
:func:`effort_by_model` groups the full saves by the model version of that proposal and
gives, per version, the median actions and seconds per saved tile and the share saved
unchanged (``accepted``). Saves that name no proposal (a reviewer settling a contested
tile, masks brought in with ``labeler import``) and weak-label saves are left out: they do
not measure the work a proposal left to do.

Medians, not means: one tile left open over a break or redrawn from scratch should not
move the figure of a hundred quick ones. The median of an even count is the mean of the
two middle values (``numpy.median``).

``labeler status``, the queue's model screen and the agreement report show these rows.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

import numpy as np

from labeler.project import Project
from labeler.states import ACCEPTED, KIND_FULL

__all__ = ["SaveEffort", "VersionEffort", "summarise_effort", "effort_by_model"]


@dataclass(frozen=True)
class SaveEffort:
    """One full save, as the effort figures read it.

    Attributes
    ----------
    model_version_id : int
        The model version of the proposal the annotator started from.
    actions : int
        Editing actions of the save.
    seconds : float
        Active seconds of the save.
    accepted : bool
        True when the save kept the proposal unchanged.
    """

    model_version_id: int
    actions: int
    seconds: float
    accepted: bool


@dataclass(frozen=True)
class VersionEffort:
    """Effort of the saves that started from one model version's proposals.

    Attributes
    ----------
    model_version_id : int
    model : str
        The version's name (``head-3``, or the cold-start rule).
    saves : int
        Full saves counted.
    median_actions : float
        Median editing actions per saved tile.
    median_seconds : float
        Median active seconds per saved tile.
    accepted_share : float
        Share of the saves that kept the proposal unchanged, in 0..1.
    """

    model_version_id: int
    model: str
    saves: int
    median_actions: float
    median_seconds: float
    accepted_share: float


def summarise_effort(
    saves: Iterable[SaveEffort], names: dict[int, str]
) -> list[VersionEffort]:
    """Group saves by model version: medians and the share accepted unchanged.

    Parameters
    ----------
    saves : iterable of SaveEffort
    names : dict of int to str
        Model version id -> name; a version missing here is named ``model <id>``.

    Returns
    -------
    list of VersionEffort
        One per model version with at least one save, oldest version (smallest id) first.
    """
    groups: dict[int, list[SaveEffort]] = {}
    for s in saves:
        groups.setdefault(int(s.model_version_id), []).append(s)
    out = []
    for mv in sorted(groups):
        rows = groups[mv]
        out.append(
            VersionEffort(
                model_version_id=mv,
                model=names.get(mv, f"model {mv}"),
                saves=len(rows),
                median_actions=float(np.median([r.actions for r in rows])),
                median_seconds=float(np.median([r.seconds for r in rows])),
                accepted_share=sum(r.accepted for r in rows) / len(rows),
            )
        )
    return out


def effort_by_model(project: Project) -> list[VersionEffort]:
    """Effort per model version over every full save that names its proposal.

    Parameters
    ----------
    project : Project
        An open project.

    Returns
    -------
    list of VersionEffort
        Oldest model version first; empty before the first such save.
    """
    store = project.store
    version_of = store.proposal_model_versions()
    names = {mv.id: mv.name for mv in store.model_versions()}
    saves = [
        SaveEffort(
            model_version_id=version_of[a.proposal_id],
            actions=int(a.actions),
            seconds=float(a.seconds),
            accepted=a.state == ACCEPTED,
        )
        for a in store.annotations(kind=KIND_FULL)
        if a.proposal_id is not None and a.proposal_id in version_of
    ]
    return summarise_effort(saves, names)
