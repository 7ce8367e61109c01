"""Driving the editor window under Xvfb: the X server, xdotool, screenshots, a child editor.

Reusable by any window test: start a server (:func:`start_xvfb`), launch an editor process
(:func:`launch_child` runs ``python -m tests.editor.xdrive SPEC`` with a
:class:`FolderBackend`, or pass your own command), wait for its window
(:func:`wait_window`), drive it (:func:`drag`, :func:`press_keys`), take a screenshot
(:func:`screenshot`), and read what it saved (:func:`read_saves`, :func:`read_draft`).

The editor runs in a child process, not a thread: the Qt build of HighGUI wants the
main thread, and a crash of the window must not take the test run with it.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import struct
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest

from tests.common import REPO

__all__ = [
    "TOOLS_NEEDED",
    "XServer",
    "missing_tools",
    "start_xvfb",
    "stop_xvfb",
    "wait_for",
    "xdo",
    "wait_window",
    "drag",
    "press_keys",
    "screenshot",
    "read_xwd",
    "FolderBackend",
    "write_tile",
    "launch_child",
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
    os.set_blocking(read_fd, False)
    try:
        while not number.endswith(b"\n"):
            if proc.poll() is not None:
                pytest.fail(f"Xvfb exited at start with code {proc.returncode}")
            if time.monotonic() > end:
                proc.kill()
                pytest.fail(f"Xvfb did not report a display number within {timeout:.0f} s")
            try:
                chunk = os.read(read_fd, 16)
            except BlockingIOError:
                time.sleep(0.02)
                continue
            if not chunk:
                time.sleep(0.02)
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


def wait_window(server: XServer, title: str, *, size: tuple[int, int] | None = None,
                timeout: float = 30.0, child: subprocess.Popen | None = None) -> str:
    """Id of the window called ``title``, once mapped (and ``size`` = (width, height))."""

    def found():
        if child is not None and child.poll() is not None:
            pytest.fail(f"the editor exited with code {child.returncode} before its window "
                        f"appeared")
        ids = xdo(server, "search", "--name", title, check=False).split()
        if not ids:
            return None
        if size is not None and _geometry(server, ids[-1]) != tuple(size):
            return None
        return ids[-1]

    win = wait_for(found, timeout=timeout, what=f"a window named {title!r} of size {size}")
    xdo(server, "mousemove", "--window", win, 1, 1)
    xdo(server, "windowfocus", "--sync", win, check=False)
    return win


def drag(server: XServer, window: str, points: Sequence[tuple[int, int]], *, button: int = 1,
         pause: float = 0.12) -> None:
    """Press ``button`` at the first ``(x, y)`` window point, move through the rest, release.

    The pause after each move lets the editor handle the event before the next arrives.
    """
    x0, y0 = points[0]
    xdo(server, "mousemove", "--window", window, x0, y0)
    time.sleep(pause)
    xdo(server, "mousedown", button)
    time.sleep(pause)
    for x, y in points[1:]:
        xdo(server, "mousemove", "--window", window, x, y)
        time.sleep(pause)
    xdo(server, "mouseup", button)
    time.sleep(pause)


def press_keys(server: XServer, *keys: str, pause: float = 0.12) -> None:
    """Press keys by X keysym name (``"2"``, ``"Return"``, ``"Escape"``, ``"y"``)."""
    for k in keys:
        xdo(server, "key", k)
        time.sleep(pause)


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
    exists every save raises ``ConflictError`` carrying it as ``theirs``.
    """

    def __init__(self, folder: str | os.PathLike[str]) -> None:
        self.folder = Path(folder)
        (self.folder / "saves").mkdir(parents=True, exist_ok=True)

    def save(self, mask, *, kind, state, actions, seconds) -> None:
        from labeler.errors import ConflictError

        conflict = self.folder / "conflict.npy"
        if conflict.exists():
            raise ConflictError("someone saved this tile first", tile_id=1, parent_version=1,
                                current_version=2, theirs=np.load(conflict))
        n = len(list((self.folder / "saves").glob("*.npz"))) + 1
        _atomic_savez(self.folder / "saves" / f"{n:03d}.npz", mask=mask, kind=kind,
                      state=state, actions=actions, seconds=seconds)

    def save_draft(self, mask, scribbles, *, actions, seconds) -> None:
        _atomic_savez(self.folder / "draft.npz", mask=mask, scribbles=scribbles,
                      actions=actions, seconds=seconds)

    def load_draft(self):
        from labeler.editor.backend import Draft

        path = self.folder / "draft.npz"
        if not path.exists():
            return None
        with np.load(path) as z:
            return Draft(z["mask"], z["scribbles"], int(z["actions"]), float(z["seconds"]))

    def discard_draft(self) -> None:
        (self.folder / "draft.npz").unlink(missing_ok=True)


def write_tile(folder: Path, image: np.ndarray, proposal: np.ndarray, *, title: str,
               view_shape: tuple[int, int] = (512, 512), radius: float = 1.5,
               autosave_seconds: float = 5.0) -> Path:
    """Lay out a child editor's folder: ``tile.npz`` and ``spec.json``; returns the spec."""
    folder.mkdir(parents=True, exist_ok=True)
    np.savez(folder / "tile.npz", image=image, proposal=proposal)
    spec = folder / "spec.json"
    spec.write_text(json.dumps({
        "title": title, "view_shape": list(view_shape), "radius": radius,
        "autosave_seconds": autosave_seconds,
    }))
    return spec


def launch_child(server: XServer, spec: Path, *,
                 command: Sequence[str] | None = None) -> subprocess.Popen:
    """Start an editor process on the server, from the repository root, output to
    ``child.log`` beside ``spec``.

    The default command is ``python -m tests.editor.xdrive SPEC`` (a :class:`FolderBackend`
    editor); pass ``command`` to run another one (e.g. an editor over the real store).
    """
    log = open(spec.parent / "child.log", "ab")  # noqa: SIM115 - closed by stop_child
    argv = list(command) if command is not None else [
        sys.executable, "-m", "tests.editor.xdrive", str(spec)]
    proc = subprocess.Popen(argv, cwd=REPO, env=server.env(), stdout=log, stderr=log)
    proc._log = log  # type: ignore[attr-defined]
    _LIVE.append(proc)
    return proc


_LIVE: list[subprocess.Popen] = []


def reap_children() -> int:
    """Kill editor processes a failed test left running and close their logs; returns how
    many were still running."""
    alive = 0
    while _LIVE:
        proc = _LIVE.pop()
        if proc.poll() is None:
            alive += 1
            proc.kill()
            proc.wait(5)
        proc._log.close()  # type: ignore[attr-defined]
    return alive


def stop_child(proc: subprocess.Popen, *, timeout: float = 20.0, kill: bool = False) -> int:
    """Wait for the child to end (or kill it); returns its exit code."""
    try:
        if kill:
            proc.send_signal(signal.SIGKILL)
        return proc.wait(timeout)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait(5)
        pytest.fail(f"the editor did not close within {timeout:.0f} s")
    finally:
        proc._log.close()  # type: ignore[attr-defined]


def read_saves(folder: Path) -> list[dict]:
    """Saved labels of a :class:`FolderBackend`, oldest first."""
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
    outcome = run_editor(state, backend=FolderBackend(folder), title=spec["title"],
                         autosave_seconds=spec["autosave_seconds"])
    (folder / "outcome.json").write_text(json.dumps(asdict(outcome)))
    return 0


if __name__ == "__main__":
    sys.exit(_child(sys.argv[1]))
