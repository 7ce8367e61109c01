"""The edit stage: what an edit starts from, the store backend the editor saves through,
and the state of each save as the workflow decides it."""

import subprocess
import sys

import numpy as np
import pytest

from labeler.errors import ConflictError, LabelerError
from labeler.workflow import begin_edit, end_edit, save_tile_mask
from tests.common import REPO
from tests.workflow.conftest import fake_proposals


def test_backend_conflict_carries_their_mask_and_keeps_draft(project):
    fake_proposals(project)
    tile = project.store.tiles()[0]
    start = begin_edit(project, tile.id, "ines")
    assert project.store.tile(tile.id).state == "held"
    theirs = np.ones(tile.shape, np.uint8)
    save_tile_mask(project, tile.id, "tomas", theirs, parent_version=None)
    mine = np.full(tile.shape, 2, np.uint8)
    with pytest.raises(ConflictError) as info:
        start.backend.save(mine, kind="full", actions=3, seconds=9.0)
    np.testing.assert_array_equal(info.value.theirs, theirs)
    start.backend.save_draft(mine, np.full(tile.shape, 255, np.uint8), actions=3, seconds=9.0)
    draft = start.backend.load_draft()
    np.testing.assert_array_equal(draft.mask, mine)
    assert (draft.actions, draft.seconds) == (3, 9.0)
    assert [a.annotator for a in project.store.annotation_history(tile.id)] == ["tomas"]


def test_backend_save_returns_the_state_the_workflow_decided(project):
    fake_proposals(project)
    tile = project.store.tiles()[0]
    start = begin_edit(project, tile.id, "ines")
    proposal = start.proposal
    # unchanged: accepted; then changed: amended; then a weak label: weak
    assert start.backend.save(proposal, kind="full", actions=0, seconds=1.0) == "accepted"
    changed = proposal.copy()
    changed[:4] = (changed[:4] + 1) % 4
    assert start.backend.save(changed, kind="full", actions=2, seconds=3.0) == "amended"
    weak = np.full(tile.shape, 255, np.uint8)
    weak[10, 10:20] = 1
    assert start.backend.save(weak, kind="scribble", actions=1, seconds=1.0) == "weak"
    history = project.store.annotation_history(tile.id)
    assert [(a.kind, a.state) for a in history] == [
        ("full", "accepted"), ("full", "amended"), ("scribble", "weak")]
    assert start.backend.saved == [a.version for a in history]


def test_draft_without_weak_label_comes_back_with_nothing_marked(project):
    fake_proposals(project)
    tile = project.store.tiles()[0]
    start = begin_edit(project, tile.id, "ines")
    assert start.backend.load_draft() is None
    project.store.save_draft(tile.id, "ines", np.ones(tile.shape, np.uint8), actions=1)
    draft = start.backend.load_draft()
    assert draft.weak_label.shape == tile.shape and (draft.weak_label == 255).all()
    start.backend.discard_draft()
    assert start.backend.load_draft() is None


def test_begin_edit_starts_from_own_mask_and_end_edit_gives_the_tile_back(project):
    fake_proposals(project)
    tile = project.store.tiles()[0]
    before = project.store.tile(tile.id).state
    start = begin_edit(project, tile.id, "ines")
    proposal = project.store.latest_proposal(tile.id)
    np.testing.assert_array_equal(start.mask, proposal.mask())
    assert start.uncertainty is None and start.compare is None  # no per-pixel map here
    assert start.backend.proposal_id == proposal.id
    end_edit(project, tile.id, "ines")
    assert project.store.tile(tile.id).state == before
    mine = np.full(tile.shape, 3, np.uint8)
    save_tile_mask(project, tile.id, "ines", mine, parent_version=None)
    again = begin_edit(project, tile.id, "ines")
    np.testing.assert_array_equal(again.mask, mine)
    assert again.backend.parent_version == 1
    end_edit(project, tile.id, "ines")
    end_edit(project, tile.id, "ines")  # not held any more: nothing to do
    assert project.store.tile(tile.id).held_by is None


def test_begin_edit_passes_the_entropy_channel_for_the_heat_map(project):
    from labeler.store.store import NewProposal

    tile = project.store.tiles()[0]
    mv = project.store.add_model_version(kind="head", name="with-maps")
    maps = np.zeros((3, 8, 8), np.float16)
    maps[0, 2, 3] = 0.5  # entropy channel
    maps[1] = 1.0
    project.store.add_proposals(
        mv.id, [NewProposal(tile.id, np.zeros(tile.shape, np.uint8), uncertainty=maps)])
    start = begin_edit(project, tile.id, "ines")
    np.testing.assert_array_equal(start.uncertainty, maps[0].astype(np.float64))
    end_edit(project, tile.id, "ines")


def test_settle_needs_contested(project):
    fake_proposals(project)
    tile = project.store.tiles()[0]
    with pytest.raises(LabelerError, match="not contested"):
        begin_edit(project, tile.id, "rev", settle=True)


def test_settle_starts_from_consensus_and_saves_settled(overlap_project):
    project = overlap_project
    tile = project.store.tiles()[0]
    a = np.zeros(tile.shape, np.uint8)
    a[:, :128] = 1
    b = np.zeros(tile.shape, np.uint8)
    b[:128, :] = 2
    save_tile_mask(project, tile.id, "ines", a, parent_version=None)
    save_tile_mask(project, tile.id, "tomas", b, parent_version=None)
    assert project.store.tile(tile.id).state == "contested"
    start = begin_edit(project, tile.id, "rev", settle=True)
    assert start.compare_label == "ines" and start.backend.proposal_id is None
    np.testing.assert_array_equal(start.compare, a)
    assert start.backend.save(start.mask, kind="full", actions=1, seconds=1.0) == "settled"
    assert project.store.tile(tile.id).state == "settled"
    assert project.store.latest_annotation(tile.id).state == "settled"


def test_the_workflow_imports_nothing_from_the_editor():
    code = ("import sys, labeler.workflow; "
            "print(sorted(m for m in sys.modules if m.startswith('labeler.editor')))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True, cwd=REPO)
    assert out.stdout.strip() == "[]"


def test_the_editor_renews_its_hold_and_release_tile_ends_it(project):
    from labeler.workflow import release_tile

    tile = project.store.tiles()[0]
    start = begin_edit(project, tile.id, "ines")
    assert start.backend.heartbeat() is True  # held by ines: renewed
    assert release_tile(project, tile.id, by="lead") == ("ines", "unseen")
    assert start.backend.heartbeat() is False  # released: the editor is told
    assert release_tile(project, tile.id, by="lead") == (None, "unseen")
    assert [e.annotator for e in project.store.events(kind="release")] == ["lead", "lead"]
