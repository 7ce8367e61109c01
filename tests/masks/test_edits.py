"""Edit footprints: strokes, polygons, connected regions."""

from __future__ import annotations

import math
from collections import deque

import numpy as np
import pytest
import shapely
from hypothesis import given, settings
from hypothesis import strategies as st
from PIL import Image
from scipy import ndimage as ndi
from skimage.draw import disk
from skimage.measure import label
from skimage.segmentation import flood

from labeler.masks.edits import (
    Patch,
    polygon_mask,
    polygon_patch,
    region_at,
    region_bounds,
    stroke_mask,
    stroke_patch,
)
from labeler.masks.vegetation import vegetation_mask
from tests.common import (
    PEANUT,
    require_dataset,
    zoo_diagonal,
    zoo_ring,
    zoo_square,
    zoo_two_touching,
)
from tests.masks.scenes import disc, plant_scene, two_hue_scene


# ------------------------------------------------------------------ slow references
def _seg_dist(p, a, b):
    (pr, pc), (ar, ac), (br, bc) = p, a, b
    dr, dc = br - ar, bc - ac
    l2 = dr * dr + dc * dc
    t = 0.0 if l2 == 0 else max(0.0, min(1.0, ((pr - ar) * dr + (pc - ac) * dc) / l2))
    return math.hypot(pr - (ar + t * dr), pc - (ac + t * dc))


def _stroke_loop(points, radius, shape):
    segs = [(points[0], points[0])] if len(points) == 1 else list(zip(points, points[1:], strict=False))
    out = np.zeros(shape, bool)
    for r in range(shape[0]):
        for c in range(shape[1]):
            out[r, c] = any(_seg_dist((r, c), a, b) <= radius + 1e-9 for a, b in segs)
    for pr, pc in points:
        r, c = math.floor(pr + 0.5), math.floor(pc + 0.5)
        if 0 <= r < shape[0] and 0 <= c < shape[1]:
            out[r, c] = True
    return out


def _polygon_loop(vertices, shape):
    n = len(vertices)
    out = np.zeros(shape, bool)
    for r in range(shape[0]):
        for c in range(shape[1]):
            inside = False
            edge = False
            for k in range(n):
                a, b = vertices[k], vertices[(k + 1) % n]
                if _seg_dist((r, c), a, b) <= 1e-9:
                    edge = True
                if a[0] != b[0] and min(a[0], b[0]) <= r < max(a[0], b[0]):
                    col = a[1] + (r - a[0]) * (b[1] - a[1]) / (b[0] - a[0])
                    if c < col:
                        inside = not inside
            out[r, c] = inside or edge
    return out


def _flood_loop(mask, seed, conn):
    steps = [(1, 0), (-1, 0), (0, 1), (0, -1)]
    if conn == 8:
        steps += [(1, 1), (1, -1), (-1, 1), (-1, -1)]
    out = np.zeros(mask.shape, bool)
    value = mask[seed]
    todo = deque([seed])
    out[seed] = True
    while todo:
        r, c = todo.popleft()
        for dr, dc in steps:
            q = (r + dr, c + dc)
            if 0 <= q[0] < mask.shape[0] and 0 <= q[1] < mask.shape[1] and not out[q] \
                    and mask[q] == value:
                out[q] = True
                todo.append(q)
    return out


# ------------------------------------------------------------------ strokes
def test_stroke_radius_1_from_1_1_to_1_6_sets_exactly_these_pixels():
    expected = np.zeros((8, 8), bool)
    expected[0, 1:7] = True  # distance 1 above the segment
    expected[1, 0:8] = True  # on the segment, plus the round caps at (1, 0) and (1, 7)
    expected[2, 1:7] = True
    got = stroke_mask([(1, 1), (1, 6)], radius=1, shape=(8, 8))
    np.testing.assert_array_equal(got, expected)
    assert got.sum() == 20


def test_dab_radius_1_is_a_plus_and_1_5_a_block():
    plus = stroke_mask([(3, 3)], radius=1.0, shape=(7, 7))
    assert plus.sum() == 5 and plus[2:5, 3].all() and plus[3, 2:5].all()
    block = stroke_mask([(3, 3)], radius=1.5, shape=(7, 7))
    np.testing.assert_array_equal(np.argwhere(block), np.argwhere(np.pad(np.ones((3, 3)), 2)))


@pytest.mark.parametrize("radius", [0.7, 2.3, 3.7, 5.5])
def test_dab_matches_skimage_disk(radius):
    # oracle: skimage.draw.disk (pixel centres strictly inside; no centre lies on these circles)
    shape = (17, 19)
    expected = np.zeros(shape, bool)
    expected[disk((8, 9), radius, shape=shape)] = True
    np.testing.assert_array_equal(stroke_mask([(8, 9)], radius=radius, shape=shape), expected)


def test_stroke_matches_slow_loop_on_random_polylines():
    rng = np.random.default_rng(3)
    for _ in range(12):
        n = int(rng.integers(1, 5))
        pts = [tuple(p) for p in rng.uniform(-3, 15, size=(n, 2))]
        radius = float(rng.uniform(0.5, 3.5))
        got = stroke_mask(pts, radius=radius, shape=(12, 13))
        np.testing.assert_array_equal(got, _stroke_loop(pts, radius, (12, 13)))


def test_fast_drag_with_two_far_samples_leaves_no_gap():
    got = stroke_mask([(2, 0), (2, 40)], radius=0.5, shape=(5, 41))
    assert got[2].all() and got.sum() == 41
    diag = stroke_mask([(0, 0), (30, 40)], radius=0.5, shape=(31, 41))
    assert label(diag, connectivity=2).max() == 1  # one 8-connected line (scikit-image label)


@settings(max_examples=40, deadline=None)
@given(
    a=st.tuples(st.floats(0, 30), st.floats(0, 30)),
    b=st.tuples(st.floats(0, 30), st.floats(0, 30)),
    radius=st.floats(0.5, 4.0),
)
def test_any_single_segment_is_one_8_connected_piece(a, b, radius):
    got = stroke_mask([a, b], radius=radius, shape=(31, 31))
    assert label(got, connectivity=2).max() == 1  # oracle: skimage.measure.label


def test_dab_between_pixel_centres_takes_the_pixel_under_it():
    got = stroke_mask([(1.5, 0.5)], radius=0.5, shape=(4, 4))
    assert np.argwhere(got).tolist() == [[2, 1]]  # pixel 2 spans rows [1.5, 2.5)


def test_stroke_is_clipped_to_the_tile():
    patch = stroke_patch([(-10, -10), (-9, -9)], radius=1, shape=(8, 8))
    assert patch.empty and patch.mask.shape == (0, 0)
    edge = stroke_mask([(-1, 3)], radius=1.0, shape=(8, 8))
    assert np.argwhere(edge).tolist() == [[0, 3]]


def test_patch_places_its_mask():
    p = Patch(2, 3, np.ones((2, 2), bool))
    assert p.slices == (slice(2, 4), slice(3, 5))
    assert p.full((5, 6)).sum() == 4 and p.full((5, 6))[2:4, 3:5].all()


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"points": [(1, 1)], "radius": 0.4, "shape": (8, 8)}, "radius: expected a brush radius"),
        ({"points": [(1, 1, 1)], "radius": 1, "shape": (8, 8)}, r"points: expected \(row, col\)"),
        ({"points": [], "radius": 1, "shape": (8, 8)}, "points: expected"),
        ({"points": [(np.nan, 1)], "radius": 1, "shape": (8, 8)}, "points: expected finite"),
        ({"points": [(1, 1)], "radius": 1, "shape": (0, 8)}, "shape: expected"),
    ],
)
def test_stroke_errors(kwargs, match):
    with pytest.raises(ValueError, match=match):
        stroke_patch(**kwargs)


# ------------------------------------------------------------------ polygons
def test_square_through_pixel_centres_includes_its_border():
    got = polygon_mask([(2, 2), (2, 5), (5, 5), (5, 2)], shape=(8, 8))
    np.testing.assert_array_equal(got, zoo_square().astype(bool))


def test_triangle_exact():
    got = polygon_mask([(0, 0), (0, 4), (4, 0)], shape=(6, 6))
    r, c = np.indices((6, 6))
    np.testing.assert_array_equal(got, (r + c) <= 4)
    assert got.sum() == 15


def test_ring_shaped_outline_with_a_slit_matches_zoo_ring_area():
    # the ring of zoo_ring traced as one outline running in and out through a zero-width slit
    outline = [(2, 2), (2, 7), (7, 7), (7, 2), (4, 2), (4, 3.5), (5.5, 3.5), (5.5, 5.5),
               (3.5, 5.5), (3.5, 3.5), (4, 3.5), (4, 2)]
    got = polygon_mask(outline, shape=(10, 10))
    ring = zoo_ring() == 2
    np.testing.assert_array_equal(got, ring)


def test_pentagram_even_odd_leaves_the_centre_out():
    angles = np.deg2rad(np.arange(5) * 144.0 - 90.0)
    star = [(10 + 9 * math.sin(a), 10 + 9 * math.cos(a)) for a in angles]
    got = polygon_mask(star, shape=(21, 21))
    assert not got[10, 10]  # the inner pentagon is wound twice
    assert got[3, 10]  # an arm near the top point
    np.testing.assert_array_equal(got, _polygon_loop(star, (21, 21)))


def _star_polygon(rng, n, centre, r_lo, r_hi):
    ang = np.sort(rng.uniform(0, 2 * np.pi, n))
    rad = rng.uniform(r_lo, r_hi, n)
    return [(centre[0] + r * math.sin(a), centre[1] + r * math.cos(a)) for a, r in zip(ang, rad, strict=True)]


def test_polygon_matches_shapely_on_random_star_shapes():
    rng = np.random.default_rng(11)
    shape = (24, 26)
    r, c = np.indices(shape)
    for _ in range(25):
        verts = _star_polygon(rng, int(rng.integers(3, 12)), (12.3, 12.7), 2.0, 13.0)
        poly = shapely.Polygon([(vc, vr) for vr, vc in verts])  # shapely takes x = col, y = row
        if not poly.is_valid:
            continue
        expected = shapely.intersects_xy(poly, c.ravel(), r.ravel()).reshape(shape)
        np.testing.assert_array_equal(polygon_mask(verts, shape=shape), expected)


def test_polygon_matches_slow_loop():
    rng = np.random.default_rng(5)
    for _ in range(6):
        verts = [tuple(v) for v in rng.uniform(-2, 12, size=(int(rng.integers(3, 7)), 2))]
        np.testing.assert_array_equal(polygon_mask(verts, shape=(10, 11)),
                                      _polygon_loop(verts, (10, 11)))


def test_polygon_errors():
    with pytest.raises(ValueError, match="vertices: expected at least 3 vertices"):
        polygon_patch([(0, 0), (1, 1)], shape=(4, 4))
    with pytest.raises(ValueError, match="shape: expected"):
        polygon_patch([(0, 0), (1, 1), (0, 1)], shape=(4,))
    assert polygon_patch([(-9, -9), (-8, -9), (-8, -8)], shape=(4, 4)).empty


# ------------------------------------------------------------------ regions
def test_region_of_two_touching_classes():
    m = zoo_two_touching()
    got = region_at(m, (3, 2)).full(m.shape)
    np.testing.assert_array_equal(got, m == 1)
    assert got.sum() == 18  # 6 rows x 3 cols (the zoo docstring says 24)


def test_diagonal_is_six_regions_by_4_and_one_by_8():
    m = zoo_diagonal()
    assert region_at(m, (2, 2), connectivity=4).full(m.shape).sum() == 1
    assert region_at(m, (2, 2), connectivity=8).full(m.shape).sum() == 6


@pytest.mark.parametrize("conn", [4, 8])
def test_region_matches_skimage_flood_and_slow_bfs(conn):
    rng = np.random.default_rng(conn)
    for _ in range(10):
        m = rng.integers(0, 3, size=(9, 11)).astype(np.uint8)
        seed = (int(rng.integers(0, 9)), int(rng.integers(0, 11)))
        got = region_at(m, seed, connectivity=conn).full(m.shape)
        # oracle: skimage.segmentation.flood, connectivity 1 = 4-neighbours, 2 = 8-neighbours
        np.testing.assert_array_equal(got, flood(m, seed, connectivity=1 if conn == 4 else 2))
        np.testing.assert_array_equal(got, _flood_loop(m, seed, conn))


def test_region_errors():
    m = zoo_square()
    with pytest.raises(ValueError, match="seed: expected a pixel inside"):
        region_at(m, (8, 0))
    with pytest.raises(ValueError, match="connectivity: expected 4 or 8"):
        region_at(m, (0, 0), connectivity=6)
    with pytest.raises(ValueError, match="mask: expected a non-empty 2-D"):
        region_at(np.zeros(5, np.uint8), (0, 0))


# ------------------------------------------------------------------ fill bounded by colour edges
# Hand-made scenes (tests/masks/scenes.py): leaf-green plants on brown soil, about 64
# Delta E*ab apart. An empty mask is all soil, so the same-class region of any click is
# the whole tile; the colour edges must bound it (common practice, no source).
def test_fill_click_on_a_plant_in_an_empty_mask_takes_the_plant():
    plant = disc((48, 48), (24, 20), 8)
    image = plant_scene((48, 48), [plant])
    got = region_at(np.zeros((48, 48), np.uint8), (24, 20), image=image).full((48, 48))
    assert not (got & ~ndi.binary_dilation(plant)).any()  # one pixel of slack on the edge
    assert (got & plant).sum() / (got | plant).sum() >= 0.95


def test_fill_click_on_soil_leaves_the_plants_out():
    plants = [disc((48, 48), (14, 14), 6), disc((48, 48), (32, 34), 7)]
    image = plant_scene((48, 48), plants)
    got = region_at(np.zeros((48, 48), np.uint8), (40, 6), image=image).full((48, 48))
    for plant in plants:
        assert not (got & ndi.binary_erosion(plant)).any()
    soil = ~ndi.binary_dilation(plants[0] | plants[1])
    assert got[soil].all()


def test_fill_on_a_flat_image_is_the_same_class_region():
    rng = np.random.default_rng(7)
    flat = np.full((9, 11, 3), 128, np.uint8)  # no colour edge at all
    for conn in (4, 8):
        m = rng.integers(0, 3, size=(9, 11)).astype(np.uint8)
        seed = (int(rng.integers(0, 9)), int(rng.integers(0, 11)))
        got = region_at(m, seed, connectivity=conn, image=flat).full(m.shape)
        # oracle: skimage.segmentation.flood (connectivity 1 = 4-neighbours, 2 = 8)
        np.testing.assert_array_equal(got, flood(m, seed, connectivity=1 if conn == 4 else 2))


def test_fill_with_the_image_stays_inside_the_same_class_region():
    rng = np.random.default_rng(8)
    for _ in range(8):
        m = rng.integers(0, 2, size=(16, 16)).astype(np.uint8)
        image = rng.integers(0, 256, size=(16, 16, 3), dtype=np.uint8)
        seed = (int(rng.integers(0, 16)), int(rng.integers(0, 16)))
        got = region_at(m, seed, image=image).full(m.shape)
        assert got[seed] and not (got & ~flood(m, seed, connectivity=1)).any()


def test_fill_click_on_a_thin_blade_takes_the_blade():
    blade = np.zeros((32, 40), bool)
    blade[15:17, 4:36] = True  # two pixels wide
    image = plant_scene((32, 40), [blade], noise_sd=3)
    got = region_at(np.zeros((32, 40), np.uint8), (15, 20), image=image).full((32, 40))
    assert not (got & ~ndi.binary_dilation(blade)).any()
    assert got[blade].mean() >= 0.9


def test_fill_image_must_be_the_tile_of_the_mask():
    with pytest.raises(ValueError, match=r"image: expected the tile of the mask, shape \(8, 8\)"):
        region_at(zoo_square(), (0, 0), image=np.zeros((8, 9, 3), np.uint8))


# ------------------------------------------------------------------ fill and the plant/soil split
# Exact answers on hand-made scenes (common practice, no source): the split is ExG - ExR > 0
# (Meyer & Neto 2008), which holds for the leaf colours here and not for the loam.
def test_fill_on_a_green_disc_takes_exactly_the_disc_and_on_soil_the_rest():
    plant = disc((48, 48), (24, 16), 9)
    image = plant_scene((48, 48), [plant])
    empty = np.zeros((48, 48), np.uint8)
    np.testing.assert_array_equal(region_at(empty, (24, 16), image=image).full(empty.shape), plant)
    np.testing.assert_array_equal(region_at(empty, (3, 40), image=image).full(empty.shape), ~plant)


def test_fill_on_two_touching_discs_of_different_hue_takes_one_disc():
    image, left, right = two_hue_scene()
    assert (ndi.binary_dilation(left) & right).any()  # they do touch
    empty = np.zeros((48, 48), np.uint8)
    np.testing.assert_array_equal(region_at(empty, (24, 14), image=image).full(empty.shape), left)
    np.testing.assert_array_equal(region_at(empty, (24, 35), image=image).full(empty.shape), right)
    # both leaves are vegetation, so the split alone joins them: the colour edge cuts
    both = region_at(empty, (24, 14), image=image, plant_edge_threshold=1e9)
    np.testing.assert_array_equal(both.full(empty.shape), left | right)


def test_fill_keeps_to_the_given_vegetation_split():
    plant = disc((48, 48), (24, 16), 9)
    image = plant_scene((48, 48), [plant])
    half = np.zeros((48, 48), bool)
    half[:24] = True  # a split that cuts the disc: the fill follows it
    got = region_at(np.zeros((48, 48), np.uint8), (20, 16), image=image, vegetation=half)
    got = got.full((48, 48))
    assert not (got & ~(plant & half)).any()
    # the two rows next to the cut look like the leaf pixels just across it, so the
    # sharpening of the split (vegetation.sharpen_split) may hand them over; none farther
    np.testing.assert_array_equal(got[:22], plant[:22])
    with pytest.raises(ValueError, match=r"vegetation: expected a bool array of shape \(48, 48\)"):
        region_at(np.zeros((48, 48), np.uint8), (0, 0), image=image, vegetation=half[:4])


@pytest.mark.dataset
def test_fill_on_peanut_plants_stays_on_the_plant_not_the_tile():
    # Open dataset: Tran & Phan, "Dense Multi-Scale Convolutional Network for Plant
    # Segmentation", IEEE Access 11, 2023 (peanut-weed, CC BY-SA 4.0), read in place.
    # Fill clicks on an empty mask at the interior point of the three largest labelled
    # plants of photo 0300. When the test was written the regions were 8.7 to 8.8 % of
    # the photo with 0.94 to 0.97 of their pixels on labelled plants; without the split
    # the same clicks took 94 % of it. Floors sit below those figures.
    folder = require_dataset(PEANUT)
    with Image.open(folder / "images" / "0300.jpg") as im:
        image = np.asarray(im.convert("RGB")).copy()
    with Image.open(folder / "labels" / "0300.png") as im:
        plants = np.asarray(im.convert("RGB")).any(axis=2)  # crop green, weed red
    empty = np.zeros(plants.shape, np.uint8)
    veg = vegetation_mask(image)
    lab, _ = ndi.label(plants)
    for k in np.argsort(-np.bincount(lab.ravel())[1:])[:3] + 1:
        depth = ndi.distance_transform_edt(lab == k)
        seed = np.unravel_index(int(np.argmax(depth)), depth.shape)
        got = region_at(empty, seed, image=image, vegetation=veg).full(plants.shape)
        assert got.mean() <= 0.15
        assert plants[got].mean() >= 0.85


def test_region_bounds_grow_by_the_pad_and_stop_at_the_array_edge():
    region = np.zeros((6, 7), bool)
    region[1, 2] = region[3, 5] = True  # by hand: rows 1..3, cols 2..5
    assert region_bounds(region) == (slice(1, 4), slice(2, 6))
    assert region_bounds(region, pad=1) == (slice(0, 5), slice(1, 7))
    assert region_bounds(region, pad=3) == (slice(0, 6), slice(0, 7))  # clipped
