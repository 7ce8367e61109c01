"""Waiting for the app's worker threads in Pilot tests."""

import asyncio

from textual.worker import WorkerState

SIZE = (160, 48)


async def idle(pilot, *, timeout: float = 20.0) -> None:
    """Wait until no worker of the app is pending or running, and the screen has updated.

    Workers start other workers (a save reloads the queue, which loads the preview), so
    this waits in rounds until a round finds nothing left to do.
    """
    app = pilot.app
    loop = asyncio.get_running_loop()
    end = loop.time() + timeout
    while True:
        await pilot.pause()
        busy = [w for w in app.workers if w.state in (WorkerState.PENDING, WorkerState.RUNNING)]
        if not busy:
            await pilot.pause()
            busy = [
                w for w in app.workers if w.state in (WorkerState.PENDING, WorkerState.RUNNING)
            ]
            if not busy:
                return
        if loop.time() > end:
            raise AssertionError(f"workers still busy after {timeout} s: {busy}")
        await app.workers.wait_for_complete()


def svg_text(path) -> str:
    """The text of an SVG screenshot with the non-breaking spaces Rich writes made plain."""
    from pathlib import Path

    return Path(path).read_text(encoding="utf-8").replace("&#160;", " ")
