"""Accept, park, save with state, contested overlap tiles, queue order."""

import numpy as np
import pytest

from labeler.agreement import cohen_kappa
from labeler.errors import ConflictError, LabelerError, NotFoundError
from labeler.metrics import confusion_matrix
from labeler.workflow import accept_tile, next_tile, park_tile, queue_rows, save_tile_mask
from labeler.workflow.annotating import overlap_agreement, save_state, weak_label_tile_state
from tests.workflow.conftest import fake_proposals


def test_accept_needs_a_proposal(project):
    tid = project.store.tiles()[0].id
    with pytest.raises(LabelerError, match="no proposal yet; run 'labeler propose'"):
        accept_tile(project, tid, "ines")


def test_accept_keeps_proposal_as_accepted(project):
    fake_proposals(project)
    tid = project.store.tiles()[0].id
    rec = accept_tile(project, tid, "ines")
    assert rec.state == "accepted" and project.store.tile(tid).state == "accepted"
    np.testing.assert_array_equal(rec.mask(), project.store.latest_proposal(tid).mask())
    # a second accept of the same proposal saves nothing (tests/workflow/test_parking.py)
    with pytest.raises(LabelerError, match="already kept this proposal"):
        accept_tile(project, tid, "ines")


def test_save_state_accepted_or_amended(project):
    fake_proposals(project)
    store = project.store
    t0, t1 = store.tiles()[:2]
    p0 = store.latest_proposal(t0.id)
    same = save_tile_mask(project, t0.id, "ines", p0.mask(), parent_version=None, proposal_id=p0.id)
    assert same.state == "accepted"
    p1 = store.latest_proposal(t1.id)
    changed = p1.mask().copy()
    changed[0, 0] = (changed[0, 0] + 1) % 4
    rec = save_tile_mask(project, t1.id, "ines", changed, parent_version=None, proposal_id=p1.id)
    assert rec.state == "amended"
    with pytest.raises(ConflictError):
        save_tile_mask(project, t1.id, "tomas", changed, parent_version=None, proposal_id=p1.id)


_P = np.array([[0, 1], [2, 3]], np.uint8)
_Q = np.array([[0, 1], [2, 2]], np.uint8)


# the rule of the tile life cycle (docs/architecture.md, "Tile life cycle": accepted =
# proposal kept unchanged, amended = corrected, settled = a reviewer decided) plus the
# state of weak-label saves, written out case by case: (kind, settling, mask, proposal)
# -> state
@pytest.mark.parametrize(
    ("kind", "settling", "mask", "proposal", "state"),
    [
        ("full", False, _P, _P, "accepted"),
        ("full", False, _Q, _P, "amended"),
        ("full", False, _P, None, "amended"),  # no proposal named: nothing was kept
        ("full", True, _P, _P, "settled"),
        ("full", True, _Q, _P, "settled"),
        ("scribble", False, _P, _P, "weak"),
        ("scribble", True, _P, None, "weak"),
    ],
)
def test_save_state_table(kind, settling, mask, proposal, state):
    assert save_state(kind=kind, settling=settling, mask=mask, proposal=proposal) == state


def test_save_state_refuses_an_unknown_kind():
    with pytest.raises(ValueError, match="kind: expected 'full' or 'scribble', got 'outline'"):
        save_state(kind="outline", settling=False, mask=_P, proposal=None)


def test_weak_label_save_records_weak_and_leaves_the_tile_state(project):
    fake_proposals(project)
    t = project.store.tiles()[0]
    before = project.store.tile(t.id).state
    weak = np.full(t.shape, 255, np.uint8)
    weak[5, 5:9] = 2
    rec = save_tile_mask(project, t.id, "ines", weak, parent_version=None, kind="scribble")
    assert (rec.kind, rec.state) == ("scribble", "weak")
    assert project.store.tile(t.id).state == before


@pytest.mark.parametrize(
    ("tile_state", "held_by", "has_proposal", "expected"),
    [
        # a tile the saver held goes back where a release takes it: "held" means an
        # annotator has it open (tile life cycle, docs/architecture.md)
        ("held", "ines", True, "proposed"),
        ("held", "ines", False, "unseen"),
        ("held", None, True, "proposed"),  # held by nobody: stuck, so it is freed too
        ("held", "tomas", True, None),  # someone else's hold is theirs
        ("proposed", None, True, None),
        ("unseen", None, False, None),
        ("parked", None, True, None),
        ("accepted", None, True, None),  # a saved tile stays saved
        ("amended", "ines", True, None),  # a saved tile open in the editor keeps its state
        ("contested", None, True, None),
    ],
)
def test_weak_label_tile_state(tile_state, held_by, has_proposal, expected):
    got = weak_label_tile_state(
        tile_state, held_by=held_by, annotator="ines", has_proposal=has_proposal
    )
    assert got == expected


def test_weak_label_save_on_a_held_tile_gives_the_tile_back(project):
    # the editor holds a tile, the annotator saves a weak label alone and the window
    # closes: the tile must not stay held with no holder (nobody could release it)
    fake_proposals(project)
    store = project.store
    t = store.tiles()[0]
    store.hold(t.id, "ines")
    assert (store.tile(t.id).state, store.tile(t.id).held_by) == ("held", "ines")
    weak = np.full(t.shape, 255, np.uint8)
    weak[5, 5:9] = 2
    rec = save_tile_mask(project, t.id, "ines", weak, parent_version=None, kind="scribble")
    assert rec.state == "weak"
    after = store.tile(t.id)
    assert (after.state, after.held_by) == ("proposed", None)
    assert t.id in store.available_for("tomas")  # handed out again
    assert [e.detail["to"] for e in store.events(kind="save")] == ["proposed"]


def test_weak_label_save_on_a_held_tile_without_proposal_leaves_it_unseen(project):
    store = project.store
    t = store.tiles()[0]
    store.hold(t.id, "ines")
    weak = np.full(t.shape, 255, np.uint8)
    weak[0, 0] = 1
    save_tile_mask(project, t.id, "ines", weak, parent_version=None, kind="scribble")
    assert (store.tile(t.id).state, store.tile(t.id).held_by) == ("unseen", None)


def test_weak_label_save_keeps_another_annotators_hold(project):
    fake_proposals(project)
    store = project.store
    t = store.tiles()[0]
    store.hold(t.id, "tomas")
    weak = np.full(t.shape, 255, np.uint8)
    weak[0, 0] = 1
    save_tile_mask(project, t.id, "ines", weak, parent_version=None, kind="scribble")
    assert (store.tile(t.id).state, store.tile(t.id).held_by) == ("held", "tomas")


def test_park(project):
    tid = project.store.tiles()[0].id
    park_tile(project, tid, "ines")
    assert project.store.tile(tid).state == "parked"


def test_disagreeing_overlap_tile_becomes_contested(overlap_project):
    project = overlap_project
    fake_proposals(project)
    t = project.store.tiles()[0]
    a = np.zeros(t.shape, np.uint8)
    a[:, :128] = 1
    b = np.zeros(t.shape, np.uint8)
    b[:128, :] = 2  # a very different opinion
    save_tile_mask(project, t.id, "ines", a, parent_version=None)
    assert project.store.tile(t.id).state == "amended"  # one annotator: not comparable yet
    save_tile_mask(project, t.id, "tomas", b, parent_version=None)
    # Cohen's kappa of the two masks, computed independently of the workflow
    kappa = cohen_kappa(confusion_matrix(a, b, n_classes=4))
    assert overlap_agreement(project, t.id) == pytest.approx(kappa, abs=1e-12)
    assert kappa < 0.6
    assert project.store.tile(t.id).state == "contested"
    with pytest.raises(LabelerError, match="contested; a reviewer settles it"):
        accept_tile(project, t.id, "kai")


def test_agreeing_overlap_tile_stays(overlap_project):
    project = overlap_project
    t = project.store.tiles()[0]
    a = np.zeros(t.shape, np.uint8)
    a[:, :128] = 1
    b = a.copy()
    b[0, :3] = 0
    save_tile_mask(project, t.id, "ines", a, parent_version=None)
    save_tile_mask(project, t.id, "tomas", b, parent_version=None)
    assert project.store.tile(t.id).state == "amended"


def test_queue_order_and_next(project):
    fake_proposals(project)
    from labeler.workflow import pick_tiles

    result = pick_tiles(project, strategy="entropy", k=2)
    rows = queue_rows(project)
    assert [r.tile_id for r in rows] == [i.tile_id for i in result.items]
    ent = {t: project.store.latest_proposal(t).mean_entropy for t in [r.tile_id for r in rows]}
    assert [ent[r.tile_id] for r in rows] == sorted(ent.values(), reverse=True)
    first = next_tile(project, "ines")
    assert first == rows[0].tile_id
    accept_tile(project, first, "ines")
    assert next_tile(project, "ines") == rows[1].tile_id


def test_next_when_nothing_left(project):
    fake_proposals(project)
    for t in project.store.tiles():
        accept_tile(project, t.id, "ines")
    with pytest.raises(NotFoundError, match="no tile is left"):
        next_tile(project, "tomas")
