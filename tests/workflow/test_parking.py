"""Parking with a reason, bringing a tile back, and an accept that never saves twice."""

from __future__ import annotations

import pytest

from labeler.errors import LabelerError
from labeler.workflow import accept_tile, park_tile, unpark_tile
from tests.workflow.conftest import fake_proposals


def _reasons(project, tile_id):
    return [e.detail["reason"] for e in project.store.events() if e.tile_id == tile_id
            and e.detail and "reason" in e.detail]


def test_park_with_a_reason_and_back(project):
    fake_proposals(project)
    t = project.store.tiles()
    park_tile(project, t[0].id, "ana", reason="  shadow of the hedge ")
    park_tile(project, t[1].id, "ana")
    assert [project.store.tile(x.id).state for x in t[:2]] == ["parked", "parked"]
    assert _reasons(project, t[0].id)[-1] == "parked by annotator: shadow of the hedge"
    assert _reasons(project, t[1].id)[-1] == "parked by annotator"
    assert unpark_tile(project, t[0].id, "bo", reason="light is fine") == "proposed"
    assert _reasons(project, t[0].id)[-1] == "back from parked: light is fine"
    with pytest.raises(LabelerError, match=rf"tile {t[0].id} is proposed, not parked"):
        unpark_tile(project, t[0].id, "bo")


def test_a_tile_without_proposal_comes_back_unseen(project):
    t = project.store.tiles()[2]
    park_tile(project, t.id, "ana")
    assert unpark_tile(project, t.id, "ana") == "unseen"


def test_accepting_the_same_proposal_twice_saves_once(project):
    fake_proposals(project)
    t = project.store.tiles()[0]
    first = accept_tile(project, t.id, "ana")
    with pytest.raises(LabelerError, match=rf"tile {t.id}: ana already kept this proposal "
                                           rf"\(version {first.version}\); nothing saved again"):
        accept_tile(project, t.id, "ana")
    assert len(project.store.annotations(kind=None)) == 1
    fake_proposals(project, seed=1)  # a newer proposal may be accepted again
    assert accept_tile(project, t.id, "ana").version == first.version + 1
