"""The editor process the window tests start: ``python -m tests.editor.child SPEC`` runs
the editor on a tile saved by :func:`tests.editor.xdrive.write_tile`, saving into that
folder (:class:`FolderBackend`); ``python -m tests.editor.child --cli ARGS...`` runs the
``labeler`` command line. Either way every editor window is a :class:`TracingWindow`
writing the trace that :class:`tests.editor.xdrive.Child` waits on (the trace file is
named by the ``XDRIVE_TRACE`` environment variable).
"""

from __future__ import annotations

import json
import os
import sys
import tempfile
from pathlib import Path

import numpy as np

from labeler.editor.window import HighGuiWindow

__all__ = ["FolderBackend", "TracingWindow"]


def _atomic_savez(path: Path, **arrays) -> None:
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".npz", dir=path.parent)
    os.close(fd)
    try:
        np.savez(tmp, **arrays)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


class FolderBackend:
    """An :class:`~labeler.editor.backend.EditorBackend` that writes into a folder.

    ``saves/NNN.npz`` per saved label, ``draft.npz`` for the draft; when ``conflict.npy``
    exists every save raises ``ConflictError`` carrying it as ``theirs``. Like any
    backend it decides the annotation state of a save; this one always answers
    ``state`` (the editor must show that answer, whatever the edit).
    """

    def __init__(self, folder: str | os.PathLike[str], *, state: str = "amended") -> None:
        self.folder = Path(folder)
        self.state = state
        (self.folder / "saves").mkdir(parents=True, exist_ok=True)

    def save(self, mask, *, kind, actions, seconds) -> str:
        from labeler.errors import ConflictError

        conflict = self.folder / "conflict.npy"
        if conflict.exists():
            raise ConflictError("someone saved this tile first", tile_id=1, parent_version=1,
                                current_version=2, theirs=np.load(conflict))
        n = len(list((self.folder / "saves").glob("*.npz"))) + 1
        _atomic_savez(self.folder / "saves" / f"{n:03d}.npz", mask=mask, kind=kind,
                      actions=actions, seconds=seconds)
        return self.state

    def save_draft(self, mask, weak_label, *, actions, seconds) -> None:
        _atomic_savez(self.folder / "draft.npz", mask=mask, weak_label=weak_label,
                      actions=actions, seconds=seconds)

    def load_draft(self):
        from labeler.editor.backend import Draft

        path = self.folder / "draft.npz"
        if not path.exists():
            return None
        with np.load(path) as z:
            return Draft(z["mask"], z["weak_label"], int(z["actions"]), float(z["seconds"]))

    def discard_draft(self) -> None:
        (self.folder / "draft.npz").unlink(missing_ok=True)

    def relearn(self, marks):
        return None  # no model behind this backend

    def heartbeat(self) -> bool:
        return True  # a folder has no holds to renew


class TracingWindow(HighGuiWindow):
    """The HighGUI window, writing a line per handled event to a trace file (child side).

    See the module notes for the lines. A key is written when the next frame is shown
    (the editor handled it and is still open) or when the window closes.
    """

    def __init__(self, title: str, trace: str | os.PathLike[str]) -> None:
        super().__init__(title)
        self._trace = open(trace, "a", buffering=1)  # noqa: SIM115 - closed in close()
        self._key: int | None = None

    def _line(self, text: str) -> None:
        self._trace.write(text + "\n")
        self._trace.flush()

    def open(self, frame_shape, on_mouse) -> None:
        inner = getattr(on_mouse, "traced", on_mouse)  # reopened after a wheel event

        def traced(event, x, y, flags):
            inner(event, x, y, flags)
            self._line(f"mouse {event} {x} {y}")

        traced.traced = inner
        super().open(frame_shape, traced)
        self._line("open")

    def after_wheel(self) -> None:
        super().after_wheel()
        self._line("after-wheel")

    def show(self, frame) -> None:
        if self._key is not None:
            self._line(f"key {self._key}")
            self._key = None
        super().show(frame)

    def wait(self, ms: int) -> int:
        code = super().wait(ms)
        if code != -1:
            self._key = code
        return code

    def close(self) -> None:
        super().close()
        if not self._trace.closed:
            self._line("closed" if self._key is None else f"closed {self._key}")
            self._trace.close()


def _traced_windows() -> None:
    """Make every editor window of this process a :class:`TracingWindow`."""
    import labeler.editor.window as window

    trace = os.environ["XDRIVE_TRACE"]
    window.HighGuiWindow = lambda title: TracingWindow(title, trace)


def _child(spec_path: str) -> int:
    from dataclasses import asdict

    from labeler.editor.state import EditorState
    from labeler.editor.window import run_editor

    spec_file = Path(spec_path)
    spec = json.loads(spec_file.read_text())
    folder = spec_file.parent
    with np.load(folder / "tile.npz") as z:
        image, proposal = z["image"], z["proposal"]
    state = EditorState(image, proposal, radius=spec["radius"],
                        view_shape=tuple(spec["view_shape"]))
    backend = FolderBackend(folder, state=spec["reply_state"])
    outcome = run_editor(state, backend=backend, title=spec["title"],
                         autosave_seconds=spec["autosave_seconds"])
    (folder / "outcome.json").write_text(json.dumps(asdict(outcome)))
    return 0


def _cli(args: list[str]) -> int:
    from labeler.cli import main

    return main(args)


if __name__ == "__main__":
    _traced_windows()
    if sys.argv[1] == "--cli":
        sys.exit(_cli(sys.argv[2:]))
    sys.exit(_child(sys.argv[1]))
