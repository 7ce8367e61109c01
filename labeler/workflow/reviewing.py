"""Who may settle a contested tile.

A contested tile is one whose annotators disagreed beyond the project's threshold; a
reviewer decides it (state ``settled``). Two rules keep that decision a review:

* the reviewer is not one of the annotators whose masks disagree (they would be
  judging their own work);
* when the project names its reviewers (``[agreement] reviewers = "ana, tomas"`` in
  ``labeler.toml``), only they settle. An empty list (the default) lets anyone settle
  who did not annotate the tile.

Both are checked when the editor opens a tile to settle and again when the decision is
saved, so neither the queue nor a script can go round them.
"""

from __future__ import annotations

from labeler.errors import LabelerError
from labeler.project import Project

__all__ = ["project_reviewers", "check_reviewer"]


def project_reviewers(project: Project) -> tuple[str, ...]:
    """The names in ``[agreement] reviewers`` (comma-separated).

    Parameters
    ----------
    project : Project
        The open project.

    Returns
    -------
    tuple of str
        The reviewers; () when anyone who did not annotate a tile may settle it.
    """
    text = project.settings.agreement.reviewers
    return tuple(name.strip() for name in text.split(",") if name.strip())


def check_reviewer(project: Project, tile_id: int, reviewer: str) -> None:
    """Raise unless ``reviewer`` may settle ``tile_id`` (rules in the module docstring).

    Parameters
    ----------
    project : Project
        The open project.
    tile_id : int
        The contested tile.
    reviewer : str
        Who wants to settle it.

    Raises
    ------
    LabelerError
        Naming the rule broken and what to do instead.
    """
    allowed = project_reviewers(project)
    if allowed and reviewer not in allowed:
        raise LabelerError(
            f"{reviewer!r} is not a reviewer of this project (reviewers: {', '.join(allowed)}); "
            "ask one of them to settle tile "
            f"{tile_id}, or add the name to [agreement] reviewers in labeler.toml"
        )
    savers = project.store.savers(tile_id)
    if reviewer in savers:
        raise LabelerError(
            f"tile {tile_id}: {reviewer!r} is one of its annotators ({', '.join(savers)}) and "
            "cannot settle their own disagreement; another reviewer settles it"
        )
