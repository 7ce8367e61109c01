"""The queue screen through Textual's Pilot on the small project with the fake proposer."""

import numpy as np
from textual.widgets import DataTable, Select

import labeler.workflow as workflow
from labeler.imagery.read import open_image
from labeler.store import NewProposal
from labeler.tui.app import QueueApp
from labeler.tui.park_prompt import ParkPrompt
from labeler.tui.preview import half_block_text, tile_picture
from labeler.tui.rows import QUEUE_COLUMNS
from labeler.tui.widgets import TilePreview, WorkBar
from labeler.workflow import park_tile, pick_tiles, queue_rows
from tests.tui.helpers import SIZE, idle, svg_text
from tests.workflow.conftest import fake_proposals


def _state_column(table):
    col = QUEUE_COLUMNS.index("state")
    return [str(table.get_row_at(i)[col]) for i in range(table.row_count)]


async def test_queue_shows_picker_order_and_screenshot(project, artefacts):
    fake_proposals(project)
    pick_tiles(project, seed=0)
    app = QueueApp(project, annotator="ana")
    async with app.run_test(size=SIZE) as pilot:
        await idle(pilot)
        screen = app.screen
        order = [i.tile_id for i in project.store.latest_pick()]
        assert screen.table_order() == order
        table = screen.query_one("#queue", DataTable)
        shown = [str(c.label) for c in table.columns.values()]
        # every column but the empty agreement column (no overlap tile has two masks yet)
        # fits 160 columns; "ranked by" is one of them
        assert shown == [c for c in QUEUE_COLUMNS if c != "agreement"]
        first = table.get_row_at(0)
        assert str(first[0]) == "1" and str(first[1]) == str(order[0])
        path = app.save_screenshot(filename="queue.svg", path=str(artefacts))
    svg = svg_text(path)
    for heading in (*shown, "every state", "any class", "anyone", "labeler queue",
                    "re-pick", "accept", "crop", "weed", "symptom"):
        assert heading in svg, heading


async def test_state_class_and_person_filters(project):
    fake_proposals(project)
    tiles = [t.id for t in project.store.tiles()]
    park_tile(project, tiles[1], "ana")
    park_tile(project, tiles[4], "bo")
    # a newer proposal for one tile predicts no weed at all
    shape = project.store.tile(tiles[2]).shape
    no_weed = np.zeros(shape, np.uint8)
    no_weed[:, : shape[1] // 2] = 1
    mv = project.store.add_model_version(kind="head", name="fake-2")
    project.store.add_proposals(mv.id, [NewProposal(
        tiles[2], no_weed, embedding=np.zeros(16, np.float32), class_fractions=[0.5, 0.5, 0, 0],
    )])
    app = QueueApp(project, annotator="ana")
    async with app.run_test(size=SIZE) as pilot:
        await idle(pilot)
        screen = app.screen
        table = screen.query_one("#queue", DataTable)
        screen.query_one("#state-filter", Select).value = "parked"
        await idle(pilot)
        assert screen.table_order() == [tiles[1], tiles[4]]
        assert set(_state_column(table)) == {"parked"}
        screen.query_one("#state-filter", Select).clear()
        screen.query_one("#class-filter", Select).value = "weed"
        await idle(pilot)
        # expected from the stored proposal masks themselves: weed on at least 1 % of pixels
        expected = [
            r.tile_id for r in queue_rows(project)
            if np.mean(project.store.latest_proposal(r.tile_id).mask() == 2) >= 0.01
        ]
        assert tiles[2] not in expected
        assert screen.table_order() == expected
        screen.query_one("#class-filter", Select).clear()
        await idle(pilot)
        assert screen.table_order() == tiles


async def test_moving_the_cursor_updates_the_preview(project):
    fake_proposals(project)
    app = QueueApp(project, annotator="ana")
    async with app.run_test(size=SIZE) as pilot:
        await idle(pilot)
        screen = app.screen
        preview = screen.query_one(TilePreview)
        first = preview.tile_id
        assert first == screen.table_order()[0]
        before = preview.render().plain
        await pilot.press("down")
        await idle(pilot)
        second = screen.table_order()[1]
        assert screen.selected_tile() == second and preview.tile_id == second
        # the picture is the tile read from its image with its proposal, fitted to the widget
        tile = project.store.tile(second)
        image = project.store.image(tile.image_id)
        with open_image(project.image_path(image)) as reader:
            rgb = reader.read(tile.window)
        mask = project.store.latest_proposal(second).mask()
        size = preview.content_size
        expected = half_block_text(tile_picture(
            rgb, mask, schema=project.settings.classes, opacity=0.45, cols=size.width,
            rows=size.height,
        ))
        shown = preview.render()
        assert shown.plain == expected.plain and shown.plain != ""
        assert shown.spans == expected.spans
        assert before.count("\n") == shown.plain.count("\n")
        caption = str(screen.query_one("#preview-caption").render())
        assert f"tile {second}" in caption and "proposal of fake" in caption


async def test_accept_moves_on_and_park_asks_why(project):
    fake_proposals(project)
    app = QueueApp(project, annotator="ana")
    async with app.run_test(size=SIZE) as pilot:
        await idle(pilot)
        await pilot.press("down")
        await idle(pilot)
        tile = app.screen.selected_tile()
        await pilot.press("a")
        await idle(pilot)
        saved = project.store.latest_annotation(tile, annotator="ana")
        assert saved is not None and saved.state == "accepted" and saved.annotator == "ana"
        np.testing.assert_array_equal(saved.mask(), project.store.latest_proposal(tile).mask())
        table = app.screen.query_one("#queue", DataTable)
        row = table.get_row(str(tile))
        assert str(row[QUEUE_COLUMNS.index("state")]) == "accepted"
        assert str(row[QUEUE_COLUMNS.index("who")]) == "ana"
        assert any("proposal kept as ana's mask" in n.message for n in app.notices)
        # accept moved on to the next tile ana may take
        after = app.screen.selected_tile()
        assert after != tile and after == workflow.next_tile(project, "ana")
        # a second accept of the same proposal saves nothing
        app.screen.select_tile(tile)
        await idle(pilot)
        assert app.screen.selected_tile() == tile, (app.screen.columns, tile, after)
        await pilot.press("a")
        await idle(pilot)
        assert len([a for a in project.store.annotations(kind=None) if a.tile_id == tile]) == 1
        assert any("already kept this proposal" in n.message for n in app.notices), [n.message for n in app.notices]
        # park the next row, with a reason typed into the box
        app.screen.select_tile(after)
        await idle(pilot)
        await pilot.press("p")
        await idle(pilot)
        assert isinstance(app.screen, ParkPrompt)
        await pilot.press(*"blurred", "enter")
        await idle(pilot)
        assert project.store.tile(after).state == "parked"
        assert any(n.message == f"tile {after} parked: blurred" for n in app.notices)
        row = app.screen.query_one("#queue", DataTable).get_row(str(after))
        assert str(row[QUEUE_COLUMNS.index("state")]) == "parked"
        # p on a parked tile brings it back, asking nothing
        await pilot.press("p")
        await idle(pilot)
        assert project.store.tile(after).state == "proposed"
        # Esc in the box keeps the tile in the queue
        await pilot.press("p")
        await idle(pilot)
        await pilot.press("escape")
        await idle(pilot)
        assert project.store.tile(after).state == "proposed"


async def test_repick_updates_the_order(project):
    fake_proposals(project, seed=4)
    app = QueueApp(project, annotator="ana")
    async with app.run_test(size=SIZE) as pilot:
        await idle(pilot)
        assert project.store.latest_pick() == []
        assert app.screen.table_order() == [t.id for t in project.store.tiles()]
        await pilot.press("f5")  # compute again: re-pick
        await idle(pilot)
        order = [i.tile_id for i in project.store.latest_pick()]
        assert len(order) == 6
        assert app.screen.table_order() == order
        assert app.screen.long_work is None
        assert not app.screen.query_one(WorkBar).has_class("busy")
        assert any(n.message.startswith("queue re-picked") for n in app.notices)


async def test_next_selects_the_next_tile_and_clears_filters(project):
    fake_proposals(project)
    pick_tiles(project, seed=0)
    first = project.store.latest_pick()[0].tile_id
    app = QueueApp(project, annotator="ana")
    async with app.run_test(size=SIZE) as pilot:
        await idle(pilot)
        app.screen.query_one("#state-filter", Select).value = "parked"  # hides every tile
        await idle(pilot)
        assert app.screen.table_order() == []
        await pilot.press("n")
        await idle(pilot)
        # nothing is saved or held yet, so the next tile is the first in picker order
        assert app.screen.selected_tile() == first
        assert app.screen.query_one("#state-filter", Select).value is Select.NULL


async def test_search_by_tile_id(project):
    fake_proposals(project)
    app = QueueApp(project, annotator="ana")
    async with app.run_test(size=SIZE) as pilot:
        await idle(pilot)
        await pilot.press("slash")
        await pilot.press("5", "enter")
        await idle(pilot)
        assert app.screen.selected_tile() == 5
        assert app.screen.query_one(TilePreview).tile_id == 5
        await pilot.press("slash")
        await pilot.press("9", "9", "enter")
        await idle(pilot)
        assert app.notices[-1].severity == "warning"
        assert app.notices[-1].message.startswith("tile 99 is not in this project")


async def test_preview_never_shows_another_annotators_mask_on_an_overlap_tile(overlap_project):
    project = overlap_project
    fake_proposals(project)
    from labeler.workflow import save_tile_mask

    tile = project.store.tiles()[0]
    save_tile_mask(project, tile.id, "bea", np.ones(tile.shape, np.uint8), parent_version=None)
    app = QueueApp(project, annotator="ana")
    async with app.run_test(size=SIZE) as pilot:
        await idle(pilot)
        await pilot.press("slash")
        await pilot.press(*str(tile.id), "enter")
        await idle(pilot)
        caption = str(app.screen.query_one("#preview-caption").render())
        assert f"tile {tile.id}" in caption
        assert "bea" not in caption and "proposal of fake" in caption


async def test_retrain_key_renews_the_proposals_in_a_worker_and_the_preview_follows(
    project, monkeypatch
):
    # training and the real renewal are tested in tests/workflow; here the queue's part:
    # both run in one lowered-priority worker thread, then the rows and preview follow
    import os
    import threading
    from types import SimpleNamespace

    import labeler.workflow as workflow

    fake_proposals(project)
    first = project.store.tiles()[0]
    ran = {}

    def fake_retrain(project_, *, progress):
        mv = project_.store.add_model_version(
            kind="head", name="head-1", n_train_tiles=3, val_iou={"soil": 0.9}, miou=0.9
        )
        return SimpleNamespace(model_version=mv)

    def fake_renew(project_, *, progress):
        tid = threading.get_native_id()
        ran["thread"] = threading.current_thread() is not threading.main_thread()
        main = threading.main_thread().native_id  # on Linux each thread has its own nice
        ran["nice"] = os.getpriority(os.PRIO_PROCESS, tid) - os.getpriority(os.PRIO_PROCESS, main)
        mv = project_.store.latest_model_version(kind="head")
        tiles = project_.store.tiles()
        items = [NewProposal(t.id, np.full(t.shape, 2, np.uint8)) for t in tiles]
        written = project_.store.add_proposals(mv.id, items, only_open=True)
        progress(len(tiles), len(tiles), "east-block: proposed")
        return SimpleNamespace(
            proposals=SimpleNamespace(proposed=len(written), left_alone=len(items) - len(written)),
            picked=None,
            note="",
        )

    monkeypatch.setattr(workflow, "retrain", fake_retrain)
    monkeypatch.setattr(workflow, "renew_proposals", fake_renew)
    app = QueueApp(project, annotator="ana")
    async with app.run_test(size=SIZE) as pilot:
        await idle(pilot)
        screen = app.screen
        assert screen.selected_tile() == first.id or screen.select_tile(first.id)
        await idle(pilot)
        preview = screen.query_one(TilePreview)
        before = preview.render().spans  # the colours; the text is half blocks
        await pilot.press("t")
        await pilot.app.workers.wait_for_complete()
        await idle(pilot)
        assert ran["thread"] and ran["nice"] > 0  # a worker thread at a lower priority
        assert app.notices[-1].message == "proposals renewed on 6 tiles"
        assert screen.long_work is None
        caption = str(screen.query_one("#preview-caption").render())
        assert "proposal of head-1" in caption
        assert preview.render().spans != before  # the new mask is drawn over the tile


async def test_the_columns_fit_80_columns(project):
    fake_proposals(project)
    app = QueueApp(project, annotator="ana")
    async with app.run_test(size=(80, 24)) as pilot:
        await idle(pilot)
        screen = app.screen
        table = screen.query_one("#queue", DataTable)
        shown = [str(c.label) for c in table.columns.values()]
        assert shown == list(screen.columns)
        assert {"tile", "state", "reason"} <= set(shown) and len(shown) < len(QUEUE_COLUMNS)
        # no column is cut: each is as wide as its widest text, and they fit the table
        widths = [c.get_render_width(table) for c in table.columns.values()]
        assert sum(widths) <= table.size.width
        states = [str(table.get_row_at(i)[shown.index("state")]) for i in range(table.row_count)]
        assert set(states) == {"proposed"}
    wide = QueueApp(project, annotator="ana")
    async with wide.run_test(size=SIZE) as pilot:
        await idle(pilot)
        assert len(wide.screen.columns) > len(shown)  # a wide terminal shows more


async def _until(pilot, condition, *, what: str, timeout: float = 15.0) -> None:
    """Let the app run until ``condition()`` holds (fails after ``timeout`` seconds)."""
    import asyncio

    loop = asyncio.get_running_loop()
    end = loop.time() + timeout
    while not condition():
        if loop.time() > end:
            raise AssertionError(f"waited {timeout} s for {what}")
        await pilot.pause(0.05)


async def test_holds_show_live_when_another_connection_takes_one(project, monkeypatch):
    from labeler.project import open_project
    from labeler.tui.queue_screen import QueueScreen

    fake_proposals(project)
    monkeypatch.setattr(QueueScreen, "holds_every", 0.2)
    tile = project.store.tiles()[2].id
    app = QueueApp(project, annotator="ana")
    async with app.run_test(size=SIZE) as pilot:
        await idle(pilot)
        screen = app.screen

        def cell(column: str) -> str:
            row = screen.query_one("#queue", DataTable).get_row(str(tile))
            return str(row[screen.columns.index(column)])

        assert (cell("state"), cell("who")) == ("proposed", "")
        loads = screen.loads
        # bo opens the tile from another connection to the same project (another laptop)
        other = open_project(project.root)
        try:
            other.store.hold(tile, "bo")
            await _until(pilot, lambda: cell("who") == "bo (open)", what="bo's hold shown")
            assert cell("state") == "held" and screen.loads > loads
            await idle(pilot)
            checks, loads = screen.hold_checks, screen.loads
            await _until(pilot, lambda: screen.hold_checks >= checks + 2, what="two more reads")
            assert screen.loads == loads  # the holds did not change: the rows are not read again
            other.store.release(tile, "bo")
            await _until(pilot, lambda: cell("who") == "", what="bo's hold gone")
            assert cell("state") == "proposed"
        finally:
            other.close()


async def test_preview_zooms_to_full_resolution_and_centres_on_a_click(project):
    from labeler.tui.preview import overlay, zoom_picture

    fake_proposals(project)
    app = QueueApp(project, annotator="ana")
    async with app.run_test(size=SIZE) as pilot:
        await idle(pilot)
        screen = app.screen
        preview = screen.query_one(TilePreview)
        tile = project.store.tile(preview.tile_id)
        image = project.store.image(tile.image_id)
        with open_image(project.image_path(image)) as reader:
            rgb = reader.read(tile.window)
        picture = overlay(rgb, project.store.latest_proposal(tile.id).mask(),
                          schema=project.settings.classes, opacity=0.45)
        size = preview.content_size
        h, w = tile.shape
        assert preview.zoom == 1 and preview.shown_window == (0, h, 0, w)
        await pilot.press("plus", "plus", "plus")  # zoom 8
        await idle(pilot)
        assert preview.zoom == 8
        expected, window = zoom_picture(picture, zoom=8, centre=((h - 1) / 2, (w - 1) / 2),
                                        cols=size.width, rows=size.height)
        assert preview.shown_window == window
        r0, r1, c0, c1 = window
        # at zoom 8 a tile pixel gets at least one preview pixel: full resolution, or more
        assert expected.shape[0] >= r1 - r0 and expected.shape[1] >= c1 - c0
        assert preview.render().plain == half_block_text(expected).plain
        assert screen.query_one("#side").border_subtitle == (
            f"zoom x8: rows {r0}-{r1 - 1}, cols {c0}-{c1 - 1}")
        # a click in the picture's top-left cell centres the zoom on that tile pixel
        await pilot.click(TilePreview, offset=(0, 0))
        await idle(pilot)
        assert preview.centre is not None
        assert preview.centre[0] < (r0 + r1) / 2 and preview.centre[1] < (c0 + c1) / 2
        assert preview.shown_window[0] <= r0 and preview.shown_window[2] <= c0
        await pilot.press("minus")
        await idle(pilot)
        assert preview.zoom == 4
        await pilot.press("w")
        await idle(pilot)
        assert preview.zoom == 1 and preview.shown_window == (0, h, 0, w)
        assert screen.query_one("#side").border_subtitle == ""


async def test_ranked_by_column_shows_what_the_rank_follows(project):
    from labeler.tui.rows import ranking_notes

    fake_proposals(project)
    pick_tiles(project, seed=0)
    app = QueueApp(project, annotator="ana")
    async with app.run_test(size=SIZE) as pilot:
        await idle(pilot)
        screen = app.screen
        table = screen.query_one("#queue", DataTable)
        col = screen.columns.index("ranked by")
        shown = [str(table.get_row_at(i)[col]) for i in range(table.row_count)]
        rows = queue_rows(project)
        notes = ranking_notes(rows)
        assert shown == [notes.get(r.tile_id, "-") for r in rows]
        # the plain figures of each part of the queue never rise with rank
        for part in (True, False):
            texts = [notes[r.tile_id] for r in rows if r.rank is not None and r.in_batch == part]
            if texts and not texts[0].startswith(("pick", "disagree")):
                values = [float(t) for t in texts]
                assert values == sorted(values, reverse=True)
