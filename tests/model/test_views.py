"""Field views keep their correspondence: recorded geometry against the pixels."""

from __future__ import annotations

import numpy as np
import pytest

from labeler.masks.vegetation import vegetation_mask
from labeler.model.views import (
    ColourJitter,
    ViewGeometry,
    apply_geometry,
    cell_pairs,
    default_view_size,
    field_views,
)

SOIL = (120, 90, 60)
GREEN = (50, 160, 40)


def soil_tile(size: int = 128) -> np.ndarray:
    t = np.empty((size, size, 3), np.uint8)
    t[:] = SOIL
    return t


def coordinate_tile(size: int = 128) -> np.ndarray:
    """Red = row, green = column of each pixel (values exact up to 255)."""
    rows, cols = np.mgrid[:size, :size]
    return np.stack([rows, cols, np.zeros_like(rows)], axis=2).astype(np.uint8)


def test_marker_lands_where_the_geometry_says():
    # a painted 4 x 4 red marker on uniform soil; its centre is at (52, 72) in the tile
    tile = soil_tile()
    tile[100:112, 10:22] = GREEN  # plants, so the plant rule is active too
    tile[50:54, 70:74] = (255, 0, 0)
    seen = 0
    for seed in range(60):
        pair = field_views(tile, rng=np.random.default_rng(seed), size=64, jitter=None)
        for view, g in ((pair.a, pair.geometry_a), (pair.b, pair.geometry_b)):
            y, x = g.from_source(52.0, 72.0)
            margin = min(y, x, g.size - y, g.size - x)
            f = view.astype(np.float64)
            redness = np.clip(f[..., 0] - f[..., 1] - (SOIL[0] - SOIL[1]), 0, None)
            if margin >= 4:
                # weighted centroid of the marker (pixel centres at index + 0.5): the
                # resize is linear, so the centroid moves with the geometry
                rr, cc = np.mgrid[: g.size, : g.size] + 0.5
                w = redness / redness.sum()
                assert (w * rr).sum() == pytest.approx(float(y), abs=0.5)
                assert (w * cc).sum() == pytest.approx(float(x), abs=0.5)
                seen += 1
            elif margin <= -4 * g.scale - 1:
                assert redness.max() == 0  # the marker is outside this view
    assert seen >= 30


def test_pixels_hold_the_source_coordinates_the_geometry_gives():
    tile = coordinate_tile()
    plants = np.zeros(tile.shape[:2], bool)
    for seed in range(20):
        pair = field_views(
            tile, rng=np.random.default_rng(seed), size=64, plants=plants, jitter=None
        )
        for view, g in ((pair.a, pair.geometry_a), (pair.b, pair.geometry_b)):
            rr, cc = np.mgrid[1:63, 1:63] + 0.5  # interior pixel centres
            y, x = g.to_source(rr, cc)
            # pixel (r, c) holds value r at its centre r + 0.5: the value at y is y - 0.5
            got = view[1:63, 1:63].astype(np.float64)
            np.testing.assert_allclose(got[..., 0], y - 0.5, atol=1.0)
            np.testing.assert_allclose(got[..., 1], x - 0.5, atol=1.0)


@pytest.mark.parametrize("turns", [0, 1, 2, 3])
@pytest.mark.parametrize("flip", [False, True])
def test_from_source_inverts_to_source(turns, flip):
    g = ViewGeometry(row=7, col=11, side=90, size=64, flip=flip, turns=turns)
    rng = np.random.default_rng(turns + 4 * flip)
    r, c = rng.uniform(0, 64, 50), rng.uniform(0, 64, 50)
    back = g.from_source(*g.to_source(r, c))
    np.testing.assert_allclose(back[0], r, atol=1e-9)
    np.testing.assert_allclose(back[1], c, atol=1e-9)


def test_quarter_turn_matches_numpy_rot90():
    # common practice, no source: np.rot90 turns counter-clockwise, (i, j) <- (j, n-1-i)
    tile = coordinate_tile(64)
    g = ViewGeometry(row=0, col=0, side=64, size=64, flip=False, turns=1)
    view = apply_geometry(tile, g)
    np.testing.assert_array_equal(view, np.rot90(tile))
    y, x = g.to_source(np.array([0.5]), np.array([0.5]))  # top-left view pixel
    assert (y[0], x[0]) == (0.5, 63.5)  # comes from the top-right source pixel


def _cell_pairs_loop(ga: ViewGeometry, gb: ViewGeometry, stride: int) -> set[tuple[int, int]]:
    """Slow reference: for each A cell centre, search every B cell whose footprint
    (mapped to the source with ``to_source`` only) holds that ground."""
    na, nb = ga.size // stride, gb.size // stride
    out = set()
    for i in range(na):
        for j in range(na):
            sr, sc = ga.to_source(np.array([(i + 0.5) * stride]), np.array([(j + 0.5) * stride]))
            for p in range(nb):
                for q in range(nb):
                    corners = gb.to_source(
                        np.array([p, p, p + 1, p + 1]) * stride,
                        np.array([q, q + 1, q, q + 1]) * stride,
                    )
                    lo_r, hi_r = corners[0].min(), corners[0].max()
                    lo_c, hi_c = corners[1].min(), corners[1].max()
                    # half-open cells in view B: which side is closed depends on the turn,
                    # so test the interior with a tiny tolerance and skip exact edges
                    if lo_r < sr[0] < hi_r and lo_c < sc[0] < hi_c:
                        out.add((i * na + j, p * nb + q))
    return out


@pytest.mark.parametrize("seed", range(6))
def test_cell_pairs_against_a_loop(seed):
    rng = np.random.default_rng(seed)
    ga = ViewGeometry(
        3, 5, int(rng.integers(40, 90)), 64, bool(rng.integers(2)), int(rng.integers(4))
    )
    gb = ViewGeometry(
        int(rng.integers(0, 20)),
        int(rng.integers(0, 20)),
        int(rng.integers(40, 90)),
        64,
        bool(rng.integers(2)),
        int(rng.integers(4)),
    )
    for stride in (8, 16, 32):
        got = {tuple(p) for p in cell_pairs(ga, gb, stride=stride).tolist()}
        want = _cell_pairs_loop(ga, gb, stride)
        assert want <= got  # every strictly interior match is found
        assert len(got - want) <= 2 * (64 // stride)  # only centres on a B cell edge differ


def test_cell_pairs_see_the_same_ground():
    tile = coordinate_tile()
    plants = np.zeros(tile.shape[:2], bool)
    for seed in range(10):
        pair = field_views(
            tile, rng=np.random.default_rng(seed), size=64, plants=plants, jitter=None
        )
        pairs = pair.cell_pairs(16)
        assert len(pairs) > 0
        for ca, cb in pairs:
            # source coordinates read from the pixels at the centre of each cell
            ia, ja = divmod(int(ca), 4)
            ib, jb = divmod(int(cb), 4)
            va = pair.a[ia * 16 + 8, ja * 16 + 8, :2].astype(float)
            vb = pair.b[ib * 16 + 8, jb * 16 + 8, :2].astype(float)
            # the B cell holds A's cell centre: at most half a B cell (in source px) away
            reach = 8 * pair.geometry_b.scale + 1.5
            assert np.all(np.abs(va - vb) <= reach)


def test_crops_hold_plants_when_the_tile_has_them():
    tile = soil_tile()
    tile[118:124, 4:12] = GREEN  # 48 plant pixels in a corner
    truth = np.zeros(tile.shape[:2], bool)
    truth[118:124, 4:12] = True
    for seed in range(40):
        pair = field_views(tile, rng=np.random.default_rng(seed), size=32)
        for view, g in ((pair.a, pair.geometry_a), (pair.b, pair.geometry_b)):
            assert truth[g.row : g.row + g.side, g.col : g.col + g.side].sum() >= 16
            assert vegetation_mask(view, min_object_px=0).any()


def test_bare_soil_tile_still_gives_views():
    pair = field_views(soil_tile(), rng=np.random.default_rng(0))
    assert pair.a.shape == pair.b.shape == (96, 96, 3)
    assert default_view_size(128, 200) == 96
    assert default_view_size(256, 256) == 128
    assert default_view_size(40, 40) == 32


def test_crops_overlap_as_asked():
    tile = coordinate_tile()
    plants = np.zeros(tile.shape[:2], bool)
    for seed in range(30):
        pair = field_views(
            tile, rng=np.random.default_rng(seed), size=32, plants=plants, min_overlap=0.5
        )
        a, b = pair.geometry_a, pair.geometry_b
        dr = min(a.row + a.side, b.row + b.side) - max(a.row, b.row)
        dc = min(a.col + a.side, b.col + b.side) - max(a.col, b.col)
        assert max(dr, 0) * max(dc, 0) >= 0.5 * min(a.side, b.side) ** 2


def test_view_b_comes_from_the_revisit():
    tile = coordinate_tile()
    other = 255 - tile
    plants = np.zeros(tile.shape[:2], bool)
    pair = field_views(
        tile,
        rng=np.random.default_rng(3),
        other=other,
        plants=plants,
        plants_other=plants,
        size=64,
        jitter=None,
    )
    np.testing.assert_array_equal(pair.a, apply_geometry(tile, pair.geometry_a))
    np.testing.assert_array_equal(pair.b, apply_geometry(other, pair.geometry_b))


def test_jitter_without_range_changes_nothing_and_is_seeded():
    tile = soil_tile()
    tile[40:60, 40:60] = GREEN
    still = ColourJitter(0.0, 0.0, 0.0, 0.0, 0.0)
    plain = field_views(tile, rng=np.random.default_rng(5), jitter=None)
    same = field_views(tile, rng=np.random.default_rng(5), jitter=still)
    np.testing.assert_array_equal(plain.a, same.a)
    one = field_views(tile, rng=np.random.default_rng(5))
    two = field_views(tile, rng=np.random.default_rng(5))
    np.testing.assert_array_equal(one.a, two.a)
    np.testing.assert_array_equal(one.b, two.b)
    assert one.geometry_a == plain.geometry_a  # jitter draws come after the geometry
    assert not np.array_equal(one.a, plain.a)


def test_view_errors():
    tile = soil_tile()
    rng = np.random.default_rng(0)
    with pytest.raises(ValueError, match="tile: expected uint8 RGB"):
        field_views(tile.astype(np.float32), rng=rng)
    with pytest.raises(ValueError, match="other: expected uint8 of the tile's shape"):
        field_views(tile, rng=rng, other=tile[:64])
    with pytest.raises(ValueError, match="plants: expected a mask of shape"):
        field_views(tile, rng=rng, plants=np.zeros((3, 3), bool))
    with pytest.raises(ValueError, match="size: expected a positive multiple of 32"):
        field_views(tile, rng=rng, size=50)
    with pytest.raises(ValueError, match="scale_range"):
        field_views(tile, rng=rng, scale_range=(1.5, 1.0))
    with pytest.raises(ValueError, match="min_overlap"):
        field_views(tile, rng=rng, min_overlap=1.5)
    g = ViewGeometry(0, 0, 64, 64, False, 0)
    with pytest.raises(ValueError, match="stride: expected a positive divisor"):
        cell_pairs(g, g, stride=24)
    with pytest.raises(ValueError, match="leaves the source"):
        apply_geometry(tile, ViewGeometry(100, 0, 64, 64, False, 0))
