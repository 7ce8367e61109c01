"""``labeler import`` in real processes: killed at random points it loses no committed mask
and leaves a sound database; two imports at once never replace each other.

Children report where they are through a pipe and wait on their stdin; the parent reads
the line (no sleeps) and kills them there or lets them go.
"""

from __future__ import annotations

import hashlib
import os
import signal
import subprocess
import sys
import textwrap

import numpy as np
from affine import Affine

from labeler.imagery.write import write_geotiff, write_png
from labeler.project import init_project, open_project
from labeler.store import Store
from labeler.workflow import add_images, import_masks, save_tile_mask
from tests.common import REPO

N_TILES = 12
#: Statements of the saves' transaction with a new annotator: BEGIN IMMEDIATE; the
#: annotator looked up and added; tiles and newest versions read; annotations inserted;
#: tiles updated; assignments read and added; drafts deleted; events inserted.
WRITE_STATEMENTS = 11

#: A child import that stops at its k-th step of one phase, says "ready" and waits:
#: "read" counts progress reports while the files are read (before any write), "write"
#: counts the statements of the saves' write transaction (BEGIN IMMEDIATE, then
#: WRITE_STATEMENTS - 1 reads and writes before its commit), "after" stops once the
#: import has returned (committed).
CHILD = textwrap.dedent(
    """
    import sys
    from sqlalchemy import event
    from labeler.project import open_project
    from labeler.workflow import import_masks

    root, mask, who, phase, k = sys.argv[1:6]
    k = int(k)
    project = open_project(root)
    seen = [0]

    def pause():
        print("ready", flush=True)
        sys.stdin.readline()  # the parent kills us here

    def progress(done, total, label):
        if phase == "read":
            seen[0] += 1
            if seen[0] == k:
                pause()

    commits = [0]

    @event.listens_for(project.store.engine, "commit")
    def committed(conn):
        if conn.get_execution_options().get("write"):
            commits[0] += 1

    @event.listens_for(project.store.engine, "after_cursor_execute")
    def executed(conn, cursor, statement, params, context, executemany):
        if phase == "write" and not commits[0] and conn.get_execution_options().get("write"):
            seen[0] += 1
            if seen[0] == k:
                pause()

    import_masks(project, [mask], annotator=who, replace=True, progress=progress)
    if phase == "after":
        pause()
    print("done", flush=True)
    """
)

#: A command-line import that waits for "go" so that two start together.
RACER = textwrap.dedent(
    """
    import sys
    from labeler.cli import main

    print("ready", flush=True)
    sys.stdin.readline()
    sys.exit(main(["import", *sys.argv[1:]]))
    """
)


def _env():
    env = dict(os.environ)
    env["PYTHONPATH"] = str(REPO) + os.pathsep + env.get("PYTHONPATH", "")
    return env


def _project(tmp_path):
    """An invented 700 x 900 GeoTIFF in 3 x 4 tiles, with saved work of two people."""
    rgb = np.random.default_rng(4).integers(0, 256, (700, 900, 3), dtype=np.uint8)
    write_geotiff(tmp_path / "far-strip.tif", rgb,
                  transform=Affine(0.01, 0, 431000, 0, -0.01, 5712000), crs="EPSG:32631")
    project = init_project(tmp_path / "proj")
    add_images(project, [tmp_path / "far-strip.tif"])
    tiles = project.store.tiles()
    assert len(tiles) == N_TILES
    rng = np.random.default_rng(9)
    for k, who in ((1, "tomas"), (6, "ines"), (11, "tomas")):
        save_tile_mask(project, tiles[k].id, who,
                       rng.integers(0, 4, tiles[k].shape).astype(np.uint8), parent_version=None)
    return project


def _committed(url: str) -> dict[tuple[int, int], tuple[str, str, int]]:
    """Every saved version: (tile, version) -> (annotator, PNG SHA-256, sum of the mask)."""
    store = Store(url)
    try:
        return {
            (a.tile_id, a.version): (a.annotator, hashlib.sha256(a.mask_png).hexdigest(),
                                     int(a.mask().sum()))
            for a in store.annotations(kind=None)
        }
    finally:
        store.close()


def _run_child(root, mask, who, phase, k):
    proc = subprocess.Popen(
        [sys.executable, "-c", CHILD, str(root), str(mask), who, phase, str(k)],
        stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
        env=_env(),
    )
    try:
        line = proc.stdout.readline().strip()
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait(60)
        err = proc.stderr.read()
        for stream in (proc.stdin, proc.stdout, proc.stderr):
            stream.close()
    return line, err


def test_sigkill_during_imports_loses_no_committed_mask(tmp_path):
    project = _project(tmp_path)
    root, url = project.root, project.store.url
    project.close()
    rng = np.random.default_rng(2027)
    rounds = [("read", int(rng.integers(1, 4))), ("write", 1),
              ("write", int(rng.integers(2, WRITE_STATEMENTS))), ("write", WRITE_STATEMENTS),
              ("after", 1), ("write", int(rng.integers(1, WRITE_STATEMENTS + 1)))]
    for n, (phase, k) in enumerate(rounds):
        mask = tmp_path / f"round-{n}" / "far-strip_mask.png"
        mask.parent.mkdir()
        write_png(mask, np.random.default_rng(n).integers(0, 4, (700, 900)).astype(np.uint8))
        before = _committed(url)
        line, err = _run_child(root, mask, f"import-{n}", phase, k)
        assert line == "ready", (phase, k, line, err)
        store = Store(url)
        try:
            assert store.integrity_check() == "ok"  # SQLite PRAGMA integrity_check
        finally:
            store.close()
        after = _committed(url)
        # every mask committed before the kill is there, byte for byte, and decodes
        assert {key: after[key] for key in before} == before, (phase, k)
        landed = {key for key, v in after.items() if v[0] == f"import-{n}"}
        if phase == "after":
            assert len(landed) == N_TILES  # committed before the kill: all of it is kept
        else:
            assert landed == set(), (phase, k)  # one transaction: none of it landed
        assert set(after) - set(before) == landed
    # the project still works: a last import runs to its end
    with open_project(root) as project:
        res = import_masks(project, [tmp_path / "round-0" / "far-strip_mask.png"],
                           annotator="final", replace=True)
        assert res.full_tiles == N_TILES


def test_two_import_processes_never_replace_each_other(tmp_path):
    seed = 0
    project = _project(tmp_path)
    root = project.root
    tiles = {t.id: t.overlap for t in project.store.tiles()}
    assert set(tiles.values()) == {True, False}  # a share of the tiles goes to two people
    project.close()
    procs = []
    for who in ("survey-a", "survey-b"):
        mask = tmp_path / f"{who}" / "far-strip.png"
        mask.parent.mkdir()
        write_png(mask, np.random.default_rng([seed, len(procs)]).integers(
            0, 4, (700, 900)).astype(np.uint8))
        procs.append(subprocess.Popen(
            [sys.executable, "-c", RACER, str(root), str(mask), "--annotator", who],
            stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
            env=_env(),
        ))
    outs = []
    try:
        for p in procs:
            assert p.stdout.readline().strip() == "ready"
        for p in procs:  # both go at once
            p.stdin.write("go\n")
            p.stdin.flush()
        for p in procs:
            out, err = p.communicate(timeout=300)
            assert p.returncode == 0, err
            outs.append(out)
    finally:
        for p in procs:
            if p.poll() is None:
                p.kill()
                p.wait(60)
    with open_project(root) as project:
        store = project.store
        for tile_id, overlap in tiles.items():
            saved_by = [a.annotator for a in store.annotation_history(tile_id)]
            imports = [w for w in saved_by if w.startswith("survey-")]
            if overlap:  # each annotator's own lineage: both stand, each once
                assert sorted(imports) == ["survey-a", "survey-b"], saved_by
            elif saved_by[:1] in (["tomas"], ["ines"]):
                assert imports == []  # someone's saved work: neither import replaced it
            else:
                assert len(imports) == 1, saved_by  # exactly one import won the tile
    # the one that did not get a tile says so, tile by tile
    assert all("imported" in out for out in outs)
    assert any("skipped" in out for out in outs)
