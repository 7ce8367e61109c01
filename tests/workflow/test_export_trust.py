"""What an export promises an engineer, on the hand-made 300 x 500 project of conftest.py.

Every expected value here is worked out by hand from the masks saved in the test (the
tile windows come from the store); no value is taken from the code under test.
"""

from __future__ import annotations

import json

import numpy as np
from PIL import Image

from labeler.cli import main
from labeler.project import init_project, open_project
from labeler.workflow import accept_tile, add_images, export_project, import_masks, save_tile_mask
from tests.workflow.conftest import fake_proposals


def _save_two(project):
    """Tile 0 saved as bare soil, tile 1 saved with a crop square of its own; rest proposed."""
    fake_proposals(project)
    tiles = project.store.tiles()
    t0, t1 = tiles[0], tiles[1]
    save_tile_mask(project, t0.id, "ines", np.zeros(t0.shape, np.uint8), parent_version=None)
    m1 = np.zeros(t1.shape, np.uint8)
    m1[100:140, 200:240] = 1  # inside tile 1, right of tile 0 (its columns reach 256 at most)
    assert t1.window.col + 200 >= t0.window.col + t0.window.width
    save_tile_mask(project, t1.id, "ines", m1, parent_version=None)
    return tiles


def _lines(path):
    return [json.loads(line) for line in path.read_text(encoding="utf-8").splitlines()]


def test_without_proposals_nothing_but_saved_masks(project, tmp_path):
    tiles = _save_two(project)
    out = tmp_path / "o"
    result = export_project(project, out)
    assert result.tiles_exported == 2 and result.tiles_from_proposals == 0
    assert not (out / "masks" / "east-block_source.png").exists()  # no proposal, no layer
    mask = np.asarray(Image.open(out / "masks" / "east-block.png"))
    covered = np.zeros(mask.shape, bool)
    for t in tiles[:2]:
        covered[t.window.slices] = True
    assert (mask[~covered] == 255).all()  # no proposal pixel anywhere
    rows = _lines(out / "manifest.jsonl")
    assert [r["tile"] for r in rows] == [str(tiles[0].id), str(tiles[1].id)]
    for r in rows:
        assert r["classes"] == {"soil": 0, "crop": 1, "weed": 2, "symptom": 3}
        assert r["source"] == "annotation" and r["proposal_share"] == 0.0
        assert r["source_mask"] is None and r["state"] == "amended"
        row, col, h, w = r["window"]
        assert r["unlabelled_share"] == 0.0  # a saved tile is labelled throughout
        assert (mask[row : row + h, col : col + w] != 255).all()
    assert rows[0]["present"] == ["soil"] and rows[1]["present"] == ["soil", "crop"]


def test_the_looked_at_layer_holds_every_saved_tile(project, tmp_path):
    tiles = _save_two(project)
    out = tmp_path / "o"
    result = export_project(project, out, formats="geojson")
    assert (result.features, result.footprints) == (1, 2)  # one crop square, two tiles
    coll = json.loads((out / "geojson" / "east-block.geojson").read_text())
    looked = [f for f in coll["features"] if f["properties"]["layer"] == "looked_at"]
    classes = [f for f in coll["features"] if f["properties"]["layer"] == "classes"]
    # the soil-only tile 0 has an outline although it has no class polygon
    assert [f["properties"]["tile"] for f in looked] == [str(tiles[0].id), str(tiles[1].id)]
    assert {f["properties"]["state"] for f in looked} == {"amended"}
    assert [f["properties"]["class"] for f in classes] == ["crop"]
    assert looked[0]["geometry"]["type"] == "Polygon"
    ring = looked[0]["geometry"]["coordinates"][0]
    assert len(ring) == 5 and ring[0] == ring[-1]  # a rectangle, closed (RFC 7946 3.1.6)


def test_proposals_only_when_asked_and_marked_per_pixel(project, tmp_path):
    tiles = _save_two(project)
    out = tmp_path / "o"
    result = export_project(project, out, proposals=True, formats="masks")
    assert result.tiles_from_proposals == 4
    source = np.asarray(Image.open(out / "masks" / "east-block_source.png"))
    # by hand: pixels of the two saved tiles that the stitching takes from them are 1,
    # every other pixel comes from a proposal (each tile has one) and is 2
    assert set(np.unique(source)) == {1, 2}
    assert (source[: tiles[0].window.height // 2, : tiles[0].window.width // 2] == 1).all()
    assert (source[-10:, -10:] == 2).all()  # bottom-right corner: only proposed tiles
    rows = _lines(out / "manifest.jsonl")
    assert len(rows) == 6
    by_tile = {r["tile"]: r for r in rows}
    for t in tiles[2:]:
        r = by_tile[str(t.id)]
        assert r["source"] == "proposal" and r["state"] == "proposed"
        assert r["source_mask"] == "masks/east-block_source.png"
        row, col, h, w = r["window"]
        share = float(np.mean(source[row : row + h, col : col + w] == 2))
        assert r["proposal_share"] == round(share, 6) and share > 0


def test_a_round_trip_gives_back_full_tiles(project, tmp_path, monkeypatch):
    tiles = _save_two(project)
    out = tmp_path / "o"
    export_project(project, out, formats="geojson")
    # the import goes into a second, unrelated project: its own SQLite file, whatever
    # database the first one lives in (a database holds one project)
    monkeypatch.delenv("LABELER_STORE_URL", raising=False)
    fresh = init_project(tmp_path / "again")
    fresh.close()
    fresh = open_project(tmp_path / "again")
    try:
        add_images(fresh, [tmp_path / "east-block.tif"])
        back = import_masks(fresh, [out / "geojson" / "east-block.geojson"], annotator="survey")
        again = fresh.store.tiles()
        assert [a.window for a in again] == [t.window for t in tiles]
        assert back.saved_full == [again[0].id, again[1].id]  # default fill: unlabelled
        m0 = fresh.store.latest_annotation(again[0].id).mask()
        assert (m0 == 0).all()  # the soil-only tile comes back as soil, not as unlabelled
        m1 = fresh.store.latest_annotation(again[1].id).mask()
        expected = np.zeros(tiles[1].shape, np.uint8)
        expected[100:140, 200:240] = 1
        np.testing.assert_array_equal(m1, expected)  # an axis-aligned square is exact
    finally:
        fresh.close()


def test_an_empty_export_says_what_to_try(project, tmp_path, capsys):
    fake_proposals(project)
    code = main(["export", str(project.root), "--states", "proposed", "--out",
                 str(tmp_path / "o")])
    assert code == 0
    text = capsys.readouterr().out
    assert "exported 0 images" in text
    assert "hint: tiles in state proposed have no saved mask" in text and "--proposals" in text
    assert "the default --states" in text
    accept_tile(project, project.store.tiles()[0].id, "ines")
    main(["export", str(project.root), "--out", str(tmp_path / "p")])
    assert "hint:" not in capsys.readouterr().out
