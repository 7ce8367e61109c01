"""Who may settle a contested tile (labeler/workflow/reviewing.py)."""

from __future__ import annotations

import numpy as np
import pytest

from labeler.errors import LabelerError
from labeler.workflow import save_tile_mask
from labeler.workflow.editing import begin_edit, end_edit
from labeler.workflow.reviewing import project_reviewers
from tests.workflow.conftest import _small_project


def _contest(project):
    tile = project.store.tiles()[0]
    a = np.zeros(tile.shape, np.uint8)
    a[:, :128] = 1
    b = np.zeros(tile.shape, np.uint8)
    b[:128, :] = 2
    save_tile_mask(project, tile.id, "ines", a, parent_version=None)
    save_tile_mask(project, tile.id, "tomas", b, parent_version=None)
    assert project.store.tile(tile.id).state == "contested"
    return tile


def test_an_annotator_who_disagreed_cannot_settle(overlap_project):
    tile = _contest(overlap_project)
    with pytest.raises(LabelerError, match=r"'ines' is one of its annotators \(ines, tomas\)"):
        begin_edit(overlap_project, tile.id, "ines", settle=True)
    with pytest.raises(LabelerError, match="cannot settle their own disagreement"):
        save_tile_mask(overlap_project, tile.id, "tomas", np.zeros(tile.shape, np.uint8),
                       parent_version=None, settling=True)
    assert overlap_project.store.tile(tile.id).state == "contested"  # nothing saved
    start = begin_edit(overlap_project, tile.id, "rev", settle=True)  # anyone else may
    end_edit(overlap_project, tile.id, "rev")
    assert start.mask.shape == tile.shape


def test_named_reviewers_only(tmp_path):
    project = _small_project(
        tmp_path,
        '[agreement]\noverlap_share = 1.0\nthreshold = 0.6\nreviewers = "ana, rev"\n',
    )
    try:
        assert project_reviewers(project) == ("ana", "rev")
        tile = _contest(project)
        with pytest.raises(LabelerError, match=r"'olga' is not a reviewer of this project "
                                               r"\(reviewers: ana, rev\)"):
            begin_edit(project, tile.id, "olga", settle=True)
        start = begin_edit(project, tile.id, "ana", settle=True)
        assert start.backend.save(start.mask, kind="full", actions=1, seconds=1.0) == "settled"
        assert project.store.tile(tile.id).state == "settled"
    finally:
        project.close()
