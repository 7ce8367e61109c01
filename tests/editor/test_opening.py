"""Opening a project's tile in the editor (``labeler edit``): the state it starts from,
saves through the workflow, and the state printed is the state the store recorded."""

from __future__ import annotations

import numpy as np
import pytest

from labeler.editor.opening import edit_tile, open_tile_edit
from labeler.editor.panels import STATUS_ROWS
from labeler.editor.view import ViewTransform, fit_view_shape
from labeler.masks.edits import stroke_mask
from labeler.workflow import save_tile_mask
from tests.editor import xdrive
from tests.editor.conftest import display, xserver  # noqa: F401 - fixtures
from tests.editor.script import ScriptGui, drag_steps
from tests.workflow.conftest import fake_proposals, overlap_project, project  # noqa: F401

WEED = 2
STROKE = [(120, 200), (300, 210), (330, 420)]  # window points (x, y) of a 768 x 768 view


def _scripted(monkeypatch, steps):
    """Make the editor window a script (the CLI opens its own window)."""
    monkeypatch.setenv("DISPLAY", ":script")
    monkeypatch.setattr("labeler.editor.window.HighGuiWindow", lambda title: ScriptGui(steps))


@pytest.mark.parametrize(
    ("steps", "printed", "kind"),
    [
        ([13], "saved as accepted (full mask)", "full"),
        ([ord("2"), ord("d"), *drag_steps(STROKE), 13], "saved as amended (full mask)", "full"),
        ([ord("3"), ord("s"), *drag_steps(STROKE), ord("p")], "saved as weak (weak label)",
         "scribble"),
    ],
    ids=["unchanged", "stroke", "weak_label"],
)
def test_cli_prints_the_state_the_store_recorded(project, monkeypatch, capsys, steps,  # noqa: F811
                                                 printed, kind):
    from labeler.cli import main

    fake_proposals(project)
    tile = project.store.tiles()[1]
    _scripted(monkeypatch, steps)
    assert main(["edit", str(project.root), str(tile.id), "--annotator", "ines"]) == 0
    out = capsys.readouterr().out
    saved = project.store.latest_annotation(tile.id, kind=kind)
    assert saved.annotator == "ines" and saved.source == "editor"
    assert out.startswith(f"tile {tile.id}: {printed};")
    assert f"saved as {saved.state} (" in out  # the word is the store's
    after = project.store.tile(tile.id)
    assert after.held_by is None and after.state != "held"  # nobody holds it any more


def test_edit_tile_reports_the_state_written_and_releases_the_tile(project):  # noqa: F811
    fake_proposals(project)
    tile = project.store.tiles()[0]
    gui = ScriptGui([ord("2"), ord("d"), *drag_steps(STROKE), 13])
    tile_id, outcome = edit_tile(project, tile.id, "ines", gui=gui)
    saved = project.store.latest_annotation(tile.id)
    assert tile_id == tile.id and outcome.saved
    assert outcome.state == saved.state == "amended" and outcome.kind == "full"
    assert project.store.tile(tile.id).state == "amended"


def test_leaving_without_a_save_gives_the_tile_back(project):  # noqa: F811
    fake_proposals(project)
    tile = project.store.tiles()[0]
    before = project.store.tile(tile.id).state
    _tile_id, outcome = edit_tile(project, tile.id, "ines", gui=ScriptGui([27]))
    assert outcome.reason == "left" and outcome.state is None
    t = project.store.tile(tile.id)
    assert t.state == before and t.held_by is None
    assert project.store.latest_annotation(tile.id) is None


def test_next_tile_is_taken_when_none_is_named(project):  # noqa: F811
    from labeler.workflow import next_tile

    fake_proposals(project)
    expected = next_tile(project, "ines")
    tile_id, outcome = edit_tile(project, None, "ines", gui=ScriptGui([27]))
    assert tile_id == expected and outcome.reason == "left"


def test_open_tile_edit_starts_from_the_proposal(project):  # noqa: F811
    fake_proposals(project)
    tile = project.store.tiles()[2]
    edit = open_tile_edit(project, tile.id, "ines")
    proposal = project.store.latest_proposal(tile.id).mask()
    np.testing.assert_array_equal(edit.state.proposal, proposal)
    np.testing.assert_array_equal(edit.state.mask, proposal)
    assert edit.state.view_shape == fit_view_shape(tile.shape)
    assert edit.state.opacity == project.settings.editor.opacity
    assert edit.title.endswith(f"tile {tile.id} at row {tile.row} col {tile.col}")
    assert edit.compare_with is None and not edit.state.comparing
    assert project.store.tile(tile.id).state == "held"
    edit.state.show_heat = True  # these proposals carry no per-pixel uncertainty map
    assert not edit.state.show_heat and "no uncertainty map" in edit.state.notice


def test_settling_saves_settled_and_the_outcome_says_so(overlap_project):  # noqa: F811
    proj = overlap_project
    tile = proj.store.tiles()[0]
    a = np.zeros(tile.shape, np.uint8)
    a[:, :128] = 1
    b = np.zeros(tile.shape, np.uint8)
    b[:128, :] = 2
    save_tile_mask(proj, tile.id, "ines", a, parent_version=None)
    save_tile_mask(proj, tile.id, "tomas", b, parent_version=None)
    assert proj.store.tile(tile.id).state == "contested"
    edit = open_tile_edit(proj, tile.id, "rev", settle=True)
    assert edit.compare_with == "ines" and edit.state.comparing
    np.testing.assert_array_equal(edit.state.compare_mask, a)
    proj.store.release(tile.id, "rev")
    _tile_id, outcome = edit_tile(proj, tile.id, "rev", settle=True, gui=ScriptGui([13]))
    assert outcome.state == "settled"
    assert proj.store.latest_annotation(tile.id).state == "settled"
    assert proj.store.tile(tile.id).state == "settled"


def test_no_display_message(project, monkeypatch, capsys):  # noqa: F811
    from labeler.cli import main

    monkeypatch.delenv("DISPLAY", raising=False)
    fake_proposals(project)
    assert main(["edit", str(project.root), "--next", "--annotator", "ines"]) == 1
    err = capsys.readouterr().err
    assert "display" in err
    assert all(t.state != "held" for t in project.store.tiles())


@pytest.mark.display
def test_xvfb_cli_edit_saves_amended_exactly_where_the_stroke_went(display, project,  # noqa: F811
                                                                    tmp_path):
    fake_proposals(project)
    store = project.store
    tile = store.tiles()[4]
    image = store.image(tile.image_id)
    proposal = store.latest_proposal(tile.id).mask()
    view = fit_view_shape(tile.shape)
    title = f"labeler edit - {image.name} - tile {tile.id} at row {tile.row} col {tile.col}"
    child = xdrive.launch_cli(
        display, tmp_path / "edit",
        ["edit", str(project.root), str(tile.id), "--annotator", "ines"],
    )
    win = xdrive.wait_window(child, title, size=(view[1], view[0] + STATUS_ROWS))
    xdrive.press_keys(child, str(WEED), "d")  # weed, brush (keys from labeler.editor.keys)
    xdrive.drag(child, win, STROKE)
    xdrive.screenshot(display, "store-edit")  # kept in test-artefacts/editor/
    xdrive.press_keys(child, "Return")
    assert xdrive.stop_child(child) == 0, child.log_tail()
    saved = store.latest_annotation(tile.id)
    assert saved is not None and (saved.annotator, saved.state, saved.kind) == (
        "ines",
        "amended",
        "full",
    )
    # the command line printed the state the store recorded
    assert f"tile {tile.id}: saved as amended (full mask);" in child.log_tail()
    t = ViewTransform.fit(tile.shape, view)
    points = [tuple(float(v) for v in t.view_to_tile(y, x)) for x, y in STROKE]
    stroke = stroke_mask(points, radius=4.0, shape=tile.shape)  # the editor's default radius
    mask = saved.mask()
    np.testing.assert_array_equal(mask != proposal, stroke & (proposal != WEED))
    assert (mask[stroke] == WEED).all()
    assert saved.actions >= 1 and store.tile(tile.id).state == "amended"
    assert store.tile(tile.id).held_by is None
