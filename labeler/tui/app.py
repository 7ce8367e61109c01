"""The terminal queue app (``labeler queue DIR --annotator NAME``).

The app holds the open project and the annotator's name and owns what every screen
shares: notifications, error reporting and starting the editor process. The screens
call :mod:`labeler.workflow` and the store in worker threads, so the interface never
waits on the database or the model.
"""

from __future__ import annotations

import os
import subprocess
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

from textual import work
from textual.app import App
from textual.screen import Screen

from labeler.errors import LabelerError
from labeler.project import Project, open_project
from labeler.tui.agreement_screen import AgreementScreen
from labeler.tui.help_screen import HelpScreen
from labeler.tui.keys import APP_KEYS, bindings
from labeler.tui.launch import (
    display_available,
    editor_command,
    failure_message,
    no_display_message,
    run_editor,
)
from labeler.tui.model_screen import ModelScreen
from labeler.tui.queue_screen import QueueScreen

__all__ = ["Notice", "QueueApp", "run_queue"]

EditorRunner = Callable[[Sequence[str]], subprocess.CompletedProcess]


@dataclass(frozen=True)
class Notice:
    """A notification the app showed (kept for the session; tests read them)."""

    severity: str
    message: str
    title: str = ""


class QueueApp(App[int]):
    """The terminal queue.

    Parameters
    ----------
    project : Project
        An open project (the caller closes it).
    annotator : str
        Who is working: saves, holds and the "next tile" are this person's.
    editor_runner : callable(command) -> CompletedProcess, optional
        Runs the editor command and waits (default: :func:`labeler.tui.launch.run_editor`).
    environ : mapping, optional
        Environment for the display check (default: ``os.environ`` at the time of use).
    """

    CSS_PATH = "labeler.tcss"
    TITLE = "labeler queue"
    BINDINGS = bindings(APP_KEYS)
    ENABLE_COMMAND_PALETTE = False

    def __init__(
        self,
        project: Project,
        *,
        annotator: str,
        editor_runner: EditorRunner | None = None,
        environ: Mapping[str, str] | None = None,
    ) -> None:
        super().__init__()
        name = (annotator or "").strip()
        if not name:
            raise LabelerError("--annotator: expected a name (who is working), got nothing")
        self.project = project
        self.annotator = name
        self.editor_runner: EditorRunner = editor_runner or run_editor
        self.environ = environ
        self.notices: list[Notice] = []
        self.editing: int | None = None

    def get_default_screen(self) -> Screen:
        return QueueScreen()

    def on_mount(self) -> None:
        self.sub_title = f"{self.project.root.name} · {self.annotator}"

    # -- messages -------------------------------------------------------------------------
    def tell(
        self,
        message: str,
        *,
        severity: str = "information",
        title: str = "",
        timeout: float | None = None,
    ) -> None:
        """Show a notification (plain text, never markup) and keep it in :attr:`notices`.

        Parameters
        ----------
        message : str
            The text, shown as is.
        severity : {"information", "warning", "error"}
            Textual's notification severity.
        title : str
            An optional title line.
        timeout : float, optional
            Seconds on screen (Textual's default when None).
        """
        self.notices.append(Notice(severity, message, title))
        self.notify(message, title=title, severity=severity, timeout=timeout, markup=False)

    def report_error(self, exc: BaseException, *, doing: str = "") -> None:
        """Show an error as one notification.

        Parameters
        ----------
        exc : BaseException
            The error: a :class:`LabelerError` shows its message; any other error shows
            its kind and message (the details go to the log).
        doing : str
            What failed (``"re-picking"``, ...), named for an unexpected error.
        """
        if isinstance(exc, LabelerError):
            message = str(exc)
        else:
            self.log.error(f"{doing}: {exc!r}")
            message = f"{doing or 'the last step'} failed unexpectedly: {type(exc).__name__}: {exc}"
        self.tell(message, severity="error", timeout=20)

    # -- screens --------------------------------------------------------------------------
    def action_agreement(self) -> None:
        if not isinstance(self.screen, AgreementScreen):
            self.push_screen(AgreementScreen())

    def action_models(self) -> None:
        if not isinstance(self.screen, ModelScreen):
            self.push_screen(ModelScreen())

    def action_help(self) -> None:
        if not isinstance(self.screen, HelpScreen):
            self.push_screen(HelpScreen())

    # -- the editor -----------------------------------------------------------------------
    def has_display(self) -> bool:
        """Whether an editor window can open here.

        Returns
        -------
        bool
            True on Windows and macOS, elsewhere when ``DISPLAY`` names an X display
            (:func:`labeler.tui.launch.display_available`).
        """
        return display_available(os.environ if self.environ is None else self.environ)

    def open_editor(
        self, tile_id: int, *, settle: bool = False, on_done: Callable[[], None] | None = None
    ) -> bool:
        """Open ``tile_id`` in the editor process and wait for it in a worker.

        Without a display the app says so and starts nothing. One editor at a time.

        Parameters
        ----------
        tile_id : int
            The tile to edit.
        settle : bool
            Open a contested tile for a reviewer to settle.
        on_done : callable, optional
            Called without arguments on the interface thread when the editor has closed.

        Returns
        -------
        bool
            True if the editor was started.
        """
        if not self.has_display():
            self.tell(no_display_message(tile_id, settle=settle), severity="warning", timeout=20)
            return False
        if self.editing is not None:
            self.tell(
                f"the editor is already open on tile {self.editing}; close it first",
                severity="warning",
            )
            return False
        command = editor_command(
            self.project.root, tile_id, annotator=self.annotator, settle=settle
        )
        self.editing = tile_id
        self.tell(
            f"{'settling' if settle else 'editing'} tile {tile_id} in the editor window; "
            "the queue refreshes when it closes"
        )
        self._run_editor(command, tile_id, on_done)
        return True

    @work(thread=True, group="editor", exit_on_error=False)
    def _run_editor(
        self, command: list[str], tile_id: int, on_done: Callable[[], None] | None
    ) -> None:
        try:
            done = self.editor_runner(command)
        except OSError as exc:
            self.call_from_thread(self._editor_closed, tile_id, f"editor on tile {tile_id} "
                                  f"could not start: {exc}", on_done)
            return
        message = None
        if done.returncode != 0:
            message = failure_message(tile_id, done.returncode, done.stderr)
        self.call_from_thread(self._editor_closed, tile_id, message, on_done)

    def _editor_closed(
        self, tile_id: int, message: str | None, on_done: Callable[[], None] | None
    ) -> None:
        self.editing = None
        if message:
            self.tell(message, severity="error", timeout=20)
        if on_done is not None:
            on_done()


def run_queue(project_dir: str | os.PathLike[str], *, annotator: str) -> int:
    """Open the project in ``project_dir`` and run the terminal queue until the user quits.

    Parameters
    ----------
    project_dir : path-like
        The project folder.
    annotator : str
        Who is working (shown in the header, recorded with every save).

    Returns
    -------
    int
        The exit code, 0.

    Raises
    ------
    LabelerError
        If the folder holds no project or ``annotator`` is empty (the CLI prints it).
    """
    if not (annotator or "").strip():
        raise LabelerError("--annotator: expected a name (who is working), got nothing")
    project = open_project(Path(project_dir))
    try:
        QueueApp(project, annotator=annotator).run()
    finally:
        project.close()
    return 0
