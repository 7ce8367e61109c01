"""Images and tiles: one transaction per image, lookups, overlap tiles."""

import hashlib

import pytest

from labeler.errors import LabelerError, NotFoundError
from labeler.imagery.tiling import Window, tile_grid
from labeler.store import NewImage
from labeler.store.images import overlap_draw
from tests.store.conftest import make_store


def _image(name, sha_char, **kw):
    return NewImage(
        name=name,
        path=f"images/{name}.tif",
        sha256=sha_char * 64,
        width=10,
        height=10,
        bands=3,
        dtype="uint8",
        **kw,
    )


def test_duplicate_image_refused_and_nothing_written(store):
    before = len(store.tiles())
    with pytest.raises(LabelerError, match="other: already in the project as 'plot-a'"):
        store.add_image(_image("other", "a"), tile_grid(10, 10))  # same sha256
    with pytest.raises(LabelerError, match="plot-a: already in the project as 'plot-a'"):
        store.add_image(_image("plot-a", "b"), tile_grid(10, 10))  # same name
    assert len(store.tiles()) == before and len(store.images()) == 1


def test_image_without_windows_refused(store):
    with pytest.raises(LabelerError, match="plot-b: expected at least one tile window, got none"):
        store.add_image(_image("plot-b", "b"), [])
    assert len(store.images()) == 1


def test_image_round_trip_and_lookups(store):
    geo = (0.05, 0.0, 512000.0, 0.0, -0.05, 5800000.0)
    rec = store.add_image(
        _image("plot-b", "b", crs="EPSG:32630", transform=geo, georef_source="geotiff"),
        [Window(0, 0, 10, 10)],
    )
    assert (rec.name, rec.shape, rec.crs, rec.transform) == ("plot-b", (10, 10), "EPSG:32630", geo)
    assert rec.added_at.utcoffset().total_seconds() == 0
    assert store.image(rec.id) == rec
    assert store.image_by_name("plot-b") == rec
    assert store.image_by_sha("b" * 64) == rec
    assert store.image_by_sha("c" * 64) is None
    assert [im.name for im in store.images()] == ["plot-a", "plot-b"]
    (tile,) = store.tiles(image_id=rec.id)
    assert (tile.window, tile.state, tile.held_by, tile.overlap) == (
        Window(0, 0, 10, 10),
        "unseen",
        None,
        False,
    )
    assert store.tile(tile.id) == tile


def test_missing_image_and_tile_named(store):
    with pytest.raises(NotFoundError, match="^image 99 is not in this project$"):
        store.image(99)
    with pytest.raises(NotFoundError, match="^image 'plot-z' is not in this project$"):
        store.image_by_name("plot-z")
    with pytest.raises(NotFoundError, match="^tile 999 is not in this project$"):
        store.tile(999)


def test_tile_filters(store):
    tiles = store.tiles()
    store.set_state(tiles[1].id, "parked")
    assert [t.id for t in store.tiles(states=["parked"])] == [tiles[1].id]
    assert [t.id for t in store.tiles(states=["unseen", "parked"])] == [t.id for t in tiles]
    assert store.tiles(image_id=tiles[0].image_id + 1) == []
    assert store.tiles(overlap=True) == [] and len(store.tiles(overlap=False)) == 6


def test_overlap_draw_is_sha256_of_image_window_and_seed():
    w = Window(44, 224, 256, 256)
    # independent recomputation with hashlib (Python standard library)
    digest = hashlib.sha256(b"abc:44:224:3").digest()
    assert overlap_draw("abc", w, seed=3) == int.from_bytes(digest[:8], "big") / 2**64
    assert overlap_draw("abc", w, seed=3) != overlap_draw("abc", w, seed=4)


@pytest.mark.parametrize(("share", "expected"), [(0.0, 0), (1.0, 6)])
def test_overlap_share_extremes(tmp_path, share, expected):
    store = make_store(tmp_path / "o.db", overlap_share=share)
    assert sum(t.overlap for t in store.tiles()) == expected
    store.close()


def test_overlap_share_follows_the_draw(tmp_path):
    store = make_store(tmp_path / "o.db", overlap_share=0.5)
    for tile in store.tiles():
        assert tile.overlap == (overlap_draw("a" * 64, tile.window, seed=0) < 0.5)
    store.close()
