"""``labeler edit --next``: one tile after another until the annotator stops.

After a save the editor opens the annotator's next tile at once (the queue order of
:func:`labeler.workflow.next_tile`), so nobody relaunches the command per tile. The
sequence stops when a tile is left without a save (Esc, the window closed, a save that
lost to someone else's), or when nothing is left for the annotator.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator

from labeler.editor.opening import edit_tile
from labeler.editor.session import EditorOutcome
from labeler.editor.window import Gui
from labeler.errors import NotFoundError
from labeler.project import Project

__all__ = ["edit_in_turn"]


def edit_in_turn(
    project: Project,
    annotator: str,
    *,
    report: Callable[[int, EditorOutcome], None],
    guis: Iterator[Gui] | None = None,
    limit: int | None = None,
) -> tuple[list[tuple[int, EditorOutcome]], bool]:
    """Edit the annotator's next tiles one after another (see the module docstring).

    Parameters
    ----------
    project : Project
        The open project.
    annotator : str
        Who edits.
    report : callable(tile_id, outcome)
        Called after each tile (the command prints a line).
    guis : iterator of Gui, optional
        A window per tile; default an OpenCV window each (needs a display).
    limit : int, optional
        Stop after this many tiles.

    Returns
    -------
    done : list of (int, EditorOutcome)
        Every tile opened and how it ended, in order.
    exhausted : bool
        True when the sequence stopped because nothing was left for the annotator.

    Raises
    ------
    labeler.errors.NotFoundError
        When nothing is left for the annotator before the first tile.
    """
    done: list[tuple[int, EditorOutcome]] = []
    while limit is None or len(done) < limit:
        gui = None if guis is None else next(guis)
        try:
            tile_id, outcome = edit_tile(project, None, annotator, gui=gui)
        except NotFoundError:
            if not done:
                raise
            return done, True
        done.append((tile_id, outcome))
        report(tile_id, outcome)
        if not outcome.saved:
            break
    return done, False
