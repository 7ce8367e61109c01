"""labeler edit over the real store: Xvfb window driven by xdotool, and the backend."""

import sys

import numpy as np
import pytest

from labeler.editor.state import ViewTransform, fit_view_shape
from labeler.editor.window import STATUS_ROWS
from labeler.errors import ConflictError, LabelerError
from labeler.masks.edits import stroke_mask
from labeler.workflow import open_edit_session, save_tile_mask
from tests.editor import xdrive
from tests.editor.conftest import display, xserver  # noqa: F401 - fixtures
from tests.workflow.conftest import fake_proposals

WEED = 2


@pytest.mark.display
def test_xvfb_edit_saves_amended_in_store_exactly_where_the_stroke_went(display, project, tmp_path):  # noqa: F811
    fake_proposals(project)
    store = project.store
    tile = store.tiles()[4]
    image = store.image(tile.image_id)
    proposal = store.latest_proposal(tile.id).mask()
    view = fit_view_shape(tile.shape)
    title = f"labeler edit - {image.name} - tile {tile.id} at row {tile.row} col {tile.col}"
    spec = tmp_path / "edit" / "spec.json"
    spec.parent.mkdir()
    child = xdrive.launch_child(
        display,
        spec,
        command=[
            sys.executable,
            "-m",
            "labeler.cli",
            "edit",
            str(project.root),
            str(tile.id),
            "--annotator",
            "ines",
        ],
    )
    win = xdrive.wait_window(display, title, size=(view[1], view[0] + STATUS_ROWS), child=child)
    drag = [(120, 200), (300, 210), (330, 420)]
    xdrive.press_keys(display, str(WEED), "d")  # weed, brush (keys from labeler.editor.keys)
    xdrive.drag(display, win, drag)
    xdrive.screenshot(display, "store-edit")  # kept in test-artefacts/editor/
    xdrive.press_keys(display, "Return")
    assert xdrive.stop_child(child) == 0, (spec.parent / "child.log").read_text()
    saved = store.latest_annotation(tile.id)
    assert saved is not None and (saved.annotator, saved.state, saved.kind) == (
        "ines",
        "amended",
        "full",
    )
    t = ViewTransform.fit(tile.shape, view)
    points = [tuple(float(v) for v in t.view_to_tile(y, x)) for x, y in drag]
    stroke = stroke_mask(points, radius=4.0, shape=tile.shape)  # the editor's default radius
    mask = saved.mask()
    np.testing.assert_array_equal(mask != proposal, stroke & (proposal != WEED))
    assert (mask[stroke] == WEED).all()
    assert saved.actions >= 1 and store.tile(tile.id).state == "amended"
    assert store.tile(tile.id).held_by is None


def test_backend_conflict_carries_their_mask_and_keeps_draft(project):
    fake_proposals(project)
    tile = project.store.tiles()[0]
    session = open_edit_session(project, tile.id, "ines")
    assert project.store.tile(tile.id).state == "held"
    theirs = np.ones(tile.shape, np.uint8)
    save_tile_mask(project, tile.id, "tomas", theirs, parent_version=None)
    mine = np.full(tile.shape, 2, np.uint8)
    with pytest.raises(ConflictError) as info:
        session.backend.save(mine, kind="full", state="amended", actions=3, seconds=9.0)
    np.testing.assert_array_equal(info.value.theirs, theirs)
    session.backend.save_draft(mine, np.full(tile.shape, 255, np.uint8), actions=3, seconds=9.0)
    draft = session.backend.load_draft()
    np.testing.assert_array_equal(draft.mask, mine)
    assert [a.annotator for a in project.store.annotation_history(tile.id)] == ["tomas"]


def test_settle_needs_contested(project):
    fake_proposals(project)
    tile = project.store.tiles()[0]
    with pytest.raises(LabelerError, match="not contested"):
        open_edit_session(project, tile.id, "rev", settle=True)


def test_settle_starts_from_consensus_and_shows_both(overlap_project):
    project = overlap_project
    tile = project.store.tiles()[0]
    a = np.zeros(tile.shape, np.uint8)
    a[:, :128] = 1
    b = np.zeros(tile.shape, np.uint8)
    b[:128, :] = 2
    save_tile_mask(project, tile.id, "ines", a, parent_version=None)
    save_tile_mask(project, tile.id, "tomas", b, parent_version=None)
    assert project.store.tile(tile.id).state == "contested"
    session = open_edit_session(project, tile.id, "rev", settle=True)
    assert session.compare_with == "ines"
    session.backend.save(session.state.mask, kind="full", state="amended", actions=1, seconds=1.0)
    assert project.store.tile(tile.id).state == "settled"
    assert project.store.latest_annotation(tile.id).state == "settled"


def test_no_display_message(project, monkeypatch, capsys):
    from labeler.cli import main

    monkeypatch.delenv("DISPLAY", raising=False)
    fake_proposals(project)
    assert main(["edit", str(project.root), "--next", "--annotator", "ines"]) == 1
    err = capsys.readouterr().err
    assert "display" in err
    assert all(t.state != "held" for t in project.store.tiles())
