"""Starting the mask editor from the queue: its command line and the display check.

The editor is a separate process (``labeler edit DIR TILE --annotator NAME``, with
``--settle`` for a reviewer deciding a contested tile). Its window needs a graphical
display; on Linux and other X11 systems that means a ``DISPLAY`` variable.
"""

from __future__ import annotations

import os
import subprocess
import sys
from collections.abc import Mapping, Sequence

__all__ = [
    "display_available",
    "editor_command",
    "no_display_message",
    "run_editor",
    "failure_message",
]


def display_available(
    environ: Mapping[str, str] | None = None, *, platform: str | None = None
) -> bool:
    """True if an editor window can open.

    Windows and macOS always have a desktop; elsewhere the ``DISPLAY`` environment
    variable must name an X display (an empty value counts as none).

    Parameters
    ----------
    environ : mapping, optional
        Environment to look in (default ``os.environ``).
    platform : str, optional
        ``sys.platform`` value to judge (default this machine's).

    Returns
    -------
    bool
    """
    env = os.environ if environ is None else environ
    plat = sys.platform if platform is None else platform
    if plat.startswith(("win", "darwin")):
        return True
    return bool(env.get("DISPLAY", "").strip())


def editor_command(
    project_dir: str | os.PathLike[str],
    tile_id: int,
    *,
    annotator: str,
    settle: bool = False,
    python: str | None = None,
) -> list[str]:
    """The command line that opens ``tile_id`` in the editor as ``annotator``.

    ``python`` defaults to the interpreter running the queue, so the editor uses the
    same installation.

    Parameters
    ----------
    project_dir : path-like
        The project folder.
    tile_id : int
        The tile to open.
    annotator : str
        Who edits; not empty.
    settle : bool
        Open it for a reviewer to settle a contested tile.
    python : str, optional
        The Python interpreter to run.

    Returns
    -------
    list of str
        ``[python, "-m", "labeler.cli", "edit", project_dir, tile_id, "--annotator",
        annotator]``, plus ``"--settle"``.

    Raises
    ------
    ValueError
        If ``annotator`` is empty.
    """
    if not annotator:
        raise ValueError("annotator: expected a name, got an empty string")
    cmd = [
        python or sys.executable,
        "-m",
        "labeler.cli",
        "edit",
        os.fspath(project_dir),
        str(int(tile_id)),
        "--annotator",
        annotator,
    ]
    if settle:
        cmd.append("--settle")
    return cmd


def no_display_message(tile_id: int, *, settle: bool = False) -> str:
    """What the queue says instead of opening the editor without a display.

    Parameters
    ----------
    tile_id : int
        The tile the annotator wanted to open.
    settle : bool
        Whether a reviewer wanted to settle it (which needs the editor).

    Returns
    -------
    str
        The message, with what to do instead.
    """
    first = (
        f"No display here (DISPLAY is not set), so the editor window for tile {tile_id} "
        "cannot open."
    )
    if settle:
        return (
            first + " Settling needs the editor: run the queue on a machine with a display "
            "(or over ssh -X)."
        )
    return (
        first + " Accept the proposal from the preview with 'a', or run the queue on a "
        "machine with a display (or over ssh -X)."
    )


def run_editor(command: Sequence[str]) -> subprocess.CompletedProcess[str]:
    """Run the editor and wait for it (its output is captured for error messages).

    Parameters
    ----------
    command : sequence of str
        The command line (:func:`editor_command`).

    Returns
    -------
    subprocess.CompletedProcess
        With the exit code and the captured stdout and stderr text.
    """
    return subprocess.run(
        list(command),
        stdin=subprocess.DEVNULL,
        capture_output=True,
        text=True,
        check=False,
    )


def failure_message(tile_id: int, returncode: int, stderr: str | None) -> str:
    """One line explaining a failed editor run: the editor's own last error line.

    Parameters
    ----------
    tile_id : int
        The tile the editor was opened on.
    returncode : int
        The editor's exit code.
    stderr : str or None
        What it wrote to stderr.

    Returns
    -------
    str
        ``"editor on tile <id> failed: <reason>"``.
    """
    lines = [line.strip() for line in (stderr or "").splitlines() if line.strip()]
    detail = lines[-1] if lines else f"it stopped with exit code {returncode}"
    prefix = "labeler: error: "
    if detail.startswith(prefix):
        detail = detail[len(prefix):]
    return f"editor on tile {tile_id} failed: {detail}"
