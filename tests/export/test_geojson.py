"""Tests of labeler.export.geojson against RFC 7946 and rasterio/shapely as oracles."""

from __future__ import annotations

import json
import math
import warnings

import numpy as np
import pytest
import shapely
from affine import Affine
from rasterio.warp import transform as warp_transform
from rasterio.warp import transform_geom

from labeler.errors import InputError
from labeler.export.crs import coordinate_decimals, ground_sampling_distance
from labeler.export.geojson import (
    COORDINATES_MEMBER,
    NotRFC7946Warning,
    TileInfo,
    image_feature_collection,
    merge_feature_collections,
    read_geojson,
    write_geojson,
)
from labeler.export.geometry import geometry_from_geojson, geometry_to_geojson
from labeler.imagery.tiling import cut, stitch, tile_grid
from tests.common import zoo_four_classes, zoo_ring, zoo_square

UTM31 = "EPSG:32631"
#: 5 cm pixels whose top-left corner is on the central meridian of UTM zone 31 at the
#: equator (easting 500 000, northing 0).
T_UTM = Affine(0.05, 0.0, 500_000.0, 0.0, -0.05, 0.0)

#: RFC 7946 Appendix A.3, polygon with a hole.
A3_POLYGON = {
    "type": "Polygon",
    "coordinates": [
        [[100.0, 0.0], [101.0, 0.0], [101.0, 1.0], [100.0, 1.0], [100.0, 0.0]],
        [[100.8, 0.8], [100.8, 0.2], [100.2, 0.2], [100.2, 0.8], [100.8, 0.8]],
    ],
}


def collection(mask, **kw):
    kw.setdefault("image", "plot-a")
    kw.setdefault("transform", T_UTM)
    kw.setdefault("crs", UTM31)
    return image_feature_collection(mask, **kw)


def rings_of(geometry):
    polys = [geometry["coordinates"]] if geometry["type"] == "Polygon" else geometry["coordinates"]
    return [(k, ring) for p in polys for k, ring in enumerate(p)]


# -- RFC 7946 structure ------------------------------------------------------------------


@pytest.mark.parametrize("north_up", [True, False])
def test_rfc7946_rings_bbox_and_no_crs(north_up):
    # RFC 7946 section 3.1.6 (closed rings of >= 4 positions, exterior counterclockwise,
    # holes clockwise), section 4 (no "crs"), section 5 (bbox = [west, south, east, north])
    t = T_UTM if north_up else Affine(0.05, 0.0, 500_000.0, 0.0, 0.05, 0.0)  # rows go north
    fc = collection(zoo_ring(), transform=t, simplify_tolerance_px=0)
    assert fc["type"] == "FeatureCollection"
    assert "crs" not in fc and COORDINATES_MEMBER not in fc
    (feature,) = fc["features"]
    assert feature["type"] == "Feature" and isinstance(feature["id"], str)
    rings = rings_of(feature["geometry"])
    assert [k for k, _ in rings] == [0, 1]  # one exterior, one hole
    for k, ring in rings:
        assert len(ring) >= 4 and ring[0] == ring[-1]
        assert shapely.LinearRing(ring).is_ccw == (k == 0)
    xy = np.array([p for _, ring in rings for p in ring])
    west, south, east, north = feature["bbox"]
    assert (west, south, east, north) == (xy[:, 0].min(), xy[:, 1].min(), xy[:, 0].max(),
                                          xy[:, 1].max())
    assert west < east and south < north
    assert fc["bbox"] == feature["bbox"]


def test_known_utm_point_maps_to_central_meridian_at_equator():
    # EPSG:32631 easting 500 000, northing 0 is longitude 3 (the zone's central
    # meridian), latitude 0 (common practice: UTM zone 31 spans 0..6 degrees east)
    m = np.zeros((4, 4), np.uint8)
    m[:2, :2] = 1  # pixel corner (0, 0) is a vertex
    fc = collection(m, min_area_px=1, simplify_tolerance_px=0)
    ring = fc["features"][0]["geometry"]["coordinates"][0]
    nearest = min(ring, key=lambda p: abs(p[0] - 3) + abs(p[1]))
    assert nearest[0] == pytest.approx(3.0, abs=1e-9) and nearest[1] == pytest.approx(0.0, abs=1e-9)


def test_reprojection_matches_rasterio_transform_geom():
    # oracle: rasterio.warp.transform_geom of the affine-mapped polygon
    m = zoo_ring()
    fc = collection(m, simplify_tolerance_px=0)
    decimals = coordinate_decimals(0.05)
    got = shapely.geometry.shape(fc["features"][0]["geometry"])
    exterior = [(T_UTM @ (x, y)) for x, y in [(2, 2), (8, 2), (8, 8), (2, 8), (2, 2)]]
    hole = [(T_UTM @ (x, y)) for x, y in [(4, 4), (6, 4), (6, 6), (4, 6), (4, 4)]]
    ref = transform_geom(UTM31, "EPSG:4326", {"type": "Polygon", "coordinates": [exterior, hole]})
    ref_poly = shapely.geometry.shape(ref)
    # same vertices up to the rounding of the written positions
    assert shapely.get_num_coordinates(got) == shapely.get_num_coordinates(ref_poly)
    assert shapely.hausdorff_distance(got, ref_poly) <= 0.5 * 10.0**-decimals * math.sqrt(2)


def test_area_in_square_metres_equals_shapely_area_in_the_projected_crs():
    # oracle: shapely area of the polygon in map units (the ring: 32 px of 5 cm x 5 cm)
    fc = collection(zoo_ring(), simplify_tolerance_px=0)
    props = fc["features"][0]["properties"]
    mapped = shapely.affinity.affine_transform(
        shapely.Polygon([(2, 2), (8, 2), (8, 8), (2, 8)], [[(4, 4), (6, 4), (6, 6), (4, 6)]]),
        [T_UTM.a, T_UTM.b, T_UTM.d, T_UTM.e, T_UTM.c, T_UTM.f],
    )
    assert props["area_m2"] == pytest.approx(mapped.area, rel=1e-9)
    assert props["area_m2"] == pytest.approx(32 * 0.05 * 0.05, rel=1e-9)
    assert props["area_px"] == 32


def test_area_in_a_crs_measured_in_us_survey_feet():
    # EPSG:2263 (New York Long Island, US survey feet): 1 ftUS = 1200/3937 m (NIST)
    t = Affine(0.1, 0.0, 1_000_000.0, 0.0, -0.1, 200_000.0)
    fc = collection(zoo_square(), transform=t, crs="EPSG:2263", simplify_tolerance_px=0)
    ft = 1200.0 / 3937.0
    assert fc["features"][0]["properties"]["area_m2"] == pytest.approx(
        16 * (0.1 * ft) ** 2, rel=1e-9
    )


def test_area_for_a_geographic_crs_agrees_with_utm():
    # an image georeferenced in longitude/latitude near 3 E, 0.5 N; oracle: shapely area
    # after reprojecting to UTM 31N, whose scale factor is 0.9996 on the central meridian
    # (common practice), so areas agree to about 0.1 %
    deg = 1e-6  # about 11 cm
    t = Affine(deg, 0.0, 3.0, 0.0, -deg, 0.5)
    m = np.zeros((40, 40), np.uint8)
    m[5:35, 8:30] = 1
    fc = collection(m, transform=t, crs="EPSG:4326", simplify_tolerance_px=0)
    lonlat = shapely.geometry.shape(fc["features"][0]["geometry"])
    utm = shapely.geometry.shape(
        transform_geom("EPSG:4326", UTM31, shapely.geometry.mapping(lonlat))
    )
    assert fc["features"][0]["properties"]["area_m2"] == pytest.approx(utm.area, rel=2e-3)


def test_decimals_follow_the_ground_sampling_distance():
    # RFC 7946 section 11.2: 6 decimals are about 10 cm, a tenth of a 1 m pixel
    assert coordinate_decimals(1.0) == 6
    assert coordinate_decimals(0.01) == 8
    assert coordinate_decimals(0.001) == 9
    assert coordinate_decimals(None, pixel=True) == 1
    assert coordinate_decimals(1.0, fraction=1.0) == 5


@pytest.mark.parametrize("gsd", [1.0, 0.05, 0.002])
def test_rounding_moves_vertices_less_than_a_tenth_of_a_pixel(gsd):
    # measured: full-precision vertices (rasterio.warp.transform as oracle) against the
    # written ones, compared back in UTM metres
    t = Affine(gsd, 0.0, 499_980.0, 0.0, -gsd, 5_000_000.0)
    m = np.zeros((30, 30), np.uint8)
    m[3:27, 4:25] = 1
    m[10:14, 10:14] = 0
    fc = collection(m, transform=t, simplify_tolerance_px=0)
    assert ground_sampling_distance(t, UTM31, shape=m.shape) == pytest.approx(gsd, rel=1e-3)
    written = np.array([p for _, ring in rings_of(fc["features"][0]["geometry"]) for p in ring])
    east, north = warp_transform("EPSG:4326", UTM31, written[:, 0], written[:, 1])
    cols, rows = ~t @ (np.asarray(east), np.asarray(north))
    moved_px = np.hypot(cols - np.round(cols), rows - np.round(rows))
    assert moved_px.max() < 0.1


# -- properties, tiles and seams ------------------------------------------------------


def test_plant_across_a_tile_seam_is_one_feature_naming_both_tiles():
    # a 16 x 28 image in two 16 x 16 tiles overlapping by 4 columns; a plant spans both
    full = np.zeros((16, 28), np.uint8)
    full[4:12, 9:22] = 1
    windows = tile_grid(16, 28, size=16, overlap=4)
    assert len(windows) == 2
    stitched = stitch(cut(full, windows), windows, shape=full.shape)
    tiles = [
        TileInfo(101, "accepted", annotator="ana", model_version=None, source="annotation"),
        TileInfo(102, "proposed", annotator=None, model_version=3, source="proposal"),
    ]
    fc = collection(stitched, windows=windows, tiles=tiles, min_area_px=1)
    (feature,) = fc["features"]
    props = feature["properties"]
    assert props["tiles"] == [101, 102]
    assert props["annotators"] == ["ana"]
    assert props["states"] == ["proposed", "accepted"]  # life-cycle order
    assert props["model_version"] == 3
    assert props["source"] == "proposal"
    assert props["area_px"] == 8 * 13


def test_properties_classes_and_ids():
    fc = collection(zoo_four_classes(), min_area_px=1)
    props = [f["properties"] for f in fc["features"]]
    assert [p["class"] for p in props] == ["crop", "weed", "symptom"]  # soil is not exported
    assert [p["class_index"] for p in props] == [1, 2, 3]
    assert all(p["image"] == "plot-a" and p["area_px"] == 16 for p in props)
    assert all(p["tiles"] == [] and p["annotators"] == [] and p["states"] == [] for p in props)
    assert all(p["model_version"] is None and p["source"] == "annotation" for p in props)
    assert [f["id"] for f in fc["features"]] == ["plot-a:crop:1", "plot-a:weed:1",
                                                "plot-a:symptom:1"]
    soil = collection(zoo_four_classes(), classes=[0], min_area_px=1)
    assert [f["properties"]["class"] for f in soil["features"]] == ["soil"]
    json.dumps(fc, allow_nan=False)  # plain JSON types only


def test_empty_mask_gives_an_empty_collection_without_bbox():
    fc = collection(np.zeros((6, 6), np.uint8))
    assert fc["features"] == [] and "bbox" not in fc


def test_progress_is_called_per_strip_with_rows_done():
    calls = []
    collection(zoo_square(), progress=lambda done, total: calls.append((done, total)))
    assert calls == [(8, 8)]  # one strip: the whole 8-row mask


def test_pixel_coordinates_only_on_request_with_a_warning():
    with pytest.raises(InputError, match="no georeferencing .*pixel_coordinates=True"):
        image_feature_collection(zoo_ring(), image="plot-b")
    with pytest.warns(NotRFC7946Warning, match="not RFC 7946"):
        fc = image_feature_collection(
            zoo_ring(), image="plot-b", pixel_coordinates=True, simplify_tolerance_px=0
        )
    assert fc[COORDINATES_MEMBER] == "pixel"
    feature = fc["features"][0]
    assert feature["properties"]["area_m2"] is None
    assert feature["bbox"] == [2.0, 2.0, 8.0, 8.0]  # x = column, y = row of pixel corners


def test_merge_collections_of_two_images():
    a = collection(zoo_square(), image="plot-a")
    b = collection(zoo_square(), image="plot-b", transform=T_UTM @ Affine.translation(100, 0))
    merged = merge_feature_collections([a, b])
    assert len(merged["features"]) == 2
    assert merged["bbox"][0] == a["bbox"][0] and merged["bbox"][2] == b["bbox"][2]
    with pytest.raises(ValueError, match="feature id 'plot-a:crop:1' occurs twice"):
        merge_feature_collections([a, a])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", NotRFC7946Warning)
        px = image_feature_collection(zoo_square(), image="plot-c", pixel_coordinates=True)
    with pytest.raises(ValueError, match="cannot merge pixel-coordinate collections"):
        merge_feature_collections([a, px])
    with pytest.raises(ValueError, match=r"collections\[0\]: expected a FeatureCollection"):
        merge_feature_collections([{"type": "Feature"}])


# -- geometry objects and files ---------------------------------------------------------


def test_rfc7946_appendix_a3_polygon_round_trips_unchanged(tmp_path):
    # RFC 7946 Appendix A.3 (already oriented: exterior counterclockwise, hole clockwise)
    path = tmp_path / "a3.geojson"
    fc = {"type": "FeatureCollection", "features": [
        {"type": "Feature", "geometry": A3_POLYGON, "properties": {"class": "weed"}}
    ]}
    write_geojson(path, fc)
    back = read_geojson(path)
    assert back == fc
    geom = geometry_from_geojson(back["features"][0]["geometry"])
    assert geometry_to_geojson(geom, decimals=6) == A3_POLYGON
    assert geometry_to_geojson(geom) == A3_POLYGON


def test_geometry_to_geojson_orients_rings():
    # clockwise exterior and counterclockwise hole are turned round (RFC 7946 3.1.6)
    poly = shapely.Polygon([(0, 0), (0, 4), (4, 4), (4, 0)], [[(1, 1), (2, 1), (2, 2), (1, 2)]])
    out = geometry_to_geojson(poly)
    assert shapely.LinearRing(out["coordinates"][0]).is_ccw
    assert not shapely.LinearRing(out["coordinates"][1]).is_ccw
    multi = geometry_to_geojson(shapely.MultiPolygon([poly, shapely.box(5, 5, 6, 6)]))
    assert multi["type"] == "MultiPolygon" and len(multi["coordinates"]) == 2


def test_geometry_errors():
    with pytest.raises(ValueError, match="expected geometry type Polygon or MultiPolygon"):
        geometry_from_geojson({"type": "Point", "coordinates": [1, 2]})
    with pytest.raises(ValueError, match="ring is not closed"):
        geometry_from_geojson(
            {"type": "Polygon", "coordinates": [[[0, 0], [1, 0], [1, 1], [0, 1]]]}
        )
    with pytest.raises(ValueError, match="at least 4 positions"):
        geometry_from_geojson({"type": "Polygon", "coordinates": [[[0, 0], [1, 0], [0, 0]]]})
    with pytest.raises(ValueError, match=r"position 1: expected \[x, y\] numbers"):
        geometry_from_geojson(
            {"type": "Polygon", "coordinates": [[[0, 0], ["a", 0], [1, 1], [0, 0]]]}
        )
    with pytest.raises(ValueError, match="non-empty list of linear rings"):
        geometry_from_geojson({"type": "Polygon", "coordinates": []})
    with pytest.raises(ValueError, match="expected a GeoJSON geometry object"):
        geometry_from_geojson(None)
    with pytest.raises(ValueError, match="expected a non-empty Polygon or MultiPolygon"):
        geometry_to_geojson(shapely.Polygon())


def test_write_is_atomic_and_read_checks_the_file(tmp_path):
    path = tmp_path / "out" / "plot.geojson"
    fc = collection(zoo_ring())
    write_geojson(path, fc)
    assert read_geojson(path) == fc
    assert [p.name for p in path.parent.iterdir()] == ["plot.geojson"]  # no temp file left
    with pytest.raises(ValueError, match="cannot be written as JSON"):
        write_geojson(path, {"type": "FeatureCollection", "features": [], "x": math.nan})
    with pytest.raises(ValueError, match="expected a GeoJSON FeatureCollection or Feature"):
        write_geojson(path, {"type": "Polygon"})
    assert read_geojson(path) == fc  # the failed writes left the file alone
    bad = tmp_path / "bad.geojson"
    bad.write_text("{not json")
    with pytest.raises(ValueError, match="bad.geojson: not valid JSON"):
        read_geojson(bad)
    bad.write_bytes(b"\xff\xfe{}")
    with pytest.raises(ValueError, match="not UTF-8"):
        read_geojson(bad)
    bad.write_text('{"type": "FeatureCollection", "features": [], "v": NaN}')
    with pytest.raises(ValueError, match="NaN is not a JSON number"):
        read_geojson(bad)
    bad.write_text("[1, 2]")
    with pytest.raises(ValueError, match="not a GeoJSON object"):
        read_geojson(bad)


def test_argument_errors():
    m = zoo_square()
    windows = tile_grid(8, 8, size=8, overlap=0)
    with pytest.raises(ValueError, match="windows/tiles: pass both"):
        collection(m, windows=windows)
    with pytest.raises(ValueError, match="tiles: expected one TileInfo per window"):
        collection(m, windows=windows, tiles=[])
    with pytest.raises(ValueError, match=r"windows\[0\]: .* reaches outside"):
        collection(m, windows=tile_grid(16, 16, size=16, overlap=0), tiles=[TileInfo(1, "held")])
    with pytest.raises(ValueError, match=r"tiles\[0\]: expected a TileInfo"):
        collection(m, windows=windows, tiles=[{"tile_id": 1}])
    with pytest.raises(ValueError, match="classes: 255 means unlabelled"):
        collection(m, classes=[255])
    with pytest.raises(ValueError, match="classes: 9 is not a class index"):
        collection(m, classes=[9])
    with pytest.raises(ValueError, match="holds values"):
        collection(np.full((4, 4), 7, np.uint8))
    with pytest.raises(ValueError, match="image: expected a non-empty image name"):
        collection(m, image="")
    with pytest.raises(ValueError, match="source: expected 'annotation' or 'proposal'"):
        collection(m, source="guess")
    with pytest.raises(ValueError, match="crs: could not read"):
        collection(m, crs="EPSG:not-a-code")
    with pytest.raises(ValueError, match="state: expected one of unseen"):
        TileInfo(1, "finished")
    with pytest.raises(ValueError, match="source: expected 'annotation' or 'proposal'"):
        TileInfo(1, "held", source="model")
    with pytest.raises(ValueError, match="gsd_m: expected a positive"):
        coordinate_decimals(0.0)
    with pytest.raises(ValueError, match=r"fraction: expected a share of a pixel in \(0, 1\]"):
        coordinate_decimals(1.0, fraction=0)


def test_vectorised_encoding_matches_shapely_mapping_per_geometry():
    # slow reference: shapely.geometry.mapping of each oriented geometry, rounded
    from labeler.export.geometry import encode_geometries

    rng = np.random.default_rng(4)
    geoms = []
    for _ in range(12):
        x, y = rng.uniform(0, 50, 2)
        shell = shapely.box(x, y, x + rng.uniform(3, 9), y + rng.uniform(3, 9), ccw=False)
        if rng.random() < 0.5:
            hole = shapely.box(x + 1, y + 1, x + 2, y + 2).exterior
            shell = shapely.Polygon(shell.exterior, [hole])
        if rng.random() < 0.3:
            shell = shapely.MultiPolygon([shell, shapely.box(x + 20, y, x + 21.37, y + 1.5)])
        geoms.append(shell)
    arr = np.empty(len(geoms), dtype=object)
    arr[:] = geoms
    got, boxes = encode_geometries(arr, decimals=3, orient=True)
    for g, out, box in zip(geoms, got, boxes, strict=True):
        ref = shapely.geometry.mapping(shapely.orient_polygons(g, exterior_cw=False))
        polys = [ref["coordinates"]] if ref["type"] == "Polygon" else ref["coordinates"]
        rounded = [[[[round(v, 3) + 0.0 for v in p] for p in ring] for ring in poly]
                   for poly in polys]
        assert out["type"] == ref["type"]
        assert out["coordinates"] == (rounded[0] if ref["type"] == "Polygon" else rounded)
        xy = np.array([p for poly in rounded for ring in poly for p in ring])
        assert box.tolist() == [*xy.min(axis=0), *xy.max(axis=0)]


def test_more_argument_errors():
    with pytest.raises(ValueError, match="transform: expected pixels of positive ground size"):
        ground_sampling_distance(Affine(0.0, 0.0, 500_000.0, 0.0, 0.0, 0.0), UTM31, shape=(4, 4))
    with pytest.raises(ValueError, match="crs: could not read"):
        collection(zoo_square(), crs=12.5)
    with pytest.raises(ValueError, match="MultiPolygon needs a non-empty list of polygons"):
        geometry_from_geojson({"type": "MultiPolygon", "coordinates": []})


def test_smooth_export_has_fewer_vertices_and_keeps_area():
    m = np.zeros((60, 60), np.uint8)
    r, c = np.indices(m.shape)
    m[(r - 30) ** 2 + (c - 30) ** 2 < 400] = 1  # a disc of radius 20 px
    plain = collection(m)["features"][0]
    smooth = collection(m, smooth=True)["features"][0]
    n_plain = len(plain["geometry"]["coordinates"][0])
    n_smooth = len(smooth["geometry"]["coordinates"][0])
    assert n_smooth < n_plain
    # the area guard: within 2 % of the pixel count (0.05 m pixels)
    assert smooth["properties"]["area_m2"] == pytest.approx(
        plain["properties"]["area_px"] * 0.05**2, rel=0.02
    )
