"""A project a team shares on a PostgreSQL server: init claims the database, join makes
a working folder on another machine, the team's settings live in the database, holds are
shown and released, and every annotator's saves land (on the throwaway test server)."""

import contextlib
import json
import os
import subprocess
import sys
import textwrap

import numpy as np
import pytest

from labeler.cli import main
from labeler.errors import ConflictError, LabelerError
from labeler.project import init_project, join_project, open_project
from tests.common import REPO, start_together


@pytest.fixture
def team_url(pg_url, monkeypatch):
    monkeypatch.delenv("LABELER_STORE_URL", raising=False)
    return pg_url


def test_init_claims_the_database_and_refuses_one_that_holds_a_project(tmp_path, team_url):
    init_project(tmp_path / "first", store_url=team_url).close()
    assert f'url = "{team_url}"' in (tmp_path / "first" / "labeler.toml").read_text()
    with pytest.raises(LabelerError, match="already holds a labeler project.*labeler join"):
        init_project(tmp_path / "second", store_url=team_url)
    assert not (tmp_path / "second").exists()  # nothing made


def test_join_needs_a_project_in_the_database(tmp_path, team_url):
    with pytest.raises(LabelerError, match="holds no labeler project"):
        join_project(tmp_path / "laptop", store_url=team_url)
    assert not (tmp_path / "laptop").exists()


def test_joined_folders_share_the_teams_settings(tmp_path, team_url, monkeypatch):
    monkeypatch.setenv("LABELER_AGREEMENT_THRESHOLD", "0.8")  # the first machine's choice
    with init_project(tmp_path / "office", store_url=team_url) as p:
        pid = p.store.project_id()
    monkeypatch.delenv("LABELER_AGREEMENT_THRESHOLD")
    with join_project(tmp_path / "laptop", store_url=team_url) as p:
        assert p.store.project_id() == pid
        assert p.settings.agreement.threshold == 0.8  # from the database
    # the laptop's own file says the default, the database's value wins on every open
    with open_project(tmp_path / "laptop") as p:
        assert p.settings.agreement.threshold == 0.8
    with pytest.raises(LabelerError, match="already holds a labeler project"):
        join_project(tmp_path / "laptop", store_url=team_url)


def test_status_release_and_upgrade_through_the_command(tmp_path, team_url, capsys):
    from labeler.imagery.write import write_png

    write_png(tmp_path / "east-block.png",
              np.random.default_rng(3).integers(0, 256, (200, 300, 3), dtype=np.uint8))
    assert main(["init", str(tmp_path / "office"), "--store", team_url]) == 0
    assert main(["join", str(tmp_path / "laptop"), "--store", team_url]) == 0
    assert main(["add", str(tmp_path / "office"), str(tmp_path / "east-block.png")]) == 0
    out = capsys.readouterr().out
    assert "joined the shared project at postgresql+psycopg://postgres@127.0.0.1" in out
    with open_project(tmp_path / "laptop") as p:
        tile = p.store.tiles()[0]
        p.store.hold(tile.id, "ines")
    assert main(["status", str(tmp_path / "office")]) == 0
    out = capsys.readouterr().out
    assert "shared project: the database is on a server" in out
    assert "held tiles" in out and "ines" in out
    assert "shared settings (the team's, kept in the database)" in out and "1=crop" in out
    assert main(["release", str(tmp_path / "office"), str(tile.id), "--by", "lead"]) == 0
    assert f"tile {tile.id}: released from ines; now unseen" in capsys.readouterr().out
    assert main(["upgrade", str(tmp_path / "laptop")]) == 0
    assert "nothing to do" in capsys.readouterr().out


def test_four_annotators_in_four_folders_lose_no_save(tmp_path, team_url):
    """Each saves from their own folder; two saving one tile get a conflict, not a loss."""
    from labeler.imagery.write import write_png
    from labeler.workflow import add_images

    write_png(tmp_path / "north-strip.png",
              np.random.default_rng(4).integers(0, 256, (256, 928, 3), dtype=np.uint8))
    names = ["ines", "tomas", "maren", "kofi"]
    projects = [init_project(tmp_path / names[0], store_url=team_url)]
    projects += [join_project(tmp_path / n, store_url=team_url) for n in names[1:]]
    try:
        add_images(projects[0], [tmp_path / "north-strip.png"])
        tiles = projects[1].store.tiles()  # seen from another machine at once
        assert len(tiles) == 4  # 928 = 256 + 3 x (256 - 32): four tiles of the default grid
        for p, name, tile in zip(projects, names, tiles, strict=True):
            p.store.hold(tile.id, name)
            p.store.save_annotation(tile.id, name, np.full(tile.shape, 1, np.uint8),
                                    parent_version=None)
        # two annotators open the same tile from version 1 and both save
        shared = tiles[0]
        projects[2].store.save_annotation(shared.id, "maren", np.full(shared.shape, 2, np.uint8),
                                          parent_version=1)
        with pytest.raises(ConflictError, match="based on version 1, but version 2"):
            projects[3].store.save_annotation(
                shared.id, "kofi", np.full(shared.shape, 3, np.uint8), parent_version=1)
        seen = projects[3].store
        assert [a.annotator for a in seen.annotation_history(shared.id)] == ["ines", "maren"]
        assert sorted(seen.savers(t.id)[0] for t in tiles[1:]) == sorted(names[1:])
    finally:
        for p in projects:
            p.close()


# -- four annotators as four processes in four folders: save, retrain, propose ------------

ANNOTATOR = textwrap.dedent(
    """
    import json, sys
    import numpy as np
    from PIL import Image
    from labeler.errors import ConflictError
    from labeler.project import open_project
    from labeler.workflow import save_tile_mask
    folder, name, truth_file, plan = sys.argv[1:5]
    truth = np.asarray(Image.open(truth_file))
    project = open_project(folder)
    tiles = {t.id: t for t in project.store.tiles()}
    print("ready", flush=True)                   # set up; wait for the test's word
    if sys.stdin.readline().strip() != "go":
        sys.exit("annotator: expected 'go' on stdin")
    for tile_id, parent in json.loads(plan):
        t = tiles[tile_id]
        try:
            rec = save_tile_mask(project, tile_id, name, truth[t.window.slices],
                                 parent_version=parent)
            print("saved", tile_id, rec.version, flush=True)
        except ConflictError as exc:
            print("conflict", tile_id, exc.current_version, flush=True)
    project.close()
    """
)

MODELLER = textwrap.dedent(
    """
    import sys
    from labeler.project import open_project
    from labeler.workflow import propose, retrain
    folder, job = sys.argv[1:3]
    project = open_project(folder)
    print("ready", flush=True)
    if sys.stdin.readline().strip() != "go":
        sys.exit("modeller: expected 'go' on stdin")
    if job == "retrain":
        mv = retrain(project).model_version
        print("trained", mv.id, mv.name, flush=True)
    else:
        r = propose(project)
        print("proposed", r.proposed, r.model_version.id, r.model_version.name, flush=True)
    project.close()
    """
)


def _env():
    env = dict(os.environ)
    env.pop("LABELER_STORE_URL", None)
    env["PYTHONPATH"] = str(REPO) + os.pathsep + env.get("PYTHONPATH", "")
    return env


def _together(jobs):
    """Run scripts at once: all set up (each says "ready"), then all told "go" (pipes)."""
    with contextlib.ExitStack() as stack:
        procs = [
            stack.enter_context(subprocess.Popen(
                [sys.executable, "-c", script, *map(str, args)], stdin=subprocess.PIPE,
                stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=_env(),
            ))
            for script, args in jobs
        ]
        outs = start_together(procs, timeout=600)
    assert [p.returncode for p in procs] == [0] * len(procs), outs
    return [[line.split() for line in out.splitlines()] for out, _ in outs]


def test_four_processes_in_four_folders_save_retrain_and_propose(tmp_path, team_url):
    """Done when: four annotators from four folders on one PostgreSQL project lose no
    save, two saving one tile get a conflict, one retrains (a test-sized budget) and
    another proposes with that new version from its own folder."""
    from PIL import Image

    from labeler.demo.build import demo_images, truth_path
    from labeler.imagery.write import write_png
    from labeler.workflow import add_images

    plot = demo_images()[0]  # an invented Brackenlow Farm plot and its drawn truth
    window = (slice(0, 480), slice(0, 704))  # 2 x 3 tiles of 256 px (overlap 32)
    write_png(tmp_path / "north-strip.png", np.asarray(Image.open(plot))[window])
    truth = tmp_path / "north-strip-truth.png"
    write_png(truth, np.asarray(Image.open(truth_path(plot)))[window])
    names = ["ines", "tomas", "maren", "kofi"]
    folders = [tmp_path / n for n in names]
    init_project(folders[0], store_url=team_url).close()
    for folder in folders[1:]:
        join_project(folder, store_url=team_url).close()
    for folder in folders:  # each machine's own file: the shared image folder, tiny training
        (folder / "labeler.toml").write_text(
            f'[store]\nurl = "{team_url}"\nimage_root = "{tmp_path / "shared-images"}"\n'
            "[model]\nepochs = 2\nmc_samples = 2\nmin_labelled_tiles = 3\n")
    with open_project(folders[0]) as p:
        add_images(p, [tmp_path / "north-strip.png"])
        t = [x.id for x in p.store.tiles()]
        assert len(t) == 6
    first = _together([(ANNOTATOR, (folders[0], "ines", truth, json.dumps([[t[5], None]])))])
    assert first == [[["saved", str(t[5]), "1"]]]
    # 1. all four save at once; maren and kofi both save tile t[5] from version 1
    plans = [[[t[0], None]], [[t[1], None]], [[t[2], None], [t[5], 1]], [[t[3], None], [t[5], 1]]]
    outs = _together([(ANNOTATOR, (f, n, truth, json.dumps(plan)))
                      for f, n, plan in zip(folders, names, plans, strict=True)])
    on_shared = {names[i]: lines[-1] for i, lines in enumerate(outs) if i >= 2}
    results = sorted(line[0] for line in on_shared.values())
    assert results == ["conflict", "saved"], outs
    winner = next(n for n, line in on_shared.items() if line[0] == "saved")
    loser = next(n for n, line in on_shared.items() if line[0] == "conflict")
    assert on_shared[loser] == ["conflict", str(t[5]), "2"]  # told the winner's version
    # 2. tomas retrains from his folder while ines saves another tile
    trained, saved = _together([
        (MODELLER, (folders[1], "retrain")),
        (ANNOTATOR, (folders[0], "ines", truth, json.dumps([[t[4], None]]))),
    ])
    assert saved == [["saved", str(t[4]), "1"]]
    head_id, head_name = int(trained[0][1]), trained[0][2]
    assert head_name == "head-1"  # numbered by the database
    assert not list((folders[3] / "models").glob("*.pt"))  # kofi has no file of it
    # 3. kofi proposes with that version from his own folder
    [[proposed]] = _together([(MODELLER, (folders[3], "propose"))])
    assert proposed[0] == "proposed" and proposed[2:] == [str(head_id), "head-1"]
    with open_project(folders[2]) as p:  # seen from a third folder
        store = p.store
        mv = store.model_version(head_id)
        assert [f.read_bytes() for f in (folders[3] / "models").glob("head-*.pt")] == [
            store.model_weights(head_id)]  # kofi's copy is the database's bytes
        assert {pr.model_version_id for pr in store.latest_proposals().values()} == {mv.id}
        # no save was lost: every save a process reported is in the store, by its author
        reported = [("ines", t[5], 1), ("ines", t[4], 1)] + [
            (names[i], int(line[1]), int(line[2]))
            for i, lines in enumerate(outs) for line in lines if line[0] == "saved"
        ]
        assert len(reported) == 2 + 4 + 1
        for who, tile_id, version in reported:
            got = {a.version: a.annotator for a in store.annotation_history(tile_id)}
            assert got.get(version) == who, (who, tile_id, version, got)
        assert [a.annotator for a in store.annotation_history(t[5])] == ["ines", winner]
