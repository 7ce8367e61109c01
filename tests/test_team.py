"""A project a team shares on a PostgreSQL server: init claims the database, join makes
a working folder on another machine, the team's settings live in the database, holds are
shown and released, and every annotator's saves land (on the throwaway test server)."""

import numpy as np
import pytest

from labeler.cli import main
from labeler.errors import ConflictError, LabelerError
from labeler.project import init_project, join_project, open_project


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
