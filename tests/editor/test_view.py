"""View geometry: the tile <-> view transform, fitting, zoom, pan and the two panes."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from labeler.editor.view import (
    PANE_GAP,
    ZOOM_RANGE,
    Viewport,
    ViewTransform,
    check_view_shape,
    fit_view_shape,
)


def test_fit_is_centred_and_maps_corners():
    t = ViewTransform.fit((8, 16), (64, 64))
    assert t.zoom == 4.0 and t.origin_col == 0.0 and t.origin_row == pytest.approx(-4.0)
    assert t.pixel_at(16, 0) == (0, 0) and t.pixel_at(15, 0) == (-1, 0)
    assert t.pixel_at(63 - 16, 63) == (7, 15)


@settings(max_examples=50, deadline=None)
@given(zoom=st.floats(0.1, 20), orow=st.floats(-50, 50), ocol=st.floats(-50, 50),
       vr=st.floats(-100, 1000), vc=st.floats(-100, 1000))
def test_view_and_tile_coordinates_are_inverse(zoom, orow, ocol, vr, vc):
    t = ViewTransform(zoom, orow, ocol)
    tr, tc = t.view_to_tile(vr, vc)
    back = t.tile_to_view(tr, tc)
    np.testing.assert_allclose(back, (vr, vc), atol=1e-7 * max(1.0, abs(vr), abs(vc)))
    # the pixel a view point shows is the one whose square holds the tile point
    pr, pc = t.pixel_at(math.floor(vr), math.floor(vc))
    tr0, tc0 = t.view_to_tile(math.floor(vr), math.floor(vc))
    assert pr - 0.5 <= tr0 + 1e-9 and tr0 < pr + 0.5 + 1e-9
    assert pc - 0.5 <= tc0 + 1e-9 and tc0 < pc + 0.5 + 1e-9


def test_zoom_keeps_the_point_under_the_pointer_and_pan_moves_content():
    t = ViewTransform.fit((8, 8), (64, 64))
    before = t.view_to_tile(20.0, 40.0)
    z = t.zoomed(2.5, at=(20.0, 40.0))
    np.testing.assert_allclose(z.view_to_tile(20.0, 40.0), before, atol=1e-12)
    p = z.panned(10, -6)
    np.testing.assert_allclose(p.view_to_tile(30.0, 34.0), before, atol=1e-12)


def test_zoom_stops_at_its_range():
    t = ViewTransform(1.0)
    assert t.zoomed(1000.0, at=(0.0, 0.0)).zoom == ZOOM_RANGE[1]
    assert t.zoomed(1e-6, at=(0.0, 0.0)).zoom == ZOOM_RANGE[0]


def test_index_map_matches_pixel_at_and_marks_outside():
    t = ViewTransform(3.0, -1.0, 2.5)
    rows = t.index_map(20, 5, axis=0)
    cols = t.index_map(20, 9, axis=1)
    for v in range(20):  # slow loop reference: pixel_at per view pixel
        pr, pc = t.pixel_at(v, v)
        assert rows[v] == (pr if 0 <= pr < 5 else -1)
        assert cols[v] == (pc if 0 <= pc < 9 else -1)


def test_fit_view_shape():
    assert fit_view_shape((256, 256)) == (768, 768)  # whole zoom 3 fits 900 x 1200
    assert fit_view_shape((64, 64)) == (512, 512)  # capped at zoom 8
    assert fit_view_shape((1024, 2048)) == (600, 1200)  # scaled down to fit
    assert fit_view_shape((1, 1), max_zoom=2) == (8, 8)  # never under 8 x 8
    with pytest.raises(ValueError, match="expected positive sizes"):
        fit_view_shape((0, 5))


def test_viewport_split_halves_the_view_and_finds_the_pane():
    vp = Viewport((8, 8), (64, 132))
    assert vp.pane_shape == (64, 132) and vp.pane_offsets == (0,)
    assert vp.pane_of((10, 100)) == (0, 10.0, 100.0)
    vp.set_split(True)
    assert vp.pane_shape == (64, 64) and vp.pane_offsets == (0, 64 + PANE_GAP)
    assert vp.transform == ViewTransform.fit((8, 8), (64, 64))
    right = 64 + PANE_GAP
    assert vp.pane_of((10, right + 5)) == (1, 10.0, 5.0)
    assert vp.pane_of((10, 65))[0] == -1
    assert vp.pane_of((10, 63)) == (0, 10.0, 63.0)


def test_viewport_zoom_in_the_right_pane_is_about_the_same_tile_point():
    vp = Viewport((8, 8), (64, 132))
    vp.set_split(True)
    right = 64 + PANE_GAP
    before = vp.transform.view_to_tile(20.0, 30.0)
    vp.zoom_at((20.0, right + 30.0), 2.0)
    np.testing.assert_allclose(vp.transform.view_to_tile(20.0, 30.0), before, atol=1e-12)
    vp.pan(4, 4)
    vp.fit()
    assert vp.transform == ViewTransform.fit((8, 8), (64, 64))


def test_viewport_resize_refits_and_checks_the_size():
    vp = Viewport((8, 16), (64, 64))
    vp.resize((32, 64))
    assert vp.view_shape == (32, 64) and vp.transform.zoom == 4.0
    with pytest.raises(ValueError, match=r"view_shape: expected \(rows, cols\) of at least 8"):
        vp.resize((4, 64))
    with pytest.raises(ValueError, match="view_shape: expected"):
        check_view_shape((64,))
    with pytest.raises(ValueError, match="zoom: expected a positive number"):
        ViewTransform(0.0)
    with pytest.raises(ValueError, match="tile_shape, view_shape: expected sizes"):
        ViewTransform.fit((0, 8), (8, 8))


def test_fit_view_shape_for_panes_side_by_side_leaves_no_bands():
    # 256 px tiles, 3 panes in 1200 columns: (1200 - 2 * gap) // 3 = 397 columns a pane,
    # whole zoom 1; the view is exactly three tiles and two gaps wide
    assert fit_view_shape((256, 256), panes=3) == (256, 3 * 256 + 2 * PANE_GAP)
    # 64 px tiles, 2 panes: zoom min(900 // 64, 598 // 64) = 9 capped at 8
    assert fit_view_shape((64, 64), panes=2) == (512, 2 * 512 + PANE_GAP)
    assert fit_view_shape((64, 64), panes=1) == fit_view_shape((64, 64))
    with pytest.raises(ValueError, match="panes: expected 1 or more"):
        fit_view_shape((64, 64), panes=0)
    # each pane of the fitted view shows the whole tile and nothing beside it
    vp = Viewport((256, 256), fit_view_shape((256, 256), panes=3))
    vp.set_panes(3)
    assert vp.pane_shape == (256, 256)
    assert vp.transform == ViewTransform(1.0, 0.0, 0.0)


def test_viewport_three_panes_find_the_pane():
    vp = Viewport((8, 8), (64, 3 * 64 + 2 * PANE_GAP))
    vp.set_panes(3)
    step = 64 + PANE_GAP
    assert vp.split and vp.panes == 3 and vp.pane_shape == (64, 64)
    assert vp.pane_offsets == (0, step, 2 * step)
    assert vp.pane_of((5, 10)) == (0, 5.0, 10.0)
    assert vp.pane_of((5, 64 + 1)) == (-1, 5.0, 65.0)  # in the first gap
    assert vp.pane_of((5, step + 3)) == (1, 5.0, 3.0)
    assert vp.pane_of((5, 2 * step + 63)) == (2, 5.0, 63.0)
    assert vp.pane_of((5, 3 * step + 20))[0] == 2  # right of the view: the last pane
    assert vp.pane_of((5, -3)) == (0, 5.0, -3.0)
    with pytest.raises(ValueError, match="panes: expected 1 or more"):
        vp.set_panes(0)
    vp.set_split(False)
    assert vp.panes == 1 and vp.pane_offsets == (0,)
