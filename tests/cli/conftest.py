"""A worked project to break, and the fingerprint that shows a failed command changed nothing.

The template is built once per session (two invented images of Brackenlow Farm's north
strip, seeded proposals, saves by two annotators) and copied for each test.
"""

from __future__ import annotations

import hashlib
import shutil
import sqlite3
from pathlib import Path

import numpy as np
import pytest
from affine import Affine
from PIL import Image

from labeler.cli import main
from labeler.imagery.write import write_geotiff
from labeler.project import init_project, open_project
from labeler.store import NewProposal
from labeler.workflow import accept_tile, add_images, save_tile_mask

DB_FILES = ("labeler.db", "labeler.db-wal", "labeler.db-shm")


def fingerprint(root: Path) -> dict:
    """Every file of the project (name, size, SHA-256) and every row of its database.

    The database is compared by its rows (a reader may leave SQLite's ``-wal``/``-shm``
    files behind, and a checkpoint may rewrite pages without changing a row); a file that
    SQLite cannot read is compared by its bytes.
    """
    files = {}
    for p in sorted(root.rglob("*")):
        rel = p.relative_to(root).as_posix()
        if p.name in DB_FILES:
            continue
        files[rel] = "folder" if p.is_dir() else (p.stat().st_size, _sha(p.read_bytes()))
    db = root / "labeler.db"
    if not db.exists():
        rows = None
    else:
        rows = ("bytes", _sha(db.read_bytes()))
        if db.stat().st_size:
            try:
                con = sqlite3.connect(f"file:{db}?mode=ro", uri=True)
                try:
                    tables = [
                        r[0]
                        for r in con.execute(
                            "SELECT name FROM sqlite_master WHERE type = 'table' ORDER BY name"
                        )
                    ]
                    rows = {
                        name: sorted(map(repr, con.execute(f'SELECT * FROM "{name}"')))
                        for name in tables
                    }
                finally:
                    con.close()
            except sqlite3.DatabaseError:
                pass
    return {"files": files, "rows": rows}


def _sha(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def images(folder: Path) -> dict[str, Path]:
    """Two invented images: a georeferenced GeoTIFF (2 x 3 tiles) and a PNG (1 tile)."""
    rng = np.random.default_rng(13)
    folder.mkdir(parents=True, exist_ok=True)
    strip = folder / "north-strip.tif"
    write_geotiff(
        strip,
        rng.integers(0, 256, (300, 500, 3), dtype=np.uint8),
        transform=Affine(0.004, 0, 431000, 0, -0.004, 5712000),
        crs="EPSG:32631",
    )
    leaf = folder / "leaf.png"
    Image.fromarray(rng.integers(0, 256, (200, 200, 3), dtype=np.uint8)).save(leaf)
    return {"strip": strip, "leaf": leaf}


@pytest.fixture(scope="session")
def template(tmp_path_factory) -> Path:
    """A project with images, proposals and saved masks (symptom, index 3, among them)."""
    base = tmp_path_factory.mktemp("template")
    files = images(base / "incoming")
    root = base / "brackenlow"
    init_project(root).close()
    rng = np.random.default_rng(3)
    with open_project(root) as project:
        add_images(project, [files["strip"]])
        store = project.store
        mv = store.add_model_version(kind="cold_start", name="seeded")
        store.add_proposals(
            mv.id,
            [
                NewProposal(t.id, rng.integers(0, 4, t.shape).astype(np.uint8))
                for t in store.tiles()
            ],
        )
        tiles = store.tiles()
        accept_tile(project, tiles[0].id, "ines")
        accept_tile(project, tiles[1].id, "tomas")
        mask = np.full(tiles[2].shape, 3, np.uint8)  # a symptom patch
        mask[:10] = 1
        save_tile_mask(project, tiles[2].id, "ines", mask, parent_version=None)
    return root


@pytest.fixture
def project(template, tmp_path) -> Path:
    """A fresh copy of the template project."""
    root = tmp_path / "brackenlow"
    shutil.copytree(template, root)
    return root


@pytest.fixture
def incoming(tmp_path) -> dict[str, Path]:
    """Fresh image files to add."""
    return images(tmp_path / "incoming")


def run(argv, capsys) -> tuple[int, str, str]:
    """``labeler ARGV`` in this process: exit code, stdout, stderr."""
    code = main([str(a) for a in argv])
    out = capsys.readouterr()
    return code, out.out, out.err


def one_error_line(err: str) -> str:
    """The single ``labeler: error:`` line of ``err`` (and nothing else on stderr)."""
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1, err
    assert lines[0].startswith("labeler: error: ") and "Traceback" not in err, err
    return lines[0]


# -- a project this user cannot write ------------------------------------------------------
NOBODY = 65534


def make_read_only(root: Path) -> None:
    """Take write permission away from every file and folder of ``root``."""
    for p in [root, *root.rglob("*")]:
        mode = p.stat().st_mode & 0o777
        p.chmod(mode & ~0o222 | (0o111 if p.is_dir() else 0) | 0o444)


def as_reader(body, *, env=None) -> tuple[int, str, str]:
    """Run ``body()`` (returning an exit code) as a user who may read but not write.

    As an ordinary user, the project's permissions say so (:func:`make_read_only`) and
    ``body`` runs here. As root (who may write anything), it runs in a forked child that
    has become the unprivileged user ``nobody`` (uid 65534); every module ``body`` needs
    must be imported before (the child may not read the interpreter's library folders).

    Returns
    -------
    (exit code, stdout, stderr)
    """
    import contextlib
    import io
    import os
    import sys

    if os.geteuid() != 0:
        out, err = io.StringIO(), io.StringIO()
        with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
            code = body()
        return code, out.getvalue(), err.getvalue()
    out_r, out_w = os.pipe()
    err_r, err_w = os.pipe()
    pid = os.fork()
    if pid == 0:  # the child: never returns into pytest
        code = 99
        try:
            os.close(out_r)
            os.close(err_r)
            os.setgroups([])
            os.setgid(NOBODY)
            os.setuid(NOBODY)
            for key, value in (env or {}).items():
                os.environ[key] = value
            sys.stdout = os.fdopen(out_w, "w")
            sys.stderr = os.fdopen(err_w, "w")
            code = body()
            sys.stdout.flush()
            sys.stderr.flush()
        finally:
            os._exit(code)
    os.close(out_w)
    os.close(err_w)
    with os.fdopen(out_r) as fo, os.fdopen(err_r) as fe:
        out, err = fo.read(), fe.read()
    _, status = os.waitpid(pid, 0)
    return os.waitstatus_to_exitcode(status), out, err


def run_as_reader(argv, *, preload, env=None) -> tuple[int, str, str]:
    """``labeler ARGV`` as a reader (see :func:`as_reader`); ``preload()`` runs first, here,
    to import what the command needs (e.g. the same command on a writable copy)."""
    import os

    argv = [str(a) for a in argv]
    if os.geteuid() == 0:
        preload()
    return as_reader(lambda: main(argv), env=env)


def run_as_reader_call(function, *, env=None) -> tuple[int, str, str]:
    """``function()`` inside the command line's error boundary, as a reader."""
    from labeler.cli.boundary import run_command

    return as_reader(lambda: run_command(lambda _args: function(), None, debug=False), env=env)


@pytest.fixture
def reader_folder(tmp_path):
    """A folder anyone may enter (the project goes there), removed afterwards."""
    import os
    import stat
    import tempfile

    folder = Path(tempfile.mkdtemp(prefix="labeler-read-only-"))
    folder.chmod(0o755)
    yield folder
    for p in [folder, *folder.rglob("*")]:
        if p.is_dir() and not p.is_symlink():
            p.chmod(p.stat().st_mode | stat.S_IWUSR | stat.S_IXUSR)
    shutil.rmtree(folder)
    assert not os.path.exists(folder)
