"""Crop-row detection on vegetation masks."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from PIL import Image

from labeler.masks.rows import RowPattern, detect_rows, projection_contrast
from tests.common import REPO

DEMO = REPO / "demo_fields"

def _load(path, mode: str | None = None) -> np.ndarray:
    """Pixels of an image file (closed again at once)."""
    with Image.open(path) as im:
        return np.asarray(im if mode is None else im.convert(mode)).copy()



def _bands(shape, angle_deg, spacing, half_width, phase=7.0):
    """Straight bands ``|t - (phase + k spacing)| <= half_width`` (module convention)."""
    r, c = np.indices(shape, dtype=np.float64)
    th = math.radians(angle_deg)
    t = r * math.cos(th) + c * math.sin(th)
    return np.abs(((t - phase) + spacing / 2) % spacing - spacing / 2) <= half_width


def _angle_error(a, b):
    d = abs(a - b) % 180.0
    return min(d, 180.0 - d)


@pytest.mark.parametrize(
    ("angle", "spacing", "half_width"),
    [
        (0.0, 30.0, 5.0),
        (20.0, 40.0, 6.0),
        (90.0, 50.0, 8.0),
        (135.0, 37.5, 6.0),
        (172.0, 60.0, 9.0),
    ],
)
def test_straight_bands_give_their_angle_spacing_and_offsets(angle, spacing, half_width):
    # hand-made bands with an exact answer (common practice, no source)
    m = _bands((200, 300), angle, spacing, half_width)
    rows = detect_rows(m)
    assert rows is not None
    assert _angle_error(rows.angle_deg, angle) <= 1.0
    assert abs(rows.spacing_px - spacing) <= 1.0
    # each found offset lies on the lattice 7 + k * spacing (direction may flip by 180)
    th = math.radians(rows.angle_deg)
    sign = 1.0 if math.cos(th - math.radians(angle)) > 0 else -1.0
    for off in rows.offsets:
        phase = ((sign * off - 7.0) + spacing / 2) % spacing - spacing / 2
        assert abs(phase) <= 1.0
    # a band's pixels reach half_width + 0.5 px from the centre line
    assert abs(rows.half_width_px - (half_width + 0.5)) <= 2.0
    assert rows.periodicity > 0.9
    # straight rows: the fitted curve strays less than a pixel over the frame
    assert abs(rows.bow[0]) + abs(rows.bow[1]) <= 1.0


def test_band_mask_covers_the_bands():
    m = _bands((180, 240), 25.0, 45.0, 7.0)
    rows = detect_rows(m)
    band = rows.band_mask()
    assert (band & m).sum() / m.sum() >= 0.98
    # the estimated half-width may exceed a sharp band's by up to a pixel (band_level)
    assert rows.half_width_px - 7.0 <= 1.0
    assert (band & ~m).sum() / (~m).sum() <= 2 * 1.0 / (45.0 - 14.0)


def test_gaps_in_rows_do_not_hide_them():
    m = _bands((240, 320), 12.0, 48.0, 8.0)
    rng = np.random.default_rng(3)
    # cut 30 random stretches of 40 px along the columns out of the rows
    for _ in range(30):
        r0, c0 = int(rng.integers(0, 220)), int(rng.integers(0, 280))
        m[r0 : r0 + 20, c0 : c0 + 40] = False
    rows = detect_rows(m)
    assert _angle_error(rows.angle_deg, 12.0) <= 1.0
    assert abs(rows.spacing_px - 48.0) <= 1.0


def test_bowed_rows_are_followed():
    # rows bent by up to 10 px over the frame: the fitted bow keeps them in their bands
    shape = (240, 360)
    r, c = np.indices(shape, dtype=np.float64)
    x = (c - 180.0) / 180.0
    t = r - 10.0 * x * x
    m = np.abs((t - 20.0 + 30.0) % 60.0 - 30.0) <= 6.0
    rows = detect_rows(m)
    assert _angle_error(rows.angle_deg, 0.0) <= 1.0
    assert abs(rows.spacing_px - 60.0) <= 1.0
    band = rows.band_mask()
    assert (band & m).sum() / m.sum() >= 0.97
    straight = detect_rows(m, fit_bow=False)
    assert (straight.band_mask() & m).sum() < (band & m).sum()


def test_window_bands_equal_the_cut_of_the_image_bands():
    m = _bands((200, 260), 33.0, 40.0, 6.0)
    rows = detect_rows(m)
    whole = rows.band_mask()
    for r0, c0, h, w in [(0, 0, 64, 64), (37, 101, 80, 90), (136, 196, 64, 64)]:
        tile = rows.band_mask((h, w), origin=(r0, c0))
        np.testing.assert_array_equal(tile, whole[r0 : r0 + h, c0 : c0 + w])


def test_distance_matches_a_loop_reference():
    pattern = RowPattern(
        angle_deg=30.0, spacing_px=20.0, half_width_px=4.0, offsets=(3.0, 23.0, 43.0),
        bow=(1.5, -2.0), s_mid=5.0, s_scale=12.0, periodicity=1.0, shape=(9, 11),
    )
    got = pattern.distance()
    th = math.radians(30.0)
    for i in range(9):
        for j in range(11):
            t = i * math.cos(th) + j * math.sin(th)
            s = -i * math.sin(th) + j * math.cos(th)
            x = (s - 5.0) / 12.0
            u = t - (1.5 * x - 2.0 * x * x)
            expected = min(abs(u - o) for o in (3.0, 23.0, 43.0))
            assert got[i, j] == pytest.approx(expected, abs=1e-9)
    np.testing.assert_array_equal(pattern.band_mask(), got <= 4.0)
    np.testing.assert_array_equal(pattern.band_mask(half_width_px=1.0), got <= 1.0)


def test_centre_lines_lie_on_the_rows_inside_the_window():
    m = _bands((150, 200), 70.0, 35.0, 5.0)
    rows = detect_rows(m)
    lines = rows.centre_lines((60, 80), origin=(40, 50))
    assert len(lines) >= 2
    dist = rows.distance()
    for pts in lines:
        assert pts.shape[1] == 2
        assert (pts[:, 0] >= -0.5).all() and (pts[:, 0] <= 59.5).all()
        assert (pts[:, 1] >= -0.5).all() and (pts[:, 1] <= 79.5).all()
        rr = np.clip(np.rint(pts[:, 0] + 40).astype(int), 0, 149)
        cc = np.clip(np.rint(pts[:, 1] + 50).astype(int), 0, 199)
        assert (dist[rr, cc] <= 1.0).all()  # rounding to a pixel moves at most 0.71 px


def test_projection_contrast_peaks_at_the_row_angle():
    m = _bands((120, 160), 40.0, 30.0, 5.0)
    assert projection_contrast(m, 40.0) > 5 * projection_contrast(m, 130.0)
    assert projection_contrast(np.zeros((10, 10), bool), 0.0) == 0.0
    assert projection_contrast(np.ones((10, 10), bool), 0.0) == 0.0


def test_no_rows_in_empty_full_or_patternless_masks():
    assert detect_rows(np.zeros((100, 100), bool)) is None
    assert detect_rows(np.ones((100, 100), bool)) is None
    rng = np.random.default_rng(5)
    assert detect_rows(rng.random((200, 200)) < 0.2) is None  # salt: no periodicity


def test_rows_of_the_committed_demo_plots():
    # the demo generator records each plot's true row angle and spacing (invented data)
    manifest = json.loads((DEMO / "scenario.json").read_text())
    for entry in manifest["plots"][:3]:
        truth = _load(DEMO / entry["truth"])
        rows = detect_rows(truth == 1)
        assert _angle_error(rows.angle_deg, entry["row_angle_deg"]) <= 1.0
        assert abs(rows.spacing_px - entry["row_spacing_px"]) <= 2.0


def test_errors_name_the_parameter():
    m = _bands((60, 60), 0.0, 20.0, 3.0)
    with pytest.raises(ValueError, match=r"vegetation: expected a 2-D mask of shape \(H, W\)"):
        detect_rows(np.zeros((4, 4, 3), bool))
    with pytest.raises(ValueError, match="vegetation: expected a boolean mask, got dtype uint8"):
        detect_rows(m.astype(np.uint8))
    with pytest.raises(ValueError, match="min_spacing_px: expected a positive spacing"):
        detect_rows(m, min_spacing_px=0)
    with pytest.raises(ValueError, match="max_spacing_px: expected more than min_spacing_px"):
        detect_rows(m, min_spacing_px=20, max_spacing_px=10)
    with pytest.raises(ValueError, match=r"band_level: expected a fraction in \(0, 1\)"):
        detect_rows(m, band_level=1.0)
    with pytest.raises(ValueError, match="half_width_px: expected a width >= 0"):
        detect_rows(m, half_width_px=-1)
    rows = detect_rows(m)
    with pytest.raises(ValueError, match="half_width_px: expected a width >= 0"):
        rows.band_mask(half_width_px=-2)
    with pytest.raises(ValueError, match="shape: expected"):
        rows.distance((0, 5))
    with pytest.raises(ValueError, match="step_px: expected a positive step"):
        rows.centre_lines(step_px=0)
    with pytest.raises(ValueError, match="bin_px: expected a positive bin width"):
        projection_contrast(m, 0.0, bin_px=0)
