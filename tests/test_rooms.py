"""Room rules that imports cannot show, checked on the syntax tree of every module.

The import contracts (pyproject.toml, tests/test_contracts.py) say who may import what.
They cannot see what a module does with what it imported, so these rules read the calls:

* **file writes** (``open`` for writing, ``Path.write_*``, ``os.replace``, ``shutil``
  copies, temporary files, deletions) only in ``fileio.py``, ``imagery/``, ``export/``
  and ``store/``; every other room hands its bytes to :mod:`labeler.fileio`;
* **image files** (``PIL.Image.open``, ``rasterio.open``, ``cv2.imread``/``imwrite``,
  video) only in ``imagery/`` and ``export/``;
* **OpenCV windows** (``cv2.imshow``, ``cv2.waitKey``, ...) only in ``editor/window.py``;
* the **pure core** (``masks/``, ``picker``, ``agreement``, ``metrics``) opens no file at
  all, not even to read;
* the **edges** (``cli/``, ``tui/``, ``demo/``, ``editor/``) never touch a project's
  ``.store``: they call :mod:`labeler.workflow`;
* **tile states** change only in ``workflow/`` (and the store itself): the store calls
  that move a tile (``set_state``, ``save_annotation``, ``hold``, ``release``) appear
  nowhere else.

Names are resolved through the module's imports, so ``from shutil import copyfile as cp``
is still a copy. A call on an object of unknown type is judged by its method name only
where that name is unambiguous (``write_text``, ``unlink``; not ``replace``, which a
string has too).
"""

from __future__ import annotations

import ast
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "labeler"

WRITE_CALLS = frozenset(
    {
        "os.replace", "os.rename", "os.renames", "os.remove", "os.unlink", "os.rmdir",
        "os.removedirs", "os.truncate", "os.fdopen", "os.link", "os.symlink",
        "shutil.copy", "shutil.copy2", "shutil.copyfile", "shutil.copytree", "shutil.move",
        "shutil.rmtree", "tempfile.mkstemp", "tempfile.mkdtemp", "tempfile.NamedTemporaryFile",
        "tempfile.TemporaryFile", "tempfile.SpooledTemporaryFile",
    }
)  # fmt: skip
WRITE_METHODS = frozenset({"write_text", "write_bytes", "touch", "unlink", "rmdir", "symlink_to"})
IMAGE_CALLS = frozenset(
    {
        "PIL.Image.open", "rasterio.open", "cv2.imread", "cv2.imreadmulti", "cv2.imwrite",
        "cv2.imwritemulti", "cv2.VideoCapture", "cv2.VideoWriter",
    }
)  # fmt: skip
WINDOW_CALLS = frozenset(
    f"cv2.{name}"
    for name in (
        "namedWindow", "imshow", "waitKey", "waitKeyEx", "pollKey", "destroyWindow",
        "destroyAllWindows", "setMouseCallback", "moveWindow", "resizeWindow",
        "setWindowProperty", "getWindowProperty", "getWindowImageRect", "setWindowTitle",
        "createTrackbar", "getTrackbarPos", "setTrackbarPos", "createButton", "selectROI",
        "selectROIs", "startWindowThread", "displayOverlay", "displayStatusBar",
    )
)  # fmt: skip
READ_CALLS = frozenset(
    {
        "builtins.open", "io.open", "numpy.load", "numpy.loadtxt", "numpy.fromfile",
        "numpy.genfromtxt", "json.load", "tomllib.load", "pickle.load", "os.open",
    }
)  # fmt: skip
READ_METHODS = frozenset({"read_text", "read_bytes", "open", "iterdir", "glob", "rglob"})
#: Store calls that move a tile; ``hold``/``release`` are common words, so they count only
#: when called on something named ``store``.
STATE_METHODS = frozenset({"set_state", "save_annotation"})
STORE_STATE_METHODS = frozenset({"hold", "release"})

#: Where each kind of call is allowed (paths relative to labeler/; a folder ends in "/").
WRITERS = ("fileio.py", "imagery/", "export/", "store/")
IMAGE_ROOMS = ("imagery/", "export/")
WINDOW_ROOM = ("editor/window.py",)
PURE_CORE = ("masks/", "picker/", "agreement/", "metrics.py")
EDGES = ("cli.py", "cli/", "tui/", "demo/", "editor/")
STATE_ROOMS = ("workflow/", "store/")


@dataclass(frozen=True)
class Finding:
    """One call that breaks a room rule."""

    path: str
    line: int
    rule: str
    call: str

    def __str__(self) -> str:
        return f"labeler/{self.path}:{self.line}: {self.rule}: {self.call}"


def _in(path: str, rooms: tuple[str, ...]) -> bool:
    return any(path == r or (r.endswith("/") and path.startswith(r)) for r in rooms)


def _aliases(tree: ast.AST) -> dict[str, str]:
    """Local name -> qualified name, from the module's import statements."""
    names: dict[str, str] = {}
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for a in node.names:
                if a.asname:
                    names[a.asname] = a.name
                else:
                    top = a.name.split(".")[0]
                    names[top] = top
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            for a in node.names:
                names[a.asname or a.name] = f"{node.module}.{a.name}"
    return names


def _dotted(node: ast.AST, aliases: dict[str, str]) -> str | None:
    """``a.b.c`` with ``a`` resolved through the imports, or None for other expressions."""
    parts = []
    while isinstance(node, ast.Attribute):
        parts.append(node.attr)
        node = node.value
    if not isinstance(node, ast.Name):
        return None
    head = aliases.get(node.id)
    if head is None:
        if parts or node.id not in ("open",):
            return None
        head = f"builtins.{node.id}"
    name = ".".join([head, *reversed(parts)])
    return name.replace("np.", "numpy.", 1) if name.startswith("np.") else name


def _mode(call: ast.Call, position: int) -> str | None:
    """The constant file mode of an ``open``-like call, or None when not given as a literal."""
    mode = call.args[position] if len(call.args) > position else None
    for kw in call.keywords:
        if kw.arg == "mode":
            mode = kw.value
    if mode is None:
        return "r"
    if isinstance(mode, ast.Constant) and isinstance(mode.value, str):
        return mode.value
    return None


def _opens_for_writing(call: ast.Call, name: str | None, method: str | None) -> bool:
    """``open(path, "w")``, or ``path.open("w")`` on an object of unknown type.

    The built-in ``open`` with a mode that is not a literal counts as a write; a method
    ``open`` counts only with a literal writing mode (``gui.open(shape)`` is no file).
    """
    if name in ("builtins.open", "io.open"):
        mode = _mode(call, 1)
        return mode is None or any(ch in mode for ch in "wax+")
    if name is None and method == "open":
        mode = _mode(call, 0)
        return mode is not None and any(ch in mode for ch in "wax+")
    return False


def _receiver(call: ast.Call) -> str | None:
    """Last name of what a method is called on: ``store`` for ``project.store.hold(...)``."""
    if not isinstance(call.func, ast.Attribute):
        return None
    value = call.func.value
    if isinstance(value, ast.Attribute):
        return value.attr
    return value.id if isinstance(value, ast.Name) else None


def check_source(source: str, path: str) -> list[Finding]:
    """The room-rule breaches of one module's source; ``path`` is relative to labeler/."""
    tree = ast.parse(source)
    aliases = _aliases(tree)
    found: list[Finding] = []

    def flag(node: ast.AST, rule: str, call: str) -> None:
        found.append(Finding(path, getattr(node, "lineno", 0), rule, call))

    for node in ast.walk(tree):
        if isinstance(node, ast.Attribute) and node.attr == "store" and _in(path, EDGES):
            flag(node, "store access outside workflow", ast.unparse(node))
        if not isinstance(node, ast.Call):
            continue
        name = _dotted(node.func, aliases)
        method = node.func.attr if isinstance(node.func, ast.Attribute) else None
        text = name or (f".{method}" if method else ast.unparse(node.func))
        opens = name in ("builtins.open", "io.open") or (name is None and method == "open")
        writes = (
            name in WRITE_CALLS
            or (name is None and method in WRITE_METHODS)
            or _opens_for_writing(node, name, method)
        )
        if writes and not _in(path, WRITERS):
            flag(node, "file write outside fileio/imagery/export/store", text)
        if name in IMAGE_CALLS and not _in(path, IMAGE_ROOMS):
            flag(node, "image file I/O outside imagery/export", text)
        if name in WINDOW_CALLS and not _in(path, WINDOW_ROOM):
            flag(node, "OpenCV window outside editor/window.py", text)
        reads = (
            opens
            or name in READ_CALLS
            or name in IMAGE_CALLS
            or (name is None and method in READ_METHODS)
        )
        if reads and _in(path, PURE_CORE):
            flag(node, "file access in the pure core", text)
        moves = method in STATE_METHODS or (
            method in STORE_STATE_METHODS and _receiver(node) == "store"
        )
        if moves and not _in(path, STATE_ROOMS):
            flag(node, "tile state change outside workflow", text)
    return found


def package_modules() -> Iterator[tuple[str, str]]:
    for file in sorted(PACKAGE.rglob("*.py")):
        yield file.relative_to(PACKAGE).as_posix(), file.read_text(encoding="utf-8")


def test_every_module_keeps_the_room_rules():
    found = [str(f) for path, source in package_modules() for f in check_source(source, path)]
    assert found == []


def test_the_scan_sees_the_whole_package():
    paths = {path for path, _ in package_modules()}
    assert {"cli/commands.py", "fileio.py", "editor/window.py", "workflow/adding.py"} <= paths
    # the rules are not vacuous: the rooms that may write, show windows and read images do
    window = (PACKAGE / "editor" / "window.py").read_text(encoding="utf-8")
    assert "cv2.imshow" in window and not check_source(window, "editor/window.py")
    assert check_source(window, "editor/state.py")


@pytest.mark.parametrize(
    ("path", "source", "rule"),
    [
        ("tui/x.py", "from pathlib import Path\nPath('a.svg').write_text(svg)", "file write"),
        ("workflow/x.py", "import shutil as sh\nsh.copyfile(src, dst)", "file write"),
        ("workflow/x.py", "from shutil import copyfile as cp\ncp(src, dst)", "file write"),
        ("demo/x.py", "import shutil\nshutil.rmtree(out)", "file write"),
        ("model/x.py", "import os\nos.replace(tmp, target)", "file write"),
        ("project.py", "with open(path, 'w') as fh:\n    fh.write(text)", "file write"),
        ("project.py", "with open(path, mode='ab') as fh:\n    pass", "file write"),
        ("project.py", "path.open('w').write(text)", "file write"),
        ("project.py", "open(path, how)", "file write"),  # a mode we cannot read counts
        ("workflow/x.py", "target.unlink(missing_ok=True)", "file write"),
        ("workflow/x.py", "import tempfile\nfd, tmp = tempfile.mkstemp()", "file write"),
        ("demo/x.py", "from PIL import Image\nImage.open(p)", "image file I/O"),
        ("demo/x.py", "import PIL.Image\nPIL.Image.open(p)", "image file I/O"),
        ("workflow/x.py", "import cv2\ncv2.imwrite('a.png', img)", "image file I/O"),
        ("model/x.py", "import rasterio\nrasterio.open(p)", "image file I/O"),
        ("masks/x.py", "import cv2\ncv2.imshow('w', frame)", "OpenCV window"),
        ("editor/state.py", "import cv2 as cv\ncv.waitKeyEx(5)", "OpenCV window"),
        ("masks/x.py", "open(p, 'rb').read()", "file access in the pure core"),
        ("picker/x.py", "import numpy as np\nnp.load(p)", "file access in the pure core"),
        ("agreement/x.py", "p.read_bytes()", "file access in the pure core"),
        ("metrics.py", "import json\njson.load(fh)", "file access in the pure core"),
        ("tui/x.py", "rows = self.app.project.store.tiles()", "store access"),
        ("cli/commands.py", "names = project.store.images()", "store access"),
        ("export/x.py", "store.set_state(tile, 'parked')", "tile state change"),
        ("tui/x.py", "project.store.hold(tile_id, who)", "tile state change"),
        ("demo/x.py", "store.release(tile_id, who)", "tile state change"),
    ],
)
def test_each_rule_catches_its_breach(path, source, rule):
    found = check_source(source, path)
    assert [f.rule for f in found if f.rule.startswith(rule)], found


@pytest.mark.parametrize(
    ("path", "source"),
    [
        ("imagery/x.py", "from PIL import Image\nImage.open(p)"),
        ("export/x.py", "import rasterio\nrasterio.open(p, 'w')"),
        ("fileio.py", "import os, shutil\nshutil.copyfile(a, b)\nos.replace(a, b)"),
        ("store/x.py", "import numpy as np\nnp.save(buf, a)"),
        ("editor/window.py", "import cv2\ncv2.imshow('w', frame)"),
        ("workflow/x.py", "with open(path, 'rb') as fh:\n    fh.read()"),
        ("workflow/x.py", "name = text.replace('a', 'b')"),  # a string's replace is no rename
        ("workflow/x.py", "project.store.set_state(t, 'parked')"),
        ("settings.py", "url = self.store.url"),  # a settings section named store
        ("masks/x.py", "import cv2\nlabels = cv2.connectedComponents(mask)"),
        ("model/x.py", "import torch, io\nbuf = io.BytesIO()\ntorch.save(obj, buf)"),
        ("editor/window.py", "self.open(self._shape, self._on_mouse)"),  # not a file
        ("editor/state.py", "state.release((row, col))"),  # a mouse button, not a hold
    ],
)
def test_allowed_calls_are_not_flagged(path, source):
    assert check_source(source, path) == []
