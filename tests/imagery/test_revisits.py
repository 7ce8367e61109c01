"""Revisits on synthetic georeferenced pairs with a known shift, written with rasterio."""

from __future__ import annotations

from datetime import date, datetime

import numpy as np
import pytest
import rasterio
from affine import Affine

from labeler.imagery.capture_date import read_capture_time
from labeler.imagery.read import inspect_image
from labeler.imagery.revisits import (
    Footprint,
    align_revisit,
    days_apart,
    overlap_windows,
    pixel_mapping,
    revisit_pairs,
)
from labeler.imagery.tiling import Window, tile_grid

GSD = 0.01
X0, Y0 = 512000.0, 5564000.0
CRS = "EPSG:32631"
# the second flight's frame starts 23 pixels further south and 37 further east
SHIFT_ROWS, SHIFT_COLS = 23, 37


def ground(seed: int = 0) -> np.ndarray:
    """A 300 x 300 patch of textured ground (invented test data)."""
    return np.random.default_rng(seed).integers(0, 256, (300, 300, 3), dtype=np.uint8)


def write(path, image: np.ndarray, transform: Affine, crs: str, when: str) -> None:
    with rasterio.open(
        path,
        "w",
        driver="GTiff",
        height=image.shape[0],
        width=image.shape[1],
        count=3,
        dtype="uint8",
        crs=crs,
        transform=transform,
    ) as dst:
        dst.write(np.moveaxis(image, 2, 0))
        dst.update_tags(TIFFTAG_DATETIME=when)


def footprint(path) -> Footprint:
    info = inspect_image(path)
    return Footprint(
        key=path.name,
        transform=info.georef.transform,
        crs=info.georef.crs,
        height=info.height,
        width=info.width,
        captured=read_capture_time(path).when,
    )


@pytest.fixture()
def shifted_pair(tmp_path):
    g = ground()
    a = g[:200, :200]
    b = g[SHIFT_ROWS : SHIFT_ROWS + 200, SHIFT_COLS : SHIFT_COLS + 200]
    ta = Affine(GSD, 0.0, X0, 0.0, -GSD, Y0)
    tb = Affine(GSD, 0.0, X0 + SHIFT_COLS * GSD, 0.0, -GSD, Y0 - SHIFT_ROWS * GSD)
    write(tmp_path / "early.tif", a, ta, CRS, "2024:05:02 10:15:00")
    write(tmp_path / "late.tif", b, tb, CRS, "2024:05:23 14:40:00")
    return a, b, footprint(tmp_path / "early.tif"), footprint(tmp_path / "late.tif")


def _expected_share(tile: Window) -> float:
    """Share of a tile of image A that image B covers: B spans rows [23, 223) and
    columns [37, 237) of A (interval arithmetic, independent of the georeferencing)."""
    rows = max(0, min(tile.row + tile.height, 200) - max(tile.row, SHIFT_ROWS))
    cols = max(0, min(tile.col + tile.width, 200) - max(tile.col, SHIFT_COLS))
    return rows * cols / (tile.height * tile.width)


def test_revisit_pairs_see_the_same_ground(shifted_pair):
    a, b, fa, fb = shifted_pair
    assert days_apart(fa.captured, fb.captured) == 21
    tiles = {
        fa.key: tile_grid(200, 200, size=64, overlap=0),
        fb.key: tile_grid(200, 200, size=64, overlap=0),
    }
    pairs = revisit_pairs([fa, fb], tiles, min_share=0.5)
    want = [t for t in tiles[fa.key] if _expected_share(t) >= 0.5]
    assert [p.tile_a for p in pairs] == want
    for p in pairs:
        assert (p.image_a, p.image_b, p.days) == ("early.tif", "late.tif", 21)
        assert p.share == pytest.approx(_expected_share(p.tile_a))
        assert p.window_b.row == p.window_a.row - SHIFT_ROWS
        assert p.window_b.col == p.window_a.col - SHIFT_COLS
        np.testing.assert_array_equal(a[p.window_a.slices], b[p.window_b.slices])
        assert _ground(p.window_a, fa.transform) == pytest.approx(
            _ground(p.window_b, fb.transform), abs=1e-6
        )
        # the B tile chosen shares the most ground with window_b
        assert p.tile_b is not None
        areas = [
            max(0, min(t.row + 64, p.window_b.row + p.window_b.height) - max(t.row, p.window_b.row))
            * max(
                0, min(t.col + 64, p.window_b.col + p.window_b.width) - max(t.col, p.window_b.col)
            )
            for t in tiles[fb.key]
        ]
        assert areas[tiles[fb.key].index(p.tile_b)] == max(areas)


def test_other_crs_with_another_false_easting(shifted_pair):
    # UTM zone 31N (EPSG:32631) is the transverse Mercator with lon_0 = 3, k = 0.9996,
    # false easting 500 000 m (UTM definition). The same projection written with a false
    # easting of 600 000 m gives eastings larger by exactly 100 000 m, so the windows must
    # be those found in the shared CRS.
    _, _, fa, fb = shifted_pair
    other = "+proj=tmerc +lat_0=0 +lon_0=3 +k=0.9996 +x_0=600000 +y_0=0 +datum=WGS84 +units=m"
    t = fb.transform
    fb2 = Footprint(
        fb.key, Affine(t.a, t.b, t.c + 100000.0, t.d, t.e, t.f), other, 200, 200, fb.captured
    )
    m = pixel_mapping(fa, fb2)
    np.testing.assert_allclose(
        [m.a, m.b, m.c, m.d, m.e, m.f], [1, 0, -SHIFT_COLS, 0, 1, -SHIFT_ROWS], atol=1e-5
    )
    tile = Window(64, 64, 64, 64)
    assert overlap_windows(fa, tile, fb2) == overlap_windows(fa, tile, fb)


def test_align_a_turned_and_coarser_revisit(shifted_pair):
    a, b, fa, fb = shifted_pair
    # the second flight's image stored a quarter turn counter-clockwise (np.rot90): its
    # pixel (row y, col x) shows the unturned pixel (x, 200 - y), so T = T_b * M with
    # M (col, row) = (200 - row, col)
    turned = np.rot90(b)
    fb_turned = Footprint(
        "turned", fb.transform @ Affine(0, -1, 200, 1, 0, 0), CRS, 200, 200, fb.captured
    )
    tile = Window(64, 64, 64, 64)
    wa, wb = overlap_windows(fa, tile, fb_turned)
    assert wa == tile
    got = align_revisit(
        turned[wb.slices], window_a=wa, window_b=wb, mapping=pixel_mapping(fa, fb_turned)
    )
    np.testing.assert_array_equal(got, a[wa.slices])
    # a revisit flown twice as high: 2 x 2 blocks averaged, pixel size 0.02 m; the tile's
    # edges fall between coarse pixels, so the windows agree on the ground to within one
    # coarse pixel
    coarse = b.reshape(100, 2, 100, 2, 3).mean(axis=(1, 3))
    fb_coarse = Footprint("coarse", fb.transform @ Affine.scale(2.0), CRS, 100, 100, fb.captured)
    wa, wb = overlap_windows(fa, tile, fb_coarse)
    assert _ground(wa, fa.transform) == pytest.approx(_ground(wb, fb_coarse.transform), abs=0.02)
    back = align_revisit(
        coarse[wb.slices], window_a=wa, window_b=wb, mapping=pixel_mapping(fa, fb_coarse)
    )
    assert back.shape == a[wa.slices].shape
    # slow reference: bilinear sampling written out, pixel centres at index + 0.5
    mapping = pixel_mapping(fa, fb_coarse)
    crop = coarse[wb.slices]
    for i in range(2, wa.height - 2, 3):
        for k in range(2, wa.width - 2, 3):
            x = mapping.a * (wa.col + k + 0.5) + mapping.c - wb.col - 0.5
            y = mapping.e * (wa.row + i + 0.5) + mapping.f - wb.row - 0.5
            x0, y0 = int(np.floor(x)), int(np.floor(y))
            fx, fy = x - x0, y - y0
            want = (
                crop[y0, x0] * (1 - fx) * (1 - fy)
                + crop[y0, x0 + 1] * fx * (1 - fy)
                + crop[y0 + 1, x0] * (1 - fx) * fy
                + crop[y0 + 1, x0 + 1] * fx * fy
            )
            np.testing.assert_allclose(back[i, k], want, atol=0.02)


def _ground(window: Window, t: Affine) -> tuple[float, float, float, float]:
    """West, south, east, north of a window of a north-up image (GDAL's pixel-corner
    geotransform: x = c + a * col, y = f + e * row, written out)."""
    assert t.b == t.d == 0 and t.e < 0
    west, east = t.c + t.a * window.col, t.c + t.a * (window.col + window.width)
    north, south = t.f + t.e * window.row, t.f + t.e * (window.row + window.height)
    return west, south, east, north


def test_no_pairs_on_the_same_date_or_without_overlap(shifted_pair):
    _, _, fa, fb = shifted_pair
    tiles = {fa.key: tile_grid(200, 200, size=64, overlap=0)}
    same_day = Footprint(fb.key, fb.transform, fb.crs, 200, 200, datetime(2024, 5, 2, 18, 0))
    assert revisit_pairs([fa, same_day], tiles) == []
    undated = Footprint(fb.key, fb.transform, fb.crs, 200, 200, None)
    assert revisit_pairs([fa, undated], tiles) == []
    far = Footprint(
        fb.key, fb.transform @ Affine.translation(5000, 0), fb.crs, 200, 200, fb.captured
    )
    assert revisit_pairs([fa, far], tiles) == []
    assert revisit_pairs([fa, fb], tiles, min_days=22) == []
    assert len(revisit_pairs([fa, fb], tiles, min_days=21)) > 0
    assert overlap_windows(fa, Window(0, 0, 20, 20), fb) is None  # corner B does not cover


def test_days_apart_counts_calendar_days():
    assert days_apart(datetime(2024, 5, 2, 23, 59), datetime(2024, 5, 3, 0, 1)) == 1
    assert days_apart(date(2024, 6, 1), datetime(2024, 5, 2, 8, 0)) == 30


def test_errors(shifted_pair):
    _, _, fa, fb = shifted_pair
    tiles = {fa.key: [Window(0, 0, 64, 64)]}
    with pytest.raises(ValueError, match="min_share: expected a share in"):
        revisit_pairs([fa, fb], tiles, min_share=0.0)
    with pytest.raises(ValueError, match="min_days: expected at least 1"):
        revisit_pairs([fa, fb], tiles, min_days=0)
    with pytest.raises(ValueError, match="two footprints share a key"):
        revisit_pairs([fa, fa], tiles)
    local = Footprint("local", fb.transform, None, 200, 200, fb.captured)
    with pytest.raises(ValueError, match="footprint 'local': has no coordinate reference system"):
        revisit_pairs([fa, local], tiles)
    with pytest.raises(ValueError, match="crop_b: expected the shape of window_b"):
        align_revisit(
            np.zeros((3, 3, 3), np.uint8),
            window_a=Window(0, 0, 4, 4),
            window_b=Window(0, 0, 4, 4),
            mapping=Affine.identity(),
        )
