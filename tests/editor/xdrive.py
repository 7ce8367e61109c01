"""Driving the editor window under Xvfb: the X server, xdotool, screenshots, a child editor.

Reusable by any window test: start a server (:func:`start_xvfb`), launch an editor process
(:func:`launch_child` runs ``python -m tests.editor.child SPEC``, an editor saving into a
folder; :func:`launch_cli` runs the ``labeler`` command line), wait for its
window (:func:`wait_window`), drive it (:func:`drag`, :func:`press_keys`, :func:`wheel`),
take a screenshot (:func:`screenshot`), and read what it saved (:func:`read_saves`,
:func:`read_draft`).

The editor runs in a child process, not a thread: the Qt build of HighGUI wants the
main thread, and a crash of the window must not take the test run with it.

Lining the test up with the editor
    The child's window is a :class:`tests.editor.child.TracingWindow`: it appends one line to ``trace.log``
    for every event the editor has handled (``mouse EVENT X Y`` after a mouse callback,
    ``key CODE`` once a key was handled and the editor is still open, ``closed [CODE]``
    when it closed, ``open`` when the window opened, ``after-wheel`` after a wheel event).
    Every driving step sends one X event with xdotool, then waits for its line
    (:meth:`Child.expect`, polling with a deadline), so the next event never arrives
    before the editor has handled the last one. No step sleeps a fixed time.
"""

from __future__ import annotations

import json
import os
import select
import shutil
import signal
import struct
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import cv2
import numpy as np
import pytest

from tests.common import REPO

__all__ = [
    "TOOLS_NEEDED",
    "XServer",
    "Child",
    "missing_tools",
    "start_xvfb",
    "stop_xvfb",
    "wait_for",
    "xdo",
    "wait_window",
    "drag",
    "press_keys",
    "expect_key_handled",
    "move",
    "wheel",
    "screenshot",
    "read_xwd",
    "write_tile",
    "launch_child",
    "launch_cli",
    "stop_child",
    "reap_children",
    "read_saves",
    "read_draft",
    "read_outcome",
    "ARTEFACTS",
]

#: Programs the window tests need; `make test` installs them (apt: xvfb xdotool x11-apps).
TOOLS_NEEDED = ("Xvfb", "xdotool", "xwd")
#: Screenshots are kept here (git-ignored).
ARTEFACTS = REPO / "test-artefacts" / "editor"


@dataclass
class XServer:
    """A running Xvfb server."""

    display: str
    process: subprocess.Popen

    def env(self) -> dict[str, str]:
        """The environment with DISPLAY set to this server."""
        env = dict(os.environ)
        env["DISPLAY"] = self.display
        return env


def missing_tools() -> list[str]:
    """Names of :data:`TOOLS_NEEDED` not found on PATH."""
    return [t for t in TOOLS_NEEDED if shutil.which(t) is None]


def wait_for(predicate: Callable[[], object], *, timeout: float, what: str,
             interval: float = 0.05):
    """Poll ``predicate`` until it returns a true value; fail the test naming ``what``."""
    end = time.monotonic() + timeout
    while True:
        value = predicate()
        if value:
            return value
        if time.monotonic() > end:
            pytest.fail(f"timed out after {timeout:.0f} s waiting for {what}")
        time.sleep(interval)


def start_xvfb(*, screen: str = "1280x1024x24", timeout: float = 10.0) -> XServer:
    """Start ``Xvfb`` on a free display number (Xvfb picks it: ``-displayfd``)."""
    missing = missing_tools()
    if missing:
        pytest.fail(
            f"{', '.join(missing)} not found: the editor window tests need Xvfb, xdotool and "
            "xwd; `make test` installs them (apt packages xvfb xdotool x11-apps)"
        )
    read_fd, write_fd = os.pipe()
    proc = subprocess.Popen(
        ["Xvfb", "-displayfd", str(write_fd), "-screen", "0", screen, "-nolisten", "tcp",
         "-noreset"],  # no server reset when the last client leaves (between editors)
        pass_fds=(write_fd,), stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
    )
    os.close(write_fd)
    number = b""
    end = time.monotonic() + timeout
    try:
        while not number.endswith(b"\n"):
            remaining = end - time.monotonic()
            if remaining <= 0:
                proc.kill()
                pytest.fail(f"Xvfb did not report a display number within {timeout:.0f} s")
            ready, _, _ = select.select([read_fd], [], [], remaining)
            if not ready:
                continue
            chunk = os.read(read_fd, 16)
            if not chunk:  # end of the pipe: Xvfb ended before it wrote a whole number
                pytest.fail(f"Xvfb exited at start with code {proc.poll()}")
            number += chunk
    finally:
        os.close(read_fd)
    return XServer(f":{number.decode().strip()}", proc)


def stop_xvfb(server: XServer) -> None:
    """Stop the server started by :func:`start_xvfb`."""
    if server.process.poll() is None:
        server.process.terminate()
        try:
            server.process.wait(5)
        except subprocess.TimeoutExpired:
            server.process.kill()
            server.process.wait(5)


def xdo(server: XServer, *args: str | int, check: bool = True) -> str:
    """Run ``xdotool`` on the server; returns its stdout."""
    out = subprocess.run(
        ["xdotool", *(str(a) for a in args)], env=server.env(), capture_output=True,
        text=True, timeout=10,
    )
    if check and out.returncode != 0:
        pytest.fail(f"xdotool {' '.join(map(str, args))} failed: {out.stderr.strip()}")
    return out.stdout


def _geometry(server: XServer, window: str) -> tuple[int, int] | None:
    text = xdo(server, "getwindowgeometry", window, check=False)
    for line in text.splitlines():
        if "Geometry:" in line:
            w, h = line.split("Geometry:")[1].strip().split("x")
            return int(w), int(h)
    return None


def wait_window(child: Child, title: str, *, size: tuple[int, int] | None = None,
                timeout: float = 30.0) -> str:
    """Id of the child's window called ``title``, once mapped (and ``size`` = (width,
    height)); the pointer is moved into it and it gets the keyboard focus."""
    server = child.server

    def found():
        if child.process.poll() is not None:
            pytest.fail(f"the editor exited with code {child.process.returncode} before its "
                        f"window appeared; its log ends:\n{child.log_tail()}")
        ids = xdo(server, "search", "--name", title, check=False).split()
        if not ids:
            return None
        if size is not None and _geometry(server, ids[-1]) != tuple(size):
            return None
        return ids[-1]

    win = wait_for(found, timeout=timeout, what=f"a window named {title!r} of size {size}")
    xdo(server, "windowfocus", "--sync", win, check=False)
    # the pointer may already rest at (1, 1) (another window stood there): step off it
    # first, so the move below is a real motion the editor reports
    xdo(server, "mousemove", "--window", win, 0, 0)
    child.pointer = None
    move(child, win, 1, 1)
    return win


def move(child: Child, window: str, x: int, y: int) -> None:
    """Move the pointer to window point ``(x, y)`` and wait until the editor handled it."""
    if child.pointer == (window, x, y):
        return  # no motion, no event
    xdo(child.server, "mousemove", "--window", window, x, y)
    child.pointer = (window, x, y)
    child.expect(lambda line: line == f"mouse {cv2.EVENT_MOUSEMOVE} {x} {y}",
                 what=f"the pointer move to ({x}, {y})")


def drag(child: Child, window: str, points: Sequence[tuple[int, int]]) -> None:
    """Press the left button at the first ``(x, y)`` window point, move through the rest,
    release; each event is handled by the editor before the next is sent."""
    x0, y0 = points[0]
    move(child, window, x0, y0)
    xdo(child.server, "mousedown", 1)
    down = (f"mouse {cv2.EVENT_LBUTTONDOWN} ", f"mouse {cv2.EVENT_LBUTTONDBLCLK} ")
    child.expect(lambda line: line.startswith(down), what="the left button press")
    for x, y in points[1:]:
        move(child, window, x, y)
    xdo(child.server, "mouseup", 1)
    child.expect(lambda line: line.startswith(f"mouse {cv2.EVENT_LBUTTONUP} "),
                 what="the left button release")


def expect_key_handled(child: Child, key: str) -> None:
    """Wait until the editor handled a key and showed the next frame (it is still open);
    fails when it closed instead."""
    child.expect(lambda line: line.startswith("key "), what=f"the key {key} handled")


def press_keys(child: Child, *keys: str) -> None:
    """Press keys by X keysym name (``"2"``, ``"Return"``, ``"Escape"``, ``"y"``), each
    handled by the editor before the next."""
    for k in keys:
        xdo(child.server, "key", k)
        child.expect(lambda line: line.startswith(("key ", "closed")), what=f"the key {k}")


def wheel(child: Child, window: str, x: int, y: int, *, button: int = 4) -> None:
    """One wheel notch (X button 4 up, 5 down) at window point ``(x, y)``; returns once
    the editor zoomed and its window is ready again (the Qt build reopens it)."""
    move(child, window, x, y)
    xdo(child.server, "click", button)
    child.expect(lambda line: line.startswith(f"mouse {cv2.EVENT_MOUSEWHEEL} "),
                 what="the wheel event")
    child.expect(lambda line: line == "after-wheel", what="the window after the wheel event")
    child.pointer = None


def read_xwd(path: str | os.PathLike[str]) -> np.ndarray:
    """Read a TrueColor ZPixmap XWD dump (as ``xwd`` writes) into (H, W, 3) uint8 RGB."""
    data = Path(path).read_bytes()
    fields = struct.unpack(">25I", data[:100])
    header_size, _version, fmt, _depth, width, height = fields[:6]
    byte_order, bits_per_pixel, bytes_per_line = fields[7], fields[11], fields[12]
    masks = fields[14:17]
    ncolors = fields[19]
    if fmt != 2 or bits_per_pixel not in (24, 32):
        raise ValueError(f"{path}: expected a 24/32-bit ZPixmap XWD, got format {fmt} "
                         f"{bits_per_pixel} bpp")
    start = header_size + 12 * ncolors
    raw = np.frombuffer(data, np.uint8, count=height * bytes_per_line, offset=start)
    rows = raw.reshape(height, bytes_per_line)[:, : width * (bits_per_pixel // 8)]
    px = rows.reshape(height, width, bits_per_pixel // 8).astype(np.uint32)
    if byte_order == 1:
        px = px[:, :, ::-1]
    value = np.zeros((height, width), np.uint32)
    for k in range(px.shape[2]):
        value |= px[:, :, k] << (8 * k)
    out = np.zeros((height, width, 3), np.uint8)
    for ch, m in enumerate(masks):
        shift = (m & -m).bit_length() - 1
        out[:, :, ch] = ((value & m) >> shift).astype(np.uint8)
    return out


def screenshot(server: XServer, name: str) -> tuple[Path, np.ndarray]:
    """``xwd -root`` of the whole screen, kept as ``test-artefacts/editor/<name>.png``."""
    from PIL import Image

    ARTEFACTS.mkdir(parents=True, exist_ok=True)
    with tempfile.TemporaryDirectory() as tmp:
        dump = Path(tmp) / "screen.xwd"
        out = subprocess.run(["xwd", "-root", "-silent", "-display", server.display,
                              "-out", str(dump)], capture_output=True, timeout=15)
        if out.returncode != 0:
            pytest.fail(f"xwd failed: {out.stderr.decode(errors='replace').strip()}")
        rgb = read_xwd(dump)
    target = ARTEFACTS / f"{name}.png"
    Image.fromarray(rgb).save(target)
    return target, rgb


# ---------------------------------------------------------------------------- child editor
def write_tile(folder: Path, image: np.ndarray, proposal: np.ndarray, *, title: str,
               view_shape: tuple[int, int] = (512, 512), radius: float = 1.5,
               autosave_seconds: float = 5.0, reply_state: str = "amended") -> Path:
    """Lay out a child editor's folder: ``tile.npz`` and ``spec.json``; returns the spec.
    ``reply_state`` is what the child's :class:`FolderBackend` answers to every save."""
    folder.mkdir(parents=True, exist_ok=True)
    np.savez(folder / "tile.npz", image=image, proposal=proposal)
    spec = folder / "spec.json"
    spec.write_text(json.dumps({
        "title": title, "view_shape": list(view_shape), "radius": radius,
        "autosave_seconds": autosave_seconds, "reply_state": reply_state,
    }))
    return spec


@dataclass
class Child:
    """An editor process on the X server, with its trace and log in ``folder``."""

    server: XServer
    process: subprocess.Popen
    folder: Path
    log: object = field(repr=False)
    pointer: tuple[str, int, int] | None = None  # (window, x, y) last moved to
    _read: int = 0  # trace lines consumed

    @property
    def trace(self) -> Path:
        return self.folder / "trace.log"

    def lines(self) -> list[str]:
        """Every whole line of the trace so far."""
        if not self.trace.exists():
            return []
        text = self.trace.read_text()
        return text.split("\n")[:-1]  # the last piece is empty or still being written

    def log_tail(self) -> str:
        return (self.folder / "child.log").read_text(errors="replace")[-3000:]

    def expect(self, predicate: Callable[[str], bool], *, what: str,
               timeout: float = 20.0) -> str:
        """Wait for the next trace line that matches ``predicate`` (lines before it are
        passed over); fails the test when the deadline passes or the editor closes or
        exits first."""
        found: list[str] = []

        def seen():
            lines = self.lines()
            for i in range(self._read, len(lines)):
                if predicate(lines[i]):
                    self._read = i + 1
                    found.append(lines[i])
                    return True
                if lines[i].startswith("closed"):
                    pytest.fail(f"the editor closed while waiting for {what}; trace: "
                                f"{lines[self._read:]}")
            if self.process.poll() is not None:
                pytest.fail(f"the editor exited (code {self.process.returncode}) while "
                            f"waiting for {what}; its log ends:\n{self.log_tail()}")
            return False

        wait_for(seen, timeout=timeout, what=what, interval=0.01)
        return found[0]


def launch_child(server: XServer, spec: Path) -> Child:
    """Start ``python -m tests.editor.child SPEC`` (a ``FolderBackend`` editor) on
    the server, from the repository root; log and trace beside ``spec``."""
    return _launch(server, spec.parent, [str(spec)])


def launch_cli(server: XServer, folder: Path, cli_args: Sequence[str]) -> Child:
    """Start ``labeler CLI_ARGS...`` (e.g. ``edit DIR TILE --annotator NAME``) on the
    server with a traced window; log and trace in ``folder``."""
    folder.mkdir(parents=True, exist_ok=True)
    return _launch(server, folder, ["--cli", *cli_args])


def _launch(server: XServer, folder: Path, args: list[str]) -> Child:
    log = open(folder / "child.log", "ab")  # noqa: SIM115 - closed by stop_child
    (folder / "trace.log").unlink(missing_ok=True)
    env = server.env()
    env["XDRIVE_TRACE"] = str(folder / "trace.log")
    proc = subprocess.Popen([sys.executable, "-m", "tests.editor.child", *args], cwd=REPO,
                            env=env, stdout=log, stderr=log)
    child = Child(server, proc, folder, log)
    _LIVE.append(child)
    return child


_LIVE: list[Child] = []


def reap_children() -> int:
    """Kill editor processes a failed test left running and close their logs; returns how
    many were still running."""
    alive = 0
    while _LIVE:
        child = _LIVE.pop()
        if child.process.poll() is None:
            alive += 1
            child.process.kill()
            child.process.wait(5)
        child.log.close()
    return alive


def stop_child(child: Child, *, timeout: float = 20.0, kill: bool = False) -> int:
    """Wait for the child to end (or kill it); returns its exit code."""
    try:
        if kill:
            child.process.send_signal(signal.SIGKILL)
        return child.process.wait(timeout)
    except subprocess.TimeoutExpired:
        child.process.kill()
        child.process.wait(5)
        pytest.fail(f"the editor did not close within {timeout:.0f} s")
    finally:
        child.log.close()


def read_saves(folder: Path) -> list[dict]:
    """Saved labels of a ``FolderBackend``, oldest first."""
    out = []
    for path in sorted((folder / "saves").glob("*.npz")):
        with np.load(path) as z:
            out.append({k: (z[k] if z[k].ndim else z[k].item()) for k in z.files})
    return out


def read_draft(folder: Path) -> dict | None:
    path = folder / "draft.npz"
    if not path.exists():
        return None
    with np.load(path) as z:
        return {k: (z[k] if z[k].ndim else z[k].item()) for k in z.files}


def read_outcome(folder: Path) -> dict:
    path = folder / "outcome.json"
    if not path.exists():
        log = (folder / "child.log").read_text(errors="replace")[-3000:]
        pytest.fail(f"the editor left no outcome.json; its log ends:\n{log}")
    return json.loads(path.read_text())


