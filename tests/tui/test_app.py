"""The app's shared duties: the editor process, the no-display message, errors, retraining."""

import subprocess
import sys
import threading
from types import SimpleNamespace

import pytest
from textual.widgets import DataTable, Sparkline
from textual.widgets._toast import Toast

import labeler.workflow as workflow
from labeler.errors import LabelerError
from labeler.tui.app import QueueApp, run_queue
from labeler.tui.widgets import WorkBar
from tests.tui.helpers import SIZE, idle
from tests.workflow.conftest import fake_proposals


class FakeEditor:
    """Records the editor commands instead of starting a window."""

    def __init__(self, returncode=0, stderr=""):
        self.commands = []
        self.returncode = returncode
        self.stderr = stderr

    def __call__(self, command):
        self.commands.append(list(command))
        return subprocess.CompletedProcess(command, self.returncode, "", self.stderr)


def _toast_texts(app):
    return [str(t.render()) for t in app.screen.query(Toast)]


@pytest.mark.skipif(sys.platform.startswith(("win", "darwin")), reason="desktops need no DISPLAY")
async def test_no_display_says_so_and_starts_nothing(project, monkeypatch):
    monkeypatch.delenv("DISPLAY", raising=False)
    fake_proposals(project)
    editor = FakeEditor()
    app = QueueApp(project, annotator="ana", editor_runner=editor)
    async with app.run_test(size=SIZE, notifications=True) as pilot:
        await idle(pilot)
        tile = app.screen.selected_tile()
        await pilot.press("e")
        await idle(pilot)
        assert editor.commands == []
        notice = app.notices[-1]
        assert notice.severity == "warning"
        assert notice.message.startswith(f"No display here (DISPLAY is not set), so the editor "
                                         f"window for tile {tile} cannot open.")
        assert "Accept the proposal from the preview with 'a'" in notice.message
        assert any("No display here" in t for t in _toast_texts(app))


async def test_editor_runs_with_a_display_and_refreshes(project, monkeypatch):
    monkeypatch.setenv("DISPLAY", ":99")
    fake_proposals(project)
    editor = FakeEditor()
    app = QueueApp(project, annotator="ana", editor_runner=editor)
    async with app.run_test(size=SIZE) as pilot:
        await idle(pilot)
        await pilot.press("down")
        await idle(pilot)
        tile = app.screen.selected_tile()
        loads = app.screen.loads
        await pilot.press("e")
        await idle(pilot)
        assert editor.commands == [[sys.executable, "-m", "labeler.cli", "edit",
                                    str(project.root), str(tile), "--annotator", "ana"]]
        assert app.editing is None
        assert app.screen.loads == loads + 1  # the queue was read again after the editor
        assert app.screen.selected_tile() == tile
        # a failing editor: its own last error line becomes the notification
        editor.returncode, editor.stderr = 1, f"labeler: error: tile {tile} is held by bo\n"
        await pilot.press("e")
        await idle(pilot)
        assert app.notices[-1].severity == "error"
        assert app.notices[-1].message == f"editor on tile {tile} failed: tile {tile} is held by bo"
        assert app.editing is None


async def test_worker_error_becomes_a_notification(project):
    # no proposals yet: the picker refuses, and the queue shows its message
    app = QueueApp(project, annotator="ana")
    async with app.run_test(size=SIZE, notifications=True) as pilot:
        await idle(pilot)
        await pilot.press("f5")  # compute again: re-pick
        await idle(pilot)
        with pytest.raises(LabelerError) as info:
            workflow.pick_tiles(project)
        notice = app.notices[-1]
        assert notice.severity == "error" and notice.message == str(info.value)
        assert "run 'labeler propose' first" in notice.message
        assert any("labeler propose" in t for t in _toast_texts(app))
        assert app.screen.long_work is None
        assert not app.screen.query_one(WorkBar).has_class("busy")
        assert app.is_running


async def test_accept_without_proposal_is_a_notification(project):
    app = QueueApp(project, annotator="ana")
    async with app.run_test(size=SIZE) as pilot:
        await idle(pilot)
        tile = app.screen.selected_tile()
        await pilot.press("a")
        await idle(pilot)
        assert app.notices[-1].message == (
            f"tile {tile} has no proposal yet; run 'labeler propose' first"
        )
        assert project.store.latest_annotation(tile) is None


async def test_retrain_shows_progress_and_iou(project, monkeypatch):
    fake_proposals(project)
    steps = []
    monkeypatch.setattr(WorkBar, "step", lambda self, d, t, label="": steps.append((d, t, label)))

    def fake_retrain(project_, *, progress):
        progress(0, 2, "training the head")
        progress(2, 2, "proposing")
        mv = project_.store.add_model_version(
            kind="head", name="head-7", n_train_tiles=5,
            val_iou={"soil": 0.9, "crop": 0.8123, "weed": 0.4333, "symptom": None}, miou=0.7152,
        )
        return SimpleNamespace(model_version=mv)

    def fake_renew(project_, *, progress):  # renewal: tests/tui/test_queue_screen.py
        return SimpleNamespace(
            proposals=SimpleNamespace(proposed=0, left_alone=0), picked=None, note=""
        )

    monkeypatch.setattr(workflow, "retrain", fake_retrain, raising=False)
    monkeypatch.setattr(workflow, "renew_proposals", fake_renew, raising=False)
    app = QueueApp(project, annotator="ana")
    async with app.run_test(size=SIZE) as pilot:
        await idle(pilot)
        await pilot.press("t")
        await idle(pilot)
        assert steps == [(0, 2, "training the head"), (2, 2, "proposing")]
        notice = [n for n in app.notices if n.title == "retrained"][-1]
        assert notice.title == "retrained"
        assert "model head-7 trained on 5 tiles" in notice.message
        assert "soil 0.900 · crop 0.812 · weed 0.433 · symptom -" in notice.message
        assert notice.message.endswith("mIoU 0.715")
        assert app.screen.long_work is None


async def test_retrain_error_and_busy_guard(project, monkeypatch):
    def failing(project_, *, progress):
        raise LabelerError("labels: retraining needs at least 3 labelled tiles, got 0")

    monkeypatch.setattr(workflow, "retrain", failing, raising=False)
    app = QueueApp(project, annotator="ana")
    async with app.run_test(size=SIZE) as pilot:
        await idle(pilot)
        app.screen.long_work = "re-picking the queue"  # as if the picker were still running
        await pilot.press("t")
        assert app.notices[-1].message == (
            "re-picking the queue is still running; wait for it to finish"
        )
        app.screen.long_work = None
        await pilot.press("t")
        await idle(pilot)
        assert app.notices[-1].severity == "error"
        assert app.notices[-1].message == (
            "labels: retraining needs at least 3 labelled tiles, got 0"
        )


async def test_real_retrain_without_labels_says_why(project):
    # the real workflow: no saved masks yet, so retraining refuses with its clear message
    app = QueueApp(project, annotator="ana")
    async with app.run_test(size=SIZE) as pilot:
        await idle(pilot)
        await pilot.press("t")
        await pilot.app.workers.wait_for_complete()
        await idle(pilot)
        assert "retrain needs at least 3 labelled tiles" in app.notices[-1].message
        assert app.notices[-1].severity == "error"
        assert app.screen.long_work is None


async def test_empty_project_screens(project):
    # no proposals, no pairs, no models: every screen says what is missing
    app = QueueApp(project, annotator="rhea")
    async with app.run_test(size=SIZE) as pilot:
        await idle(pilot)
        await pilot.press("g")
        await idle(pilot)
        screen = app.screen
        assert screen.query_one("#pair-table", DataTable).row_count == 0
        assert "no annotator pair yet" in str(screen.query_one("#agreement-note").render())
        await pilot.press("e")  # on the agreement screen: open to settle
        assert app.notices[-1].message == "no contested tile to settle"
        await pilot.press("escape", "m")
        await idle(pilot)
        caption = str(app.screen.query_one("#miou-caption").render())
        assert caption == "no model version yet: propose or retrain first"
        assert app.screen.query_one("#miou-trend", Sparkline).data == []
        await pilot.press("escape")
        await idle(pilot)
        assert app.screen.loads == 3  # read at start and again on each of the two returns


async def test_a_second_accept_waits_for_the_first(project, monkeypatch):
    fake_proposals(project)
    release = threading.Event()
    calls = []

    def slow_accept(project_, tile_id, annotator):
        calls.append(tile_id)
        assert release.wait(10)
        return SimpleNamespace(version=1, state="accepted")

    monkeypatch.setattr(workflow, "accept_tile", slow_accept)
    app = QueueApp(project, annotator="ana")
    async with app.run_test(size=SIZE) as pilot:
        await idle(pilot)
        tile = app.screen.selected_tile()
        await pilot.press("a", "a")
        await pilot.pause()
        assert app.notices[-1].message == f"tile {tile} is still being saved; wait a moment"
        release.set()
        await idle(pilot)
        assert calls == [tile]
        assert any(n.message.startswith(f"tile {tile}: proposal kept as ana's mask")
                   for n in app.notices)


def test_unexpected_error_message(project):
    app = QueueApp(project, annotator="ana")
    app.notify = lambda *a, **k: None  # not running: only the wording is checked here
    app.report_error(ZeroDivisionError("division by zero"), doing="re-picking")
    assert app.notices[-1].message == (
        "re-picking failed unexpectedly: ZeroDivisionError: division by zero"
    )


def test_run_queue_errors(tmp_path, project):
    with pytest.raises(LabelerError, match="--annotator: expected a name"):
        run_queue(project.root, annotator="  ")
    with pytest.raises(LabelerError, match="no such project folder"):
        run_queue(tmp_path / "nowhere", annotator="ana")
    with pytest.raises(LabelerError, match="--annotator: expected a name"):
        QueueApp(project, annotator="")
