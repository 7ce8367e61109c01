"""Tests of labeler.masks.polygons: exact outlines, simplification, rasterisation."""

from __future__ import annotations

import numpy as np
import pytest
import shapely
from hypothesis import given, settings
from hypothesis import strategies as st
from skimage.measure import label as sk_label
from skimage.measure import regionprops

from labeler.masks.polygons import Region, mask_to_polygons, outline_region, polygons_to_mask
from tests.common import (
    zoo_checker,
    zoo_diagonal,
    zoo_empty,
    zoo_four_classes,
    zoo_full,
    zoo_ring,
    zoo_square,
    zoo_two_touching,
    zoo_unlabelled,
)


def exact(mask, class_index, **kw):
    kw.setdefault("simplify_tolerance_px", 0)
    kw.setdefault("min_area_px", 0)
    return mask_to_polygons(mask, class_index=class_index, **kw)


def pixel_union_reference(pixels: np.ndarray) -> shapely.Geometry:
    """Slow reference: union of one unit square per pixel (x = column, y = row)."""
    boxes = []
    for r in range(pixels.shape[0]):
        for c in range(pixels.shape[1]):
            if pixels[r, c]:
                boxes.append(shapely.box(c, r, c + 1, r + 1))
    return shapely.unary_union(boxes)


def rasterise_reference(items, shape, fill):
    """Slow reference: point-in-polygon test of every pixel centre, later items win."""
    out = np.full(shape, fill, np.uint8)
    for r in range(shape[0]):
        for c in range(shape[1]):
            centre = shapely.Point(c + 0.5, r + 0.5)
            for geom, value in items:
                if geom.contains(centre):
                    out[r, c] = value
    return out


def random_blobs(rng: np.random.Generator, shape=(24, 24), n=4, classes=(1, 2, 3)) -> np.ndarray:
    """Seeded random filled ellipses, some with a hole."""
    m = np.zeros(shape, np.uint8)
    rr, cc = np.indices(shape)
    for _ in range(n):
        cy, cx = rng.uniform(0, shape[0]), rng.uniform(0, shape[1])
        a, b = rng.uniform(2.5, 7.0, 2)
        inside = ((rr + 0.5 - cy) / a) ** 2 + ((cc + 0.5 - cx) / b) ** 2 < 1
        m[inside] = rng.choice(classes)
        if rng.random() < 0.4 and min(a, b) > 3.5:
            m[((rr + 0.5 - cy) / 1.3) ** 2 + ((cc + 0.5 - cx) / 1.3) ** 2 < 1] = 0
    return m


# -- exact areas on the zoo (exact by construction: tests.common docstrings) --------------


def test_ring_is_one_polygon_of_32_px_with_one_hole_of_4():
    (region,) = exact(zoo_ring(), 2)
    poly = region.geometry
    assert isinstance(poly, shapely.Polygon)
    assert poly.area == 32 and region.area_px == 32
    assert len(poly.interiors) == 1
    assert shapely.Polygon(poly.interiors[0]).area == 4
    assert poly.bounds == (2.0, 2.0, 8.0, 8.0)
    # hole corners are pixel corners of rows/cols 4..5
    assert shapely.Polygon(poly.interiors[0]).bounds == (4.0, 4.0, 6.0, 6.0)


@pytest.mark.parametrize(
    ("make", "class_index", "n_regions", "area"),
    [
        (zoo_square, 1, 1, 16),
        # rows 1..6 x 3 columns = 18 px each (its docstring says 24; the array holds 18)
        (zoo_two_touching, 1, 1, 18),
        (zoo_two_touching, 2, 1, 18),
        (zoo_four_classes, 0, 1, 16),
        (zoo_four_classes, 3, 1, 16),
        (zoo_full, 1, 1, 64),
        (zoo_empty, 0, 1, 64),
    ],
)
def test_zoo_areas(make, class_index, n_regions, area):
    regions = exact(make(), class_index)
    assert len(regions) == n_regions
    assert [r.geometry.area for r in regions] == [area] * n_regions
    assert [r.area_px for r in regions] == [area] * n_regions


def test_absent_class_and_unlabelled_give_nothing():
    assert exact(zoo_square(), 3) == []
    assert exact(zoo_unlabelled(), 1) == []
    assert exact(np.zeros((0, 5), np.uint8), 1) == []


def test_square_outline_is_the_pixel_edges():
    (region,) = exact(zoo_square(), 1)
    assert shapely.equals(region.geometry, shapely.box(2, 2, 6, 6))
    assert len(region.geometry.exterior.coords) == 5  # 4 corners, closed, no midpoints


def test_diagonal_connectivity_8_is_one_multipolygon_4_is_six_squares():
    (region,) = exact(zoo_diagonal(), 1, connectivity=8)
    assert isinstance(region.geometry, shapely.MultiPolygon)
    assert len(region.geometry.geoms) == 6 and region.geometry.area == 6
    assert region.geometry.is_valid
    singles = exact(zoo_diagonal(), 1, connectivity=4)
    assert len(singles) == 6
    assert all(isinstance(r.geometry, shapely.Polygon) and r.geometry.area == 1 for r in singles)


def test_corner_contacts_that_cut_the_interior_give_a_valid_multipolygon():
    # 5 x 5 of class 1 with four holes around the centre pixel, each touching the next at
    # a corner: the centre joins the rest only through corners (8-connected), so one
    # polygon would have a disconnected interior (OGC simple features); the outline is
    # the frame (25 - 5 = 20 px, a plus-shaped hole) and the centre square (1 px)
    m = np.ones((5, 5), np.uint8)
    m[1, 2] = m[2, 1] = m[2, 3] = m[3, 2] = 0
    (region,) = exact(m, 1, connectivity=8)
    geom = region.geometry
    assert isinstance(geom, shapely.MultiPolygon) and geom.is_valid
    assert sorted(p.area for p in geom.geoms) == [1.0, 20.0]
    assert region.area_px == 21
    frame = max(geom.geoms, key=lambda p: p.area)
    assert len(frame.interiors) == 1 and shapely.Polygon(frame.interiors[0]).area == 5
    # with 4-connectivity the centre is its own region
    assert sorted(r.area_px for r in exact(m, 1, connectivity=4)) == [1, 20]


def test_noise_outlines_stay_valid_and_exact():
    # salt-and-pepper: many corner contacts in one 8-connected region
    m = (np.random.default_rng(8).random((48, 48)) < 0.5).astype(np.uint8)
    for conn in (4, 8):
        regions = exact(m, 1, connectivity=conn)
        assert all(r.geometry.is_valid for r in regions)
        assert all(r.geometry.area == r.area_px for r in regions)
        np.testing.assert_array_equal(polygons_to_mask(regions, shape=m.shape, fill=0), m)
        simplified = mask_to_polygons(m, class_index=1, min_area_px=0, connectivity=conn)
        assert all(r.geometry.is_valid for r in simplified)


def test_checkerboard_regions_match_scikit_image_labelling():
    # oracle: skimage.measure.label (connectivity 1 = 4-neighbours, 2 = 8-neighbours)
    m = zoo_checker((4, 4))
    for conn, sk_conn in ((4, 1), (8, 2)):
        ours = exact(m, 1, connectivity=conn)
        n_sk = sk_label(m == 1, connectivity=sk_conn).max()
        assert len(ours) == n_sk
        assert sum(r.area_px for r in ours) == 8
        assert all(r.geometry.is_valid for r in ours)


# -- against reference libraries on random masks -----------------------------------------


@pytest.mark.parametrize("connectivity", [4, 8])
def test_outlines_equal_union_of_pixel_squares(connectivity):
    # oracle: shapely.unary_union of one box per pixel (slow reference above)
    rng = np.random.default_rng(7)
    for _ in range(25):
        m = (rng.random((9, 11)) < rng.uniform(0.3, 0.7)).astype(np.uint8)
        for region in exact(m, 1, connectivity=connectivity):
            full = np.zeros(m.shape, bool)
            full[region.window.slices] = region.pixels
            ref = pixel_union_reference(full)
            assert region.geometry.is_valid, shapely.is_valid_reason(region.geometry)
            assert shapely.symmetric_difference(region.geometry, ref).area == 0
            assert region.geometry.area == region.area_px == full.sum()


@pytest.mark.parametrize("connectivity", [4, 8])
def test_regions_match_scikit_image_regionprops(connectivity):
    # oracle: skimage.measure.regionprops areas and bounding boxes
    rng = np.random.default_rng(11)
    m = random_blobs(rng, shape=(40, 40), n=10)
    for cls in (1, 2, 3):
        lab = sk_label(m == cls, connectivity=1 if connectivity == 4 else 2)
        props = regionprops(lab)
        ref = sorted((p.area, p.bbox) for p in props)
        ours = sorted(
            (
                r.area_px,
                (r.window.row, r.window.col, r.window.row + r.window.height,
                 r.window.col + r.window.width),
            )
            for r in exact(m, cls, connectivity=connectivity)
        )
        assert ours == ref


@pytest.mark.parametrize("connectivity", [4, 8])
def test_round_trip_is_lossless_without_simplification(connectivity):
    rng = np.random.default_rng(3)
    for _ in range(20):
        m = rng.integers(0, 4, size=(10, 13), dtype=np.uint8)
        items = []
        for cls in range(4):
            items.extend(exact(m, cls, connectivity=connectivity))
        back = polygons_to_mask(items, shape=m.shape, fill=255)
        np.testing.assert_array_equal(back, m)


@settings(max_examples=30, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), p=st.floats(0.2, 0.8), conn=st.sampled_from([4, 8]))
def test_property_exact_area_validity_and_round_trip(seed, p, conn):
    rng = np.random.default_rng(seed)
    m = (rng.random((12, 12)) < p).astype(np.uint8)
    regions = exact(m, 1, connectivity=conn)
    assert all(r.geometry.is_valid for r in regions)
    assert all(r.geometry.area == r.area_px for r in regions)
    assert sum(r.area_px for r in regions) == int(m.sum())
    np.testing.assert_array_equal(polygons_to_mask(regions, shape=m.shape, fill=0), m)


def test_region_window_and_pixels_describe_the_region():
    m = random_blobs(np.random.default_rng(5), shape=(30, 30), n=6)
    for cls in (1, 2, 3):
        for r in exact(m, cls):
            assert r.pixels.shape == (r.window.height, r.window.width)
            assert r.pixels.sum() == r.area_px
            assert (m[r.window.slices][r.pixels] == cls).all()
            assert r.pixels[0].any() and r.pixels[-1].any()  # tight bounding box
            assert r.pixels[:, 0].any() and r.pixels[:, -1].any()


# -- simplification ------------------------------------------------------------------


def test_simplification_keeps_area_within_two_percent_and_within_tolerance():
    rng = np.random.default_rng(21)
    m = random_blobs(rng, shape=(64, 64), n=12)
    for cls in (1, 2, 3):
        exact_regions = {r.label: r for r in exact(m, cls)}
        for tol, smooth in ((0.5, False), (1.0, False), (4.0, False), (0.5, True), (2.0, True)):
            for r in mask_to_polygons(
                m, class_index=cls, simplify_tolerance_px=tol, min_area_px=0, smooth=smooth
            ):
                ref = exact_regions[r.label].geometry
                assert r.geometry.is_valid
                assert abs(r.geometry.area - r.area_px) <= 0.02 * r.area_px
                # Douglas-Peucker keeps the outline within the tolerance (common practice,
                # no source), plus the 0.354 px of the corner cut when smoothing
                bound = tol + (np.sqrt(2) / 4 if smooth else 0.0)
                assert shapely.hausdorff_distance(r.geometry, ref) <= bound + 1e-9
                if not smooth:
                    n_ref = shapely.get_num_coordinates(ref)
                    assert shapely.get_num_coordinates(r.geometry) <= n_ref


def test_staircase_is_kept_at_half_a_pixel_and_straightened_when_smoothed():
    m = np.zeros((40, 40), np.uint8)
    r, c = np.indices(m.shape)
    m[r < c // 2 + 5] = 1  # a staircase edge: steps of 2 columns, 1 row
    (exact_region,) = exact(m, 1)
    n_exact = shapely.get_num_coordinates(exact_region.geometry)
    # inner corners lie 2 / sqrt(5) = 0.894 px from the line through the outer corners
    # (plane geometry), so Douglas-Peucker at 0.5 px keeps nearly all of them (only the
    # last step, where the staircase meets the image edge, can go) and no pixel changes
    (half,) = mask_to_polygons(m, class_index=1, simplify_tolerance_px=0.5)
    assert shapely.get_num_coordinates(half.geometry) >= n_exact - 2
    np.testing.assert_array_equal(polygons_to_mask([half], shape=m.shape, fill=0), m)
    # the cut points lie within 1 / sqrt(5) = 0.447 px of one line (plane geometry)
    (smooth,) = mask_to_polygons(m, class_index=1, simplify_tolerance_px=0.5, smooth=True)
    assert shapely.get_num_coordinates(smooth.geometry) < n_exact / 2
    assert abs(smooth.geometry.area - smooth.area_px) <= 0.02 * smooth.area_px


def test_corner_cut_area_and_fallback():
    # cutting the 4 corners of a square by half a pixel removes 4 triangles of 1/8 px
    # (plane geometry): a 20 x 20 square becomes an octagon of 399.5 px
    m = np.zeros((24, 24), np.uint8)
    m[2:22, 2:22] = 1
    (r,) = mask_to_polygons(m, class_index=1, simplify_tolerance_px=0.1, smooth=True)
    assert r.geometry.area == pytest.approx(399.5, abs=1e-9)
    assert shapely.get_num_coordinates(r.geometry) == 9  # 8 vertices, closed
    # a 4 x 4 square would lose 0.5 / 16 = 3 % > 2 %: it keeps its exact outline
    (sq,) = mask_to_polygons(zoo_square(), class_index=1, simplify_tolerance_px=0.1, smooth=True)
    assert sq.geometry.area == 16
    # the ring's shell loses 0.5 px and its hole gives 0.5 px back
    (ring,) = mask_to_polygons(zoo_ring(), class_index=2, simplify_tolerance_px=0.1, smooth=True)
    assert ring.geometry.area == pytest.approx(32, abs=1e-9)


@pytest.mark.parametrize("connectivity", [4, 8])
def test_smoothed_outline_below_cut_distance_keeps_every_pixel(connectivity):
    # pixel centres lie >= sqrt(2)/4 = 0.354 px from the cut outline (plane geometry)
    rng = np.random.default_rng(9)
    m = random_blobs(rng, shape=(48, 48), n=10)
    items = []
    for cls in (1, 2, 3):
        items += mask_to_polygons(
            m, class_index=cls, simplify_tolerance_px=0.3, min_area_px=0, smooth=True,
            connectivity=connectivity, max_change=1.0,
        )
    assert all(r.geometry.is_valid for r in items)
    np.testing.assert_array_equal(polygons_to_mask(items, shape=m.shape, fill=0), m)


def test_large_tolerance_falls_back_so_small_regions_keep_their_area():
    m = zoo_ring()
    (r,) = mask_to_polygons(m, class_index=2, simplify_tolerance_px=50.0)
    # 50 px would collapse the ring; the retries end with the exact outline
    assert r.geometry.area == 32 and len(r.geometry.interiors) == 1


def test_specks_below_min_area_are_dropped():
    m = np.zeros((10, 10), np.uint8)
    m[1:3, 1:4] = 1  # 6 px
    m[6:9, 6:9] = 1  # 9 px
    assert [r.area_px for r in mask_to_polygons(m, class_index=1, min_area_px=8)] == [9]
    assert [r.area_px for r in mask_to_polygons(m, class_index=1, min_area_px=6)] == [6, 9]


# -- rasterisation -------------------------------------------------------------------


def test_polygons_to_mask_matches_per_pixel_point_in_polygon():
    rng = np.random.default_rng(2)
    for _ in range(6):
        items = []
        for value in (1, 2, 3):
            centre = rng.uniform(3, 13, 2)
            angles = np.sort(rng.uniform(0, 2 * np.pi, 7))
            radii = rng.uniform(2.0, 6.0, 7)
            shell = centre + np.column_stack([np.cos(angles), np.sin(angles)]) * radii[:, None]
            hole = centre + rng.uniform(-0.3, 0.3, 2) + np.array(
                [[-0.9, -0.9], [0.9, -0.9], [0.9, 0.9], [-0.9, 0.9]]
            )
            poly = shapely.Polygon(shell, [hole])
            if not poly.is_valid:
                poly = shapely.Polygon(shell)
            items.append((poly, value))
        for fill in (0, 255):
            got = polygons_to_mask(items, shape=(16, 17), fill=fill)
            np.testing.assert_array_equal(got, rasterise_reference(items, (16, 17), fill))


def test_later_polygons_overwrite_earlier_and_holes_stay_fill():
    a = shapely.box(0, 0, 6, 6, ccw=True)
    b = shapely.Polygon([(3, 3), (9, 3), (9, 9), (3, 9)], [[(5, 5), (7, 5), (7, 7), (5, 7)]])
    m = polygons_to_mask([(a, 1), (b, 2)], shape=(10, 10), fill=255)
    assert m[1, 1] == 1 and m[4, 4] == 2 and m[8, 8] == 2
    assert m[6, 6] == 255  # in b's hole and outside a
    assert m[9, 9] == 255
    m2 = polygons_to_mask([(b, 2), (a, 1)], shape=(10, 10), fill=0)
    assert m2[4, 4] == 1 and m2[6, 6] == 0


def test_polygons_to_mask_accepts_regions_and_skips_empty_geometries():
    regions = exact(zoo_square(), 1)
    assert isinstance(regions[0], Region)
    m = polygons_to_mask([*regions, (shapely.Polygon(), 3)], shape=(8, 8), fill=0)
    np.testing.assert_array_equal(m, zoo_square())
    assert (polygons_to_mask([], shape=(3, 4), fill=7) == 7).all()


def test_outline_region_of_nothing_is_empty():
    assert outline_region(np.zeros((3, 3), bool)).is_empty
    assert outline_region(np.ones((2, 3), bool)).equals(shapely.box(0, 0, 3, 2))


# -- errors ------------------------------------------------------------------------


def test_mask_errors():
    with pytest.raises(ValueError, match="mask: expected a 2-D uint8"):
        mask_to_polygons(np.zeros((4, 4), np.int32), class_index=1)
    with pytest.raises(ValueError, match="mask: expected a 2-D uint8"):
        mask_to_polygons(np.zeros((4, 4, 3), np.uint8), class_index=1)
    with pytest.raises(ValueError, match="class_index: expected an integer 0..255"):
        mask_to_polygons(zoo_square(), class_index=256)
    with pytest.raises(ValueError, match="class_index: expected an integer 0..255"):
        mask_to_polygons(zoo_square(), class_index=1.5)
    with pytest.raises(ValueError, match="connectivity: expected 4 or 8"):
        mask_to_polygons(zoo_square(), class_index=1, connectivity=6)
    with pytest.raises(ValueError, match="simplify_tolerance_px: expected >= 0"):
        mask_to_polygons(zoo_square(), class_index=1, simplify_tolerance_px=-1)
    with pytest.raises(ValueError, match=r"max_change: expected a share in \[0, 1\]"):
        mask_to_polygons(zoo_square(), class_index=1, max_change=2)
    with pytest.raises(ValueError, match="pixels: expected a 2-D boolean array"):
        outline_region(np.zeros((2, 2, 2), bool))


def test_rasterise_errors():
    sq = shapely.box(0, 0, 2, 2)
    with pytest.raises(ValueError, match="shape: expected"):
        polygons_to_mask([(sq, 1)], shape=(4,))
    with pytest.raises(ValueError, match="fill: expected an integer 0..255"):
        polygons_to_mask([(sq, 1)], shape=(4, 4), fill=300)
    with pytest.raises(ValueError, match=r"polygons_with_classes\[0\]: expected a shapely Polygon"):
        polygons_to_mask([(shapely.Point(1, 1), 1)], shape=(4, 4))
    with pytest.raises(ValueError, match=r"polygons_with_classes\[1\]: class index must be"):
        polygons_to_mask([(sq, 1), (sq, -2)], shape=(4, 4))


def test_labels_follow_raster_order_of_first_pixels():
    m = random_blobs(np.random.default_rng(13), shape=(60, 60), n=14)
    for cls in (1, 2, 3):
        regions = exact(m, cls)
        assert [r.label for r in regions] == list(range(1, len(regions) + 1))
        firsts = [
            (r.window.row, r.window.col + int(np.argmax(r.pixels[0]))) for r in regions
        ]
        assert firsts == sorted(firsts)
