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


def test_cli_pick_rejects_bad_k(project):
    from labeler.cli import main

    with pytest.raises(SystemExit) as info:
        main(["pick", str(project.root), "--k", "0"])
    assert info.value.code == 2
