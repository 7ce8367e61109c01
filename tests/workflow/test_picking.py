"""labeler pick through the workflow: the queue order written to the store, fallbacks."""

import pytest

from labeler.errors import LabelerError
from labeler.picker import REASONS
from labeler.workflow import accept_tile, pick_tiles
from tests.workflow.conftest import fake_proposals


def test_needs_proposals(project):
    with pytest.raises(LabelerError, match="run 'labeler propose' first"):
        pick_tiles(project)


def test_mixed_pick_written_with_reasons(project):
    fake_proposals(project)
    result = pick_tiles(project, k=3)
    assert result.strategy == "mixed" and len(result.items) == 6
    stored = project.store.latest_pick()
    assert [i.tile_id for i in stored] == [i.tile_id for i in result.items]
    assert sum(i.in_batch for i in stored) == 3
    assert all(i.reason in REASONS for i in stored)


def test_labelled_tiles_leave_the_pool(project):
    fake_proposals(project)
    tid = project.store.tiles()[0].id
    accept_tile(project, tid, "ines")
    result = pick_tiles(project, strategy="margin", k=2)
    assert tid not in [i.tile_id for i in result.items]


def test_cold_start_falls_back_to_diversity(project):
    fake_proposals(project, with_uncertainty=False)
    result = pick_tiles(project, strategy="entropy", k=2)
    assert (result.requested, result.strategy) == ("entropy", "coreset")
    assert "cold start" in result.note


def test_cli_pick_prints_the_batch_with_reasons(project, capsys):
    from labeler.cli import main

    fake_proposals(project)
    assert main(["pick", str(project.root), "--strategy", "margin", "--k", "2"]) == 0
    out = capsys.readouterr().out
    assert "picked from 6 tiles with strategy margin; the next batch of 2:" in out
    assert out.count("uncertain") == 2  # margin orders by uncertainty: each batch tile says so


def test_cli_pick_says_when_ranks_follow_the_order_of_picking(project, capsys, monkeypatch):
    from labeler.cli import main
    from labeler.workflow import picking

    def scripted(project, **kwargs):  # a spread batch: the second pick scores higher
        batch = [
            picking.PickedTile(
                rank=0,
                tile_id=7,
                image="a.tif",
                row=0,
                col=0,
                score=17.065,
                reason="unlike labelled tiles",
            ),
            picking.PickedTile(
                rank=1,
                tile_id=9,
                image="a.tif",
                row=0,
                col=224,
                score=25.478,
                reason="unlike labelled tiles",
            ),
        ]
        return picking.PickResult("coreset", "coreset", 2, [], 0, batch=batch)

    monkeypatch.setattr(picking, "pick_tiles", scripted)
    monkeypatch.setattr("labeler.workflow.pick_tiles", scripted, raising=False)
    assert main(["pick", str(project.root), "--k", "2"]) == 0
    out = capsys.readouterr().out
    assert "ranked by" in out and "pick 1 \u00b7 17.0650" in out and "pick 2 \u00b7 25.4780" in out
    assert "the ranks follow the order of picking" in out


def test_cli_pick_shows_plain_scores_when_they_fall_with_rank(project, capsys):
    from labeler.cli import main

    fake_proposals(project)
    assert main(["pick", str(project.root), "--strategy", "margin", "--k", "2"]) == 0
    out = capsys.readouterr().out
    assert "ranked by" not in out and "order of picking" not in out and " score " in out


def test_cli_pick_rejects_bad_k(project):
    from labeler.cli import main

    with pytest.raises(SystemExit) as info:
        main(["pick", str(project.root), "--k", "0"])
    assert info.value.code == 2
