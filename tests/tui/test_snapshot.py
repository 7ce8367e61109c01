"""The headless screenshot tool behind docs/queue.png, and its wait for the app's workers."""

import asyncio

import pytest
from textual.worker import WorkerCancelled, WorkerState

from labeler.tui.rows import QUEUE_COLUMNS
from labeler.tui.snapshot import main, save_screenshot, wait_idle
from tests.tui.helpers import svg_text
from tests.workflow.conftest import fake_proposals


def test_save_screenshot_selects_the_tile(project, artefacts):
    fake_proposals(project)
    root = project.root
    project.close()  # the tool opens the project itself
    path = save_screenshot(root, artefacts / "snapshot-queue.svg", annotator="ines", tile=4)
    svg = svg_text(path)
    assert "tile 4 · east-block" in svg
    assert all(h in svg for h in QUEUE_COLUMNS)


def test_snapshot_command_errors(tmp_path, capsys):
    assert main([str(tmp_path / "nowhere"), str(tmp_path / "x.svg"), "--annotator", "ines"]) == 1
    assert "snapshot: error:" in capsys.readouterr().err
    assert not (tmp_path / "x.svg").exists()


class _Worker:
    def __init__(self, state):
        self.state = state


class _Workers(list):
    """Stands in for the app's worker manager: records how wait_idle waits on it."""

    def __init__(self, worker, *, wait):
        super().__init__([worker])
        self.wait = wait
        self.waited_for = []

    async def wait_for_complete(self, workers=None):
        self.waited_for.append(list(workers))
        await self.wait(self[0])


class _Pilot:
    def __init__(self, workers):
        self.app = type("App", (), {"workers": workers})()

    async def pause(self):
        return None


async def test_wait_idle_counts_a_worker_cancelled_while_waited_for_as_finished():
    async def cancelled(worker):
        # an exclusive worker gives way to a newer one of its group (which has finished)
        worker.state = WorkerState.CANCELLED
        raise WorkerCancelled("Worker was cancelled, and did not complete.")

    worker = _Worker(WorkerState.RUNNING)
    workers = _Workers(worker, wait=cancelled)
    await wait_idle(_Pilot(workers), timeout=5.0)
    assert workers.waited_for == [[worker]]  # one round, on the busy worker only


async def test_wait_idle_times_out_on_a_worker_that_never_ends():
    async def forever(worker):
        await asyncio.Event().wait()

    workers = _Workers(_Worker(WorkerState.RUNNING), wait=forever)
    with pytest.raises(TimeoutError, match=r"workers still busy after 0.05 s"):
        await wait_idle(_Pilot(workers), timeout=0.05)
