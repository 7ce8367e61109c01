"""Screenshots of the terminal queue without a terminal (for the README and for checks).

``python -m labeler.tui.snapshot PROJECT OUT.svg --annotator NAME [--tile ID] [--screen
queue|agreement|models] [--png OUT.png]`` runs the app headless, waits until every
worker has finished, and saves the screen as SVG (and, with ``--png``, converts it with
cairosvg when that package is installed). Nothing in the project is changed.
"""

from __future__ import annotations

import argparse
import asyncio
import os
import sys
from collections.abc import Sequence
from pathlib import Path

from textual.worker import WorkerCancelled, WorkerState

from labeler.errors import LabelerError
from labeler.fileio import atomic_write_bytes, atomic_write_text
from labeler.project import open_project
from labeler.tui.app import QueueApp

__all__ = ["wait_idle", "save_screenshot", "main"]

_SCREEN_KEYS = {"queue": None, "agreement": "g", "models": "m"}


async def wait_idle(pilot, *, timeout: float = 60.0) -> None:
    """Wait until no worker of the app is pending or running and the screen has updated.

    Workers start other workers (a save reloads the queue, which loads the preview), so
    this waits in rounds until a round finds nothing left to do. A worker cancelled while
    waited for (an exclusive worker replaced by a newer one of its group) counts as
    finished.

    Parameters
    ----------
    pilot : textual.pilot.Pilot
        The pilot driving the headless app.
    timeout : float
        Seconds to wait at most.

    Raises
    ------
    TimeoutError
        If workers are still busy after ``timeout`` seconds.
    """
    app = pilot.app
    loop = asyncio.get_running_loop()
    end = loop.time() + timeout

    def busy() -> list:
        return [w for w in app.workers if w.state in (WorkerState.PENDING, WorkerState.RUNNING)]

    while True:
        await pilot.pause()
        if not busy():
            await pilot.pause()
            if not busy():
                return
        left = end - loop.time()
        if left <= 0:
            raise TimeoutError(f"workers still busy after {timeout} s: {busy()}")
        try:
            await asyncio.wait_for(app.workers.wait_for_complete(busy()), timeout=left)
        except WorkerCancelled:
            # an exclusive worker gave way to a newer one of its group while we waited:
            # it is finished, the next round waits for the newer one
            continue
        except TimeoutError:
            raise TimeoutError(f"workers still busy after {timeout} s: {busy()}") from None


def save_screenshot(
    project_dir: str | os.PathLike[str],
    svg_path: str | os.PathLike[str],
    *,
    annotator: str,
    tile: int | None = None,
    screen: str = "queue",
    size: tuple[int, int] = (160, 48),
) -> Path:
    """Run the app headless on a project and save one screen as SVG.

    Parameters
    ----------
    project_dir : path
        The project folder; it is opened and closed here.
    svg_path : path
        File to write, atomically.
    annotator : str
        Name shown in the header.
    tile : int, optional
        Tile to select in the queue before the screenshot.
    screen : {"queue", "agreement", "models"}
        Which screen to show.
    size : (int, int)
        Terminal columns and rows.

    Returns
    -------
    Path
        ``svg_path``.
    """
    if screen not in _SCREEN_KEYS:
        raise ValueError(f"screen: expected one of {', '.join(_SCREEN_KEYS)}, got {screen!r}")
    out = Path(svg_path)
    project = open_project(project_dir)
    try:
        app = QueueApp(project, annotator=annotator)

        async def drive(pilot) -> None:
            await wait_idle(pilot)
            if tile is not None:
                app.screen.select_tile(tile)
                await wait_idle(pilot)
            key = _SCREEN_KEYS[screen]
            if key is not None:
                await pilot.press(key)
                await wait_idle(pilot)
            atomic_write_text(out, app.export_screenshot())
            app.exit(0)

        app.run(headless=True, size=size, auto_pilot=drive)
    finally:
        project.close()
    return out


def main(argv: Sequence[str] | None = None) -> int:
    """Command line of the snapshot tool.

    Parameters
    ----------
    argv : sequence of str, optional
        Arguments (default ``sys.argv[1:]``).

    Returns
    -------
    int
        0 on success, 1 when the project cannot be opened or cairosvg is missing for
        ``--png``.
    """
    parser = argparse.ArgumentParser(
        prog="python -m labeler.tui.snapshot",
        description="Save a screen of the terminal queue as SVG (optionally PNG).",
    )
    parser.add_argument("project", type=Path)
    parser.add_argument("svg", type=Path)
    parser.add_argument("--annotator", required=True)
    parser.add_argument("--tile", type=int, default=None)
    parser.add_argument("--screen", choices=sorted(_SCREEN_KEYS), default="queue")
    parser.add_argument("--png", type=Path, default=None, help="also write a PNG (cairosvg)")
    parser.add_argument("--png-width", type=int, default=1600)
    args = parser.parse_args(argv)
    try:
        svg = save_screenshot(
            args.project, args.svg, annotator=args.annotator, tile=args.tile, screen=args.screen
        )
    except LabelerError as exc:
        print(f"snapshot: error: {exc}", file=sys.stderr)
        return 1
    if args.png is not None:
        try:
            import cairosvg
        except ImportError:
            print("snapshot: error: --png needs the cairosvg package", file=sys.stderr)
            return 1
        png = cairosvg.svg2png(url=str(svg), output_width=args.png_width)
        atomic_write_bytes(args.png, png)
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
