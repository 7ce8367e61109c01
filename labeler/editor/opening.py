"""Opening a project's tile in the mask editor (``labeler edit``).

The workflow gathers what the edit starts from and holds the tile
(:func:`labeler.workflow.editing.begin_edit`); this module builds the editor's state from
it, runs the window (:func:`labeler.editor.window.run_editor`) and gives the tile back
(:func:`labeler.workflow.editing.end_edit`). Saves go through the workflow's
:class:`~labeler.workflow.editing.StoreBackend`, which records the annotation state the
workflow decides; the outcome carries that state.

The CLI's ``edit`` command calls :func:`edit_tile`; the terminal queue starts that command
in its own process.
"""

from __future__ import annotations

from dataclasses import dataclass

from labeler.editor.session import EditorOutcome
from labeler.editor.state import EditorState
from labeler.editor.view import fit_view_shape
from labeler.editor.window import Gui, require_display, run_editor
from labeler.project import Project
from labeler.workflow.annotating import next_tile
from labeler.workflow.editing import StoreBackend, begin_edit, end_edit

__all__ = ["CONSENSUS_TITLE", "TileEdit", "open_tile_edit", "edit_tile"]

#: Title of the editable pane when settling: it starts from the STAPLE consensus.
CONSENSUS_TITLE = "consensus (STAPLE)"


@dataclass
class TileEdit:
    """Everything :func:`edit_tile` hands to the editor window.

    Parameters
    ----------
    state : EditorState
        The tile, ready to edit.
    backend : StoreBackend
        Where the edit saves.
    title : str
        Window title.
    compare_with : str or None
        Whose mask is shown first beside the edit (settling), or None.
    settling : bool
        True when a reviewer settles a contested tile (a save asks first).
    """

    state: EditorState
    backend: StoreBackend
    title: str
    compare_with: str | None = None
    settling: bool = False


def open_tile_edit(
    project: Project, tile_id: int, annotator: str, *, settle: bool = False
) -> TileEdit:
    """Prepare the editor state of a tile for ``annotator`` and mark the tile held.

    Parameters
    ----------
    project : Project
        The open project.
    tile_id : int
        The tile to edit.
    annotator : str
        Who edits (the reviewer when settling).
    settle : bool
        Settle a contested tile: the edit starts from the STAPLE consensus (its pane
        titled :data:`CONSENSUS_TITLE`), every annotator's mask beside it under their
        name, the window as wide as the panes.

    Returns
    -------
    TileEdit

    Raises
    ------
    LabelerError
        If ``settle`` is asked for a tile that is not contested, or without two masks.
    """
    start = begin_edit(project, tile_id, annotator, settle=settle)
    panes = 1 + len(start.annotations)
    state = EditorState(
        start.image,
        start.proposal,
        schema=project.settings.classes,
        mask=start.mask,
        uncertainty=start.uncertainty,
        opacity=project.settings.editor.opacity,
        view_shape=fit_view_shape(start.mask.shape, panes=panes),
    )
    if start.annotations:
        state.set_compare_all(
            [m for _name, m in start.annotations],
            labels=[name for name, _m in start.annotations],
            edit_label=CONSENSUS_TITLE,
        )
    elif start.compare is not None:
        state.set_compare(start.compare, label=start.compare_label)
    title = (f"labeler edit - {start.image_name} - tile {tile_id} at row {start.row} "
             f"col {start.col}")
    return TileEdit(state=state, backend=start.backend, title=title,
                    compare_with=start.compare_label, settling=settle)


def edit_tile(
    project: Project,
    tile_id: int | None,
    annotator: str,
    *,
    settle: bool = False,
    gui: Gui | None = None,
) -> tuple[int, EditorOutcome]:
    """Open the editor window on a tile (or the annotator's next tile) until it closes.

    Parameters
    ----------
    project : Project
        The open project.
    tile_id : int or None
        The tile; None takes the annotator's next tile in queue order.
    annotator : str
        Who edits.
    settle : bool
        Settle a contested tile (see :func:`open_tile_edit`).
    gui : Gui, optional
        The window; default an OpenCV HighGUI window (needs a display).

    Returns
    -------
    (tile_id, outcome) : (int, EditorOutcome)
        The tile edited and how the session ended; ``outcome.state`` is the annotation
        state the store recorded when a label was saved.

    Raises
    ------
    LabelerError
        When there is no display, or settling is refused.
    labeler.errors.NotFoundError
        When ``tile_id`` is None and nothing is left for the annotator.

    Notes
    -----
    A tile left without a save goes back from ``held`` to its earlier state (the draft,
    if any, is kept).
    """
    if gui is None:
        require_display()
    if tile_id is None:
        tile_id = next_tile(project, annotator)
    edit = open_tile_edit(project, tile_id, annotator, settle=settle)
    try:
        outcome = run_editor(
            edit.state,
            backend=edit.backend,
            schema=project.settings.classes,
            title=edit.title,
            autosave_seconds=project.settings.editor.autosave_seconds,
            heartbeat_seconds=project.settings.holds.heartbeat_seconds,
            gui=gui,
            settling=edit.settling,
        )
    finally:
        end_edit(project, tile_id, annotator)
    return tile_id, outcome
