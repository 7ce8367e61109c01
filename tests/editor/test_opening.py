"""Opening a project's tile in the editor (``labeler edit``): the state it starts from,
saves through the workflow, and the state printed is the state the store recorded."""

from __future__ import annotations

import numpy as np
import pytest

from labeler.editor.opening import edit_tile, open_tile_edit
from labeler.editor.panels import STATUS_ROWS
from labeler.editor.view import PANE_GAP, ViewTransform, fit_view_shape
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
        ([ord("3"), ord("s"), *drag_steps(STROKE), ord("k")], "saved as weak (weak label)",
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


def _contested(proj):
    """Tile 0 of ``proj`` saved by ines (left half crop) and tomas (top half weed)."""
    tile = proj.store.tiles()[0]
    a = np.zeros(tile.shape, np.uint8)
    a[:, : tile.shape[1] // 2] = 1
    b = np.zeros(tile.shape, np.uint8)
    b[: tile.shape[0] // 2, :] = 2
    save_tile_mask(proj, tile.id, "ines", a, parent_version=None)
    save_tile_mask(proj, tile.id, "tomas", b, parent_version=None)
    assert proj.store.tile(tile.id).state == "contested"
    return tile, a, b


def test_settle_view_starts_from_the_consensus_with_every_mask_beside_it(overlap_project):  # noqa: F811
    from labeler.agreement import staple
    from labeler.editor.opening import CONSENSUS_TITLE

    proj = overlap_project
    tile, a, b = _contested(proj)
    edit = open_tile_edit(proj, tile.id, "rev", settle=True)
    s = edit.state
    assert edit.settling and edit.compare_with == "ines" and s.comparing
    assert s.pane_titles == (CONSENSUS_TITLE, "ines", "tomas")
    np.testing.assert_array_equal(s.compare_masks[0], a)
    np.testing.assert_array_equal(s.compare_masks[1], b)
    # the editable pane starts from the STAPLE consensus (Warfield, Zou & Wells 2004)
    expected = staple(np.stack([a, b]), n_classes=proj.settings.classes.n_values).consensus
    np.testing.assert_array_equal(s.mask[expected != 255], expected[expected != 255])
    h, w = tile.shape
    assert (s.mask[h // 2 :, w // 2 :] == 0).all()  # where both say soil, so does any consensus
    # three panes, each exactly one zoomed tile: the window has no backdrop bands
    assert s.view_shape == fit_view_shape(tile.shape, panes=3)
    zoom = s.transform.zoom
    assert zoom == int(zoom) >= 1 and s.pane_shape == (h * zoom, w * zoom)
    assert s.view_shape[1] == 3 * w * zoom + 2 * PANE_GAP
    proj.store.release(tile.id, "rev")


def test_settling_asks_before_it_saves(overlap_project):  # noqa: F811
    proj = overlap_project
    tile, _a, _b = _contested(proj)
    # Enter asks; n goes back to editing; Esc then asks to drop the work; y drops it
    gui = ScriptGui([13, ord("n"), 27, ord("y")])
    _tile_id, outcome = edit_tile(proj, tile.id, "rev", settle=True, gui=gui)
    assert outcome.reason == "discarded" and not outcome.saved
    assert proj.store.tile(tile.id).state == "contested"
    assert proj.store.latest_annotation(tile.id, annotator="rev") is None
    # the question is drawn in the window: the frame after Enter differs from the one before
    before, asking = gui.frames[0], gui.frames[1]
    rows = slice(before.shape[0] // 2 - 40, before.shape[0] // 2 + 40)
    assert (before[rows] != asking[rows]).any()
    # Enter, then y: settled
    gui = ScriptGui([13, ord("y")])
    _tile_id, outcome = edit_tile(proj, tile.id, "rev", settle=True, gui=gui)
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


@pytest.mark.display
def test_xvfb_settle_window_fits_three_panes_and_asks_before_settling(  # noqa: F811
        display, overlap_project, tmp_path):  # noqa: F811
    proj = overlap_project
    tile, _a, _b = _contested(proj)
    image = proj.store.image(tile.image_id)
    view = fit_view_shape(tile.shape, panes=3)
    title = f"labeler edit - {image.name} - tile {tile.id} at row {tile.row} col {tile.col}"
    child = xdrive.launch_cli(
        display, tmp_path / "settle",
        ["edit", str(proj.root), str(tile.id), "--settle", "--annotator", "rev"],
    )
    # the window is exactly three panes wide (plus the status strip below)
    xdrive.wait_window(child, title, size=(view[1], view[0] + STATUS_ROWS))
    step = (view[1] - 2 * PANE_GAP) // 3 + PANE_GAP

    def shown(name):
        return xdrive.screenshot(display, name)[1][: view[0], : view[1]]

    def titled():  # white title letters at the corner of each of the three panes
        frame = shown("settle-three-panes")
        return all((frame[2:18, off + 6 : off + 40] > 200).any() for off in (0, step, 2 * step))

    xdrive.wait_for(titled, timeout=10, what="the three titled panes", interval=0.1)
    first = shown("settle-three-panes")
    assert not (first[20:] == 38).all(axis=2).any()  # no backdrop below the pane titles
    xdrive.press_keys(child, "Return")
    xdrive.wait_for(lambda: (shown("settle-question") != first).any(), timeout=10,
                    what="the settle question drawn", interval=0.1)
    assert child.process.poll() is None  # Enter alone settles nothing
    assert proj.store.tile(tile.id).state == "contested"
    xdrive.press_keys(child, "y")
    assert xdrive.stop_child(child) == 0, child.log_tail()
    assert f"tile {tile.id}: saved as settled (full mask);" in child.log_tail()
    assert proj.store.tile(tile.id).state == "settled"
