"""GeoJSON masks drawn a band of rows at a time, and GeoJSON that is not to be read
(labeler/export/geojson_import.py)."""

from __future__ import annotations

import json

import numpy as np
import pytest
import shapely

from labeler.errors import MaskImportError
from labeler.export import geojson_import
from labeler.export.geojson_import import GeoJsonMask, open_geojson_mask, read_geojson_mask


def square(x0, y0, x1, y1, cls):
    ring = [[x0, y0], [x1, y0], [x1, y1], [x0, y1], [x0, y0]]
    return {"type": "Feature", "properties": {"class": cls},
            "geometry": {"type": "Polygon", "coordinates": [ring]}}


def pixel_collection(features):
    return {"type": "FeatureCollection", "labeler:coordinates": "pixel", "features": features}


def centre_reference(features, shape, fill):
    """Slow reference: each pixel takes the class of the LAST polygon holding its centre
    (shapely.contains_xy as the oracle)."""
    names = {"soil": 0, "crop": 1, "weed": 2, "symptom": 3}
    out = np.full(shape, fill, np.uint8)
    rr, cc = np.mgrid[0 : shape[0], 0 : shape[1]]
    for f in features:
        geom = shapely.geometry.shape(f["geometry"])
        inside = shapely.contains_xy(geom, cc + 0.5, rr + 0.5)
        out[inside] = names[f["properties"]["class"]]
    return out


def test_bands_equal_the_pixel_centre_reference():
    rng = np.random.default_rng(21)
    features = []
    for _ in range(40):
        x0, y0 = rng.uniform(-0.4, 60, 2)
        w, h = rng.uniform(0.7, 25, 2)
        features.append(square(x0, y0, min(x0 + w, 70.3), min(y0 + h, 90.4),
                               ["soil", "crop", "weed", "symptom"][int(rng.integers(4))]))
    shape = (90, 70)
    placed = GeoJsonMask(pixel_collection(features), shape=shape, fill=255)
    reference = centre_reference(features, shape, 255)
    for bands in ([(0, 90)], [(0, 32), (24, 56), (48, 80), (58, 90)], [(60, 90), (0, 5)]):
        for start, stop in bands:
            np.testing.assert_array_equal(placed.read_rows(start, stop), reference[start:stop])
    with pytest.raises(ValueError, match=r"rows: expected 0 <= start < stop <= 90, got 80, 91"):
        placed.read_rows(80, 91)
    # a band no polygon reaches is filled without drawing anything
    empty = GeoJsonMask(pixel_collection([square(0, 0, 5, 5, "crop")]), shape=(40, 5), fill=0)
    assert (empty.read_rows(10, 40) == 0).all() and (empty.read_rows(0, 5) == 1).all()


def test_json_nested_200000_deep_is_one_line(tmp_path):
    path = tmp_path / "deep.geojson"
    path.write_text("[" * 200_000 + "]" * 200_000)
    with pytest.raises(MaskImportError, match=r"^[^\n]*deep.geojson: not GeoJSON: its JSON is "
                                              r"nested too deeply to read[^\n]*$"):
        read_geojson_mask(path, shape=(4, 4))
    inner = json.dumps(pixel_collection([square(0, 0, 2, 2, "crop")]))
    nested = inner.replace('[[[0, 0]', "[" * 200_000 + "[[0, 0]").replace(
        "[0, 0]]]", "[0, 0]]" + "]" * 200_000, 1)
    path.write_text(nested)
    with pytest.raises(MaskImportError, match=r"deep.geojson: not GeoJSON: its JSON is nested"):
        read_geojson_mask(path, shape=(4, 4))


def test_nesting_json_reads_but_geojson_does_not_allow(tmp_path):
    deep = [[0, 0]]
    for _ in range(40):
        deep = [deep]
    feature = {"type": "Feature", "properties": {"class": "crop"},
               "geometry": {"type": "Polygon", "coordinates": deep}}
    path = tmp_path / "odd.geojson"
    path.write_text(json.dumps(pixel_collection([feature])))
    with pytest.raises(MaskImportError, match=r"odd.geojson: feature 0, ring 0: a linear ring "
                                              r"needs at least 4 positions"):
        read_geojson_mask(path, shape=(4, 4))


@pytest.mark.parametrize(
    ("text", "match"),
    [
        ("", r"not valid JSON"),
        ("\xff\xfe{}", r"not valid JSON|not UTF-8"),
        ('{"type": "FeatureCollection", "labeler:coordinates": "pixel", "features": [1e400]}',
         r"feature 0: expected an object of type 'Feature'"),
        ('{"type": "FeatureCollection", "labeler:coordinates": "pixel", "features": [{"type": '
         '"Feature", "properties": {"class": "crop"}, "geometry": {"type": "Polygon", '
         '"coordinates": [[[0, 0], [1e400, 0], [1, 1], [0, 0]]]}}]}',
         r"feature 0, ring 0: positions must be finite numbers"),
        ('{"type": "FeatureCollection", "features": [NaN]}', r"NaN is not a JSON number"),
        ('[{"type": "Feature"}]', r"not a GeoJSON object \(no top-level 'type' member\)"),
        ('{"type": "FeatureCollection", "features": {"a": 1}}', r"without a 'features' list"),
    ],
)
def test_malformed_geojson_files(tmp_path, text, match):
    path = tmp_path / "bad.geojson"
    path.write_bytes(text.encode("latin-1"))
    with pytest.raises(MaskImportError, match=f"bad.geojson: .*{match}"):
        read_geojson_mask(path, shape=(4, 4))


def test_files_too_large_or_not_files(tmp_path, monkeypatch):
    path = tmp_path / "big.geojson"
    path.write_text(json.dumps(pixel_collection([square(0, 0, 2, 2, "crop")])))
    monkeypatch.setattr(geojson_import, "MAX_GEOJSON_BYTES", 100)
    with pytest.raises(MaskImportError, match=r"big.geojson: a GeoJSON file of 0 MiB is larger "
                                              r"than the 0 MiB read at once; split it per image"):
        open_geojson_mask(path, shape=(4, 4))
    (tmp_path / "dir.geojson").mkdir()
    with pytest.raises(MaskImportError, match=r"dir.geojson: is a folder, not a mask file"):
        open_geojson_mask(tmp_path / "dir.geojson", shape=(4, 4))
    with pytest.raises(MaskImportError, match=r"gone.geojson: no such file"):
        open_geojson_mask(tmp_path / "gone.geojson", shape=(4, 4))
