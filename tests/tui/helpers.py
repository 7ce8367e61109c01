"""Pilot helpers: waiting for the app's worker threads, reading SVG screenshots."""

from pathlib import Path

from labeler.tui.snapshot import wait_idle

#: Terminal size of every Pilot test (columns, rows).
SIZE = (160, 48)


async def idle(pilot, *, timeout: float = 20.0) -> None:
    """Wait until every worker has finished and the screen has updated."""
    await wait_idle(pilot, timeout=timeout)


def svg_text(path) -> str:
    """The text of an SVG screenshot with the non-breaking spaces Rich writes made plain."""
    return Path(path).read_text(encoding="utf-8").replace("&#160;", " ")
