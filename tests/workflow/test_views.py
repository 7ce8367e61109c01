"""Read-only views for the edges (labeler/workflow/views.py) and the status counts."""

import numpy as np
import pytest

from labeler.errors import ConflictError, NotFoundError
from labeler.workflow import (
    annotators,
    model_versions,
    park_tile,
    pick_tiles,
    project_status,
    save_basis,
    save_tile_mask,
    tile_places,
    tile_view,
)
from tests.workflow.conftest import fake_proposals

#: The pixels the fixture wrote into east-block.tif (tests/workflow/conftest.py).
PIXELS = np.random.default_rng(2).integers(0, 256, (300, 500, 3), dtype=np.uint8)


def test_a_tile_without_proposal_shows_its_pixels_only(project):
    place = tile_places(project)
    tid = min(place)
    view = tile_view(project, tid, annotator="ines")
    assert (view.shows, view.mask, view.image) == ("nothing", None, "east-block")
    np.testing.assert_array_equal(view.rgb, PIXELS[place[tid].window.slices])
    assert (view.row, view.col) == (place[tid].window.row, place[tid].window.col)


def test_the_proposal_is_shown_with_its_model(project):
    mv = fake_proposals(project)
    tid = min(tile_places(project))
    view = tile_view(project, tid, annotator="ines")
    assert (view.shows, view.model) == ("proposal", mv.name)
    np.testing.assert_array_equal(view.mask, project.store.latest_proposal(tid).mask())


def test_on_an_overlap_tile_nobody_sees_another_annotators_mask(overlap_project):
    project = overlap_project
    fake_proposals(project)
    tid = min(tile_places(project))
    assert tile_places(project)[tid].overlap
    mask = np.full(tile_view(project, tid, annotator="ines").rgb.shape[:2], 2, np.uint8)
    basis = save_basis(project, tid, "ines")
    save_tile_mask(
        project, tid, "ines", mask,
        parent_version=basis.parent_version, proposal_id=basis.proposal_id,
    )
    own = tile_view(project, tid, annotator="ines")
    assert (own.shows, own.saved_by, own.saved_version) == ("saved", "ines", 1)
    np.testing.assert_array_equal(own.mask, mask)
    other = tile_view(project, tid, annotator="tomas")
    assert other.shows == "proposal"
    assert not np.array_equal(other.mask, mask)


def test_save_basis_names_what_a_save_replaces(project):
    fake_proposals(project)
    tid = min(tile_places(project))
    first = save_basis(project, tid, "ines")
    assert first.parent_version is None
    assert first.proposal_id == project.store.latest_proposal(tid).id
    shape = tile_view(project, tid, annotator="ines").rgb.shape[:2]
    rec = save_tile_mask(
        project, tid, "ines", np.ones(shape, np.uint8),
        parent_version=first.parent_version, proposal_id=first.proposal_id,
    )
    assert save_basis(project, tid, "ines").parent_version == rec.version
    with pytest.raises(ConflictError):  # the stale basis is refused by the store
        save_tile_mask(project, tid, "ines", np.ones(shape, np.uint8), parent_version=None)
    with pytest.raises(NotFoundError, match="tile 999 is not in this project"):
        save_basis(project, 999, "ines")


def test_places_lists_and_picked_batch_agree_with_the_store(project):
    assert annotators(project) == [] and model_versions(project) == []
    mv = fake_proposals(project)
    places = tile_places(project)
    tiles = project.store.tiles()
    assert list(places) == [t.id for t in tiles]
    assert [p.window for p in places.values()] == [t.window for t in tiles]
    assert [m.name for m in model_versions(project)] == [mv.name]
    result = pick_tiles(project, k=3)
    assert [b.tile_id for b in result.batch] == [i.tile_id for i in result.items[:3]]
    for b in result.batch:
        assert (b.image, b.row, b.col) == (
            places[b.tile_id].image, places[b.tile_id].window.row, places[b.tile_id].window.col
        )
    park_tile(project, result.batch[0].tile_id, "tomas")
    assert annotators(project) == ["tomas"]


def test_status_counts_every_state(project):
    fake_proposals(project)
    tid = min(tile_places(project))
    park_tile(project, tid, "tomas")
    status = project_status(project)
    assert (status.images, status.tiles) == (1, len(tile_places(project)))
    assert status.by_state["parked"] == 1
    assert sum(status.by_state.values()) == status.tiles
    assert status.by_image == [("east-block", status.tiles, status.by_state, True)]
    assert (status.model_versions, status.latest_model, status.latest_miou) == (1, "fake", None)
