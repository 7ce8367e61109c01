"""Export and import through the store, on two committed demo plots (invented scenario)."""

import json

import numpy as np
import pytest
from PIL import Image
from scipy import ndimage
from shapely.geometry import shape

from labeler.cli import main
from labeler.demo.build import demo_images, truth_path
from labeler.errors import InputError, LabelerError
from labeler.imagery.write import write_png
from labeler.project import init_project
from labeler.store import NewProposal
from labeler.workflow import add_images, export_project, import_masks


@pytest.fixture
def demo2(tmp_path):
    plots = demo_images()[:2]
    p = init_project(tmp_path / "proj")
    add_images(p, plots)
    yield p, plots
    p.close()


def _iou(a, b, c):
    inter = np.sum((a == c) & (b == c))
    union = np.sum((a == c) | (b == c))
    return 1.0 if union == 0 else inter / union


def test_import_truth_export_and_round_trip(demo2, tmp_path):
    project, plots = demo2
    name = plots[0].stem
    truth = np.asarray(Image.open(truth_path(plots[0])))
    res = import_masks(project, [truth_path(plots[0])], annotator="survey", image=name)
    assert res.full_tiles == 20 and res.weak_tiles == 0
    out = tmp_path / "out"
    result = export_project(project, out)
    assert result.images == 1 and result.skipped == [plots[1].stem]
    exported = np.asarray(Image.open(out / "masks" / f"{name}.png"))
    np.testing.assert_array_equal(exported, truth)  # stitched tiles give back the image mask
    coll = json.loads((out / "geojson" / f"{name}.geojson").read_text())
    # RFC 7946: no "crs" member (section 4), bbox = [west, south, east, north] (section 5)
    assert "crs" not in coll and coll["type"] == "FeatureCollection"
    west, south, east, north = coll["bbox"]
    assert west < east and south < north and -180 <= west <= 180 and -90 <= south <= 90
    for f in coll["features"][:200]:
        if f["properties"]["layer"] == "looked_at":
            assert f["properties"]["state"] == "imported"
            continue
        geom = shape(f["geometry"])
        polys = [geom] if geom.geom_type == "Polygon" else list(geom.geoms)
        for poly in polys:
            assert poly.exterior.is_ccw  # exterior rings counterclockwise (section 3.1.6)
            assert all(not ring.is_ccw for ring in poly.interiors)  # holes clockwise
            assert len(poly.exterior.coords) >= 4
        assert (
            f["properties"]["annotators"] == ["survey"]
            and f["properties"]["source"] == "annotation"
        )
    manifest = [json.loads(line) for line in (out / "manifest.jsonl").read_text().splitlines()]
    assert len(manifest) == 20  # one row per tile (spatial blocks may trim val windows)
    assert {tuple(r["image_size"]) for r in manifest} == {(768, 1024)}
    assert {r["unlabelled_share"] for r in manifest} == {0.0}  # a full survey
    # import the exported GeoJSON back: the polygons cover every non-soil pixel (fill soil)
    exported_geojson = out / "geojson" / f"{name}.geojson"
    back = import_masks(project, [exported_geojson], annotator="roundtrip", fill="soil")
    # survey's masks are reviewed work: only the overlap tiles (own lineages) take the import
    image_id = {im.name: im.id for im in project.store.images()}[name]
    overlap = {t.id for t in project.store.tiles(image_id=image_id, overlap=True)}
    assert set(back.saved_full) == overlap and len(overlap) < 20
    assert len(back.skipped["others"]) == 20 - len(overlap)
    back = import_masks(
        project, [exported_geojson], annotator="roundtrip", fill="soil", replace=True
    )
    assert back.full_tiles == back.weak_tiles + len(back.replaced) == 20 - len(overlap)
    assert set(back.unchanged) == overlap  # already saved by the first import
    from labeler.workflow import compared_images

    lazy = {c.image: c for c in compared_images(project)}[name].masks
    masks = {who: m[:] for who, m in lazy.items()}  # stitched when read
    # the export drops regions below min_area_px (8-connected, scipy.ndimage.label as the
    # reference); with those set to soil the round trip is pixel-exact
    expected = truth.copy()
    min_area = project.settings.export.min_area_px
    for c in (1, 2, 3):
        labels, n = ndimage.label(truth == c, structure=np.ones((3, 3)))
        sizes = np.bincount(labels.ravel())
        small = (sizes < min_area) & (np.arange(n + 1) > 0)
        expected[small[labels]] = 0
    np.testing.assert_array_equal(masks["roundtrip"], expected)
    for c in (1, 2):
        assert _iou(masks["roundtrip"], truth, c) >= 0.99, c


def test_proposals_fill_gaps(demo2, tmp_path, capsys):
    project, plots = demo2
    store = project.store
    mv = store.add_model_version(kind="cold_start", name="test-fill")
    store.add_proposals(
        mv.id, [NewProposal(t.id, np.ones(t.shape, np.uint8)) for t in store.tiles()]
    )
    assert main(["export", str(project.root), "--proposals", "--out", str(tmp_path / "o")]) == 0
    assert "filled from model proposals" in capsys.readouterr().out
    rows = [json.loads(x) for x in (tmp_path / "o" / "manifest.jsonl").read_text().splitlines()]
    assert len(rows) == 40 and {r["source"] for r in rows} == {"proposal"}
    assert {r["proposal_share"] for r in rows} == {1.0}
    source = np.asarray(Image.open(tmp_path / "o" / "masks" / f"{plots[0].stem}_source.png"))
    assert (source == 2).all()  # every pixel is a proposal
    coll = json.loads((tmp_path / "o" / "geojson" / f"{plots[0].stem}.geojson").read_text())
    regions = [f for f in coll["features"] if f["properties"]["layer"] == "classes"]
    assert {f["properties"]["source"] for f in regions} == {"proposal"}
    assert {f["properties"]["model_version"] for f in regions} == {"test-fill"}
    assert len(regions) == len(coll["features"])  # nobody looked: no looked_at outline


def test_bad_imports_import_nothing(demo2, tmp_path):
    project, plots = demo2
    good = truth_path(plots[0])
    small = tmp_path / f"{plots[1].stem}_mask.png"
    write_png(small, np.zeros((10, 10), np.uint8))
    with pytest.raises(LabelerError, match="name one mask file"):
        import_masks(project, [good, small], annotator="ines", image=plots[0].stem)
    named = tmp_path / f"{plots[0].stem}.png"
    named.write_bytes(good.read_bytes())
    with pytest.raises(InputError, match=r"_mask.png"):  # the good file is not saved either
        import_masks(project, [named, small], annotator="ines")
    with pytest.raises(InputError, match=r"_mask.png"):
        import_masks(project, [small], annotator="ines")
    stray = tmp_path / "nobody_mask.png"
    write_png(stray, np.zeros((768, 1024), np.uint8))
    with pytest.raises(InputError):
        import_masks(project, [stray], annotator="ines")
    with pytest.raises(LabelerError, match="--fill"):
        import_masks(project, [stray], annotator="ines", fill="grass")
    assert project.store.annotations(kind=None) == []


def test_png_with_unlabelled_pixels_becomes_a_weak_label(demo2, tmp_path):
    project, plots = demo2
    weak = np.full((768, 1024), 255, np.uint8)
    weak[:100, :100] = 2
    path = tmp_path / f"{plots[0].stem}_annotation.png"
    write_png(path, weak)
    res = import_masks(project, [path], annotator="ines")
    assert (res.full_tiles, res.weak_tiles) == (0, 1)
    ann = project.store.annotations(kind="scribble")
    assert len(ann) == 1 and ann[0].state == "weak"


def test_geojson_needs_georeferencing(tmp_path):
    rgb = np.random.default_rng(0).integers(0, 256, (100, 100, 3), dtype=np.uint8)
    Image.fromarray(rgb).save(tmp_path / "leaf.png")
    p = init_project(tmp_path / "proj")
    add_images(p, [tmp_path / "leaf.png"])
    write_png(tmp_path / "leaf_mask.png", np.ones((100, 100), np.uint8))
    import_masks(p, [tmp_path / "leaf_mask.png"], annotator="ines")
    with pytest.raises(LabelerError, match="--pixel-coordinates"):
        export_project(p, tmp_path / "o")
    res = export_project(p, tmp_path / "o2", pixel_coordinates=True)
    assert res.features == 1
    p.close()
