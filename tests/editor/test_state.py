"""The editor's pure state: every operation on tiny arrays, undo/redo, counters, view, render."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from skimage import data

from labeler.classes import DEFAULT_SCHEMA, hex_to_rgb
from labeler.editor.state import PANE_GAP, EditorState, ViewTransform
from labeler.masks.edits import stroke_mask
from tests.common import zoo_diagonal, zoo_square, zoo_two_touching

CROP_BGR = hex_to_rgb("#0072B2")[::-1]  # DESIGN section 2 palette (Okabe & Ito 2008)
WEED_BGR = hex_to_rgb("#E69F00")[::-1]


def _image(shape=(8, 8), seed=0):
    rng = np.random.default_rng(seed)
    return rng.integers(0, 256, size=(*shape, 3), dtype=np.uint8)


def _state(proposal=None, shape=(8, 8), **kw):
    proposal = np.zeros(shape, np.uint8) if proposal is None else proposal
    kw.setdefault("view_shape", (64, 64))
    return EditorState(_image(proposal.shape), proposal, **kw)


class FakeClock:
    def __init__(self):
        self.t = 0.0

    def __call__(self):
        return self.t


# ------------------------------------------------------------------ edits
def test_brush_stroke_radius_1_from_1_1_to_1_6():
    s = _state(radius=1, active_class=2)
    assert s.paint([(1, 1), (1, 6)])
    expected = np.zeros((8, 8), np.uint8)
    expected[0, 1:7] = 2
    expected[1, 0:8] = 2
    expected[2, 1:7] = 2
    np.testing.assert_array_equal(s.mask, expected)
    assert s.changed and s.actions == 1


def test_fast_drag_samples_far_apart_leave_no_gap():
    s = _state(shape=(5, 40), radius=0.5)
    s.stroke_start((2, 0))
    s.stroke_to((2, 39))  # one sample 39 px on
    s.stroke_end()
    assert (s.mask[2] == 1).all() and s.mask.sum() == 40


def test_erase_puts_the_proposal_back_not_soil():
    s = _state(zoo_square(), radius=1.5, active_class=2)
    s.paint([(3, 0), (3, 7)])
    assert (s.mask[3] == 2).all()
    s.erase([(3, 1), (3, 6)])
    np.testing.assert_array_equal(s.mask[2:5, 2:6], zoo_square()[2:5, 2:6])
    np.testing.assert_array_equal(s.mask[3], zoo_square()[3])  # radius 1.5 reaches cols 0, 7
    assert s.actions == 2


def test_fill_reclasses_one_connected_region():
    s = _state(zoo_two_touching(), active_class=3)
    assert s.fill_at((3, 2))
    expected = zoo_two_touching()
    expected[expected == 1] = 3
    np.testing.assert_array_equal(s.mask, expected)


def test_fill_connectivity_4_and_8():
    four = _state(zoo_diagonal(), shape=(6, 6), active_class=2)
    four.fill_at((2, 2))
    assert (four.mask == 2).sum() == 1
    eight = _state(zoo_diagonal(), shape=(6, 6), active_class=2, connectivity=8)
    eight.fill_at((2, 2))
    assert (eight.mask == 2).sum() == 6


def test_polygon_fills_with_the_active_class():
    s = _state(active_class=1)
    for v in [(2, 2), (2, 5), (5, 5), (5, 2)]:
        s.polygon_add(v)
    assert s.polygon_vertices == [(2.0, 2.0), (2.0, 5.0), (5.0, 5.0), (5.0, 2.0)]
    assert s.polygon_close()
    np.testing.assert_array_equal(s.mask, zoo_square())
    assert s.actions == 5 and s.polygon_vertices == []


def test_polygon_with_two_vertices_does_nothing():
    s = _state()
    s.polygon_add((1, 1))
    s.polygon_add((3, 3))
    assert not s.polygon_close()
    assert "3 vertices" in s.notice and not s.changed
    assert s.polygon_drop() and s.polygon_vertices == [(1.0, 1.0)]


def test_polygon_closes_on_a_click_near_the_first_vertex():
    s = _state(tool="polygon", active_class=1)  # 8 x 8 tile in a 64 x 64 view: zoom 8
    t = s.transform
    for r, c in [(2, 2), (2, 5), (5, 5), (5, 2)]:
        vr, vc = t.tile_to_view(r, c)
        s.press((vr, vc))
        s.release((vr, vc))
    vr, vc = t.tile_to_view(2, 2)
    s.press((vr + 3, vc - 2))
    np.testing.assert_array_equal(s.mask, zoo_square())
    assert s.actions == 5  # four vertices and the closing click


def _disc_case():
    rng = np.random.default_rng(4)
    image = np.empty((64, 64, 3), np.uint8)
    image[:] = (150, 110, 70)
    r, c = np.indices((64, 64))
    disc = (r - 30) ** 2 + (c - 34) ** 2 <= 14**2
    image[disc] = (50, 160, 60)
    image = np.clip(image + rng.normal(0, 6, image.shape), 0, 255).astype(np.uint8)
    return image, disc


def test_box_labels_the_grabcut_foreground_inside_the_box():
    image, disc = _disc_case()
    proposal = np.zeros((64, 64), np.uint8)
    proposal[0:4, :] = 1  # outside the box: must stay
    s = EditorState(image, proposal, active_class=2, view_shape=(64, 64))
    assert s.box(12, 16, 49, 53)
    weed = s.mask == 2
    # OpenCV GrabCut; IoU >= 0.9 with the disc is common practice, no source
    assert (weed & disc).sum() / (weed | disc).sum() >= 0.9
    assert not weed[:12].any() and not weed[49:].any()
    np.testing.assert_array_equal(s.mask[0:4], proposal[0:4])


def test_box_too_small_or_whole_tile_is_refused_with_a_notice():
    s = _state()
    assert not s.box(0, 0, 8, 8) and "whole tile" in s.notice
    assert not s.box(2, 2, 3, 6) and "2 x 2" in s.notice
    assert not s.changed


def test_box_drag_through_the_pointer():
    image, disc = _disc_case()
    s = EditorState(image, np.zeros((64, 64), np.uint8), tool="box", view_shape=(64, 64))
    s.press((12, 16))
    s.drag((30, 30))
    assert s.render().shape == (64, 64, 3)
    s.release((48, 52))
    m = s.mask == 1
    assert (m & disc).sum() / (m | disc).sum() >= 0.9  # as above: common practice, no source


def test_scribbles_are_a_weak_layer_and_clear_is_undoable():
    s = _state(radius=0.5, active_class=3)
    s.scribble([(4, 1), (4, 6)])
    expected = np.full((8, 8), 255, np.uint8)
    expected[4, 1:7] = 3
    np.testing.assert_array_equal(s.scribbles, expected)
    assert not s.changed and s.has_scribbles
    s.clear_scribbles()
    assert not s.has_scribbles
    s.undo()
    np.testing.assert_array_equal(s.scribbles, expected)


def test_refine_changes_only_the_band_around_the_scribbles():
    grey = data.coins()[20:84, 125:189]  # scikit-image sample data: one coin
    image = np.ascontiguousarray(np.dstack([grey] * 3))
    s = EditorState(image, np.zeros((64, 64), np.uint8), radius=1, band_px=6,
                    view_shape=(64, 64))
    assert not s.refine() and "scribble" in s.notice
    s.active_class = 1
    s.scribble([(31, 25), (31, 35)])
    s.active_class = 0
    s.scribble([(2, 2), (2, 20)])
    assert s.refine()
    sc = s.scribbles
    from labeler.masks.refine import scribble_band

    band = scribble_band(sc, band_px=6)
    assert not s.mask[~band].any()
    assert (s.mask[sc == 1] == 1).all() and s.changed


def test_restore_draft_adds_its_counters_and_undoes():
    s = _state()
    m = np.ones((8, 8), np.uint8)
    sc = np.full((8, 8), 255, np.uint8)
    sc[0, 0] = 2
    s.restore_draft(m, sc, actions=7, seconds=30.0)
    np.testing.assert_array_equal(s.mask, m)
    assert s.actions == 8 and s.seconds == 30.0
    s.undo()
    assert not s.changed and not s.has_scribbles
    with pytest.raises(ValueError, match=r"mask: expected a uint8 array of shape \(8, 8\)"):
        s.restore_draft(np.ones((7, 8), np.uint8), sc)


# ------------------------------------------------------------------ undo, redo, memory
def test_undo_redo_round_trip_and_new_edit_clears_redo():
    s = _state(radius=1, active_class=2)
    s.paint([(1, 1), (1, 6)])
    after_one = s.mask
    s.paint([(6, 1), (6, 6)])
    assert s.undo()
    np.testing.assert_array_equal(s.mask, after_one)
    assert s.undo() and not s.changed
    assert not s.undo() and s.notice == "nothing to undo"
    assert s.redo() and s.redo()
    assert not s.redo()
    s.undo()
    s.paint([(4, 4)])
    assert not s.can_redo


def test_history_holds_only_the_bounding_box_of_changes():
    s = _state(shape=(512, 512), radius=2, view_shape=(64, 64))
    s.paint([(100, 100), (100, 120)])
    fp = stroke_mask([(100, 100), (100, 120)], radius=2, shape=(512, 512))
    rows, cols = np.nonzero(fp)
    box = (rows.max() - rows.min() + 1) * (cols.max() - cols.min() + 1)
    assert s.history_bytes == 2 * box  # before and after, uint8, nothing else
    assert s.history_bytes < 512 * 512 // 100


def test_a_stroke_that_changes_nothing_counts_but_leaves_no_history():
    s = _state(np.ones((8, 8), np.uint8), active_class=1)
    assert not s.paint([(2, 2), (2, 5)])
    assert s.actions == 1 and not s.can_undo


_ops = st.one_of(
    st.tuples(st.just("paint"), st.integers(0, 3), st.lists(
        st.tuples(st.floats(-2, 13), st.floats(-2, 13)), min_size=1, max_size=4)),
    st.tuples(st.just("erase"), st.integers(0, 3), st.lists(
        st.tuples(st.floats(-2, 13), st.floats(-2, 13)), min_size=1, max_size=4)),
    st.tuples(st.just("scribble"), st.integers(0, 3), st.lists(
        st.tuples(st.floats(-2, 13), st.floats(-2, 13)), min_size=1, max_size=4)),
    st.tuples(st.just("fill"), st.integers(0, 3), st.tuples(st.integers(0, 11),
                                                               st.integers(0, 11))),
    st.tuples(st.just("polygon"), st.integers(0, 3), st.lists(
        st.tuples(st.floats(-2, 13), st.floats(-2, 13)), min_size=3, max_size=6)),
    st.tuples(st.just("clear"), st.just(0), st.just(None)),
    st.tuples(st.just("refine"), st.just(0), st.just(None)),
)


def _run(s: EditorState, op) -> None:
    name, cls, arg = op
    s.active_class = cls
    if name in ("paint", "erase", "scribble"):
        getattr(s, name)(arg)
    elif name == "fill":
        s.fill_at(arg)
    elif name == "polygon":
        for v in arg:
            s.polygon_add(v)
        s.polygon_close()
    elif name == "clear":
        s.clear_scribbles()
    else:
        s.refine()


@settings(max_examples=30, deadline=None)
@given(ops=st.lists(_ops, min_size=1, max_size=8), radius=st.floats(0.5, 3.0))
def test_any_edits_then_undo_all_restores_and_redo_all_replays(ops, radius):
    proposal = zoo_two_touching()
    proposal = np.pad(proposal, ((0, 4), (0, 4)))  # 12 x 12
    s = EditorState(_image((12, 12)), proposal, radius=radius, band_px=3, view_shape=(48, 48))
    start_mask, start_scrib = s.mask, s.scribbles
    for op in ops:
        _run(s, op)
    end_mask, end_scrib = s.mask, s.scribbles
    while s.undo():
        pass
    np.testing.assert_array_equal(s.mask, start_mask)
    np.testing.assert_array_equal(s.scribbles, start_scrib)
    while s.redo():
        pass
    np.testing.assert_array_equal(s.mask, end_mask)
    np.testing.assert_array_equal(s.scribbles, end_scrib)
    # the incrementally kept view equals a fresh render of the same masks
    fresh = EditorState(s.image, proposal, mask=end_mask, scribbles=end_scrib,
                        view_shape=(48, 48))
    np.testing.assert_array_equal(s.render(), fresh.render())


# ------------------------------------------------------------------ counters
def test_active_seconds_leave_out_breaks_over_60_s():
    clock = FakeClock()
    s = _state(clock=clock)
    for t in (0.0, 10.0, 100.0, 105.0):  # the 90 s gap is a break
        clock.t = t
        s.note_activity()
    assert s.seconds == pytest.approx(15.0)
    clock.t = 165.0  # exactly 60 s still counts
    s.note_activity()
    assert s.seconds == pytest.approx(75.0)


def test_edits_note_activity_through_the_clock():
    clock = FakeClock()
    s = _state(clock=clock)
    s.note_activity()
    clock.t = 4.0
    s.paint([(1, 1)])
    clock.t = 6.5
    s.undo()
    assert s.seconds == pytest.approx(6.5) and s.actions == 2


# ------------------------------------------------------------------ view transform
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


def test_index_map_matches_pixel_at_and_marks_outside():
    t = ViewTransform(3.0, -1.0, 2.5)
    rows = t.index_map(20, 5, axis=0)
    cols = t.index_map(20, 9, axis=1)
    for v in range(20):
        pr, pc = t.pixel_at(v, v)
        assert rows[v] == (pr if 0 <= pr < 5 else -1)
        assert cols[v] == (pc if 0 <= pc < 9 else -1)


# ------------------------------------------------------------------ render
def _render_loop(s: EditorState, *, outlines: bool) -> np.ndarray:
    """Slow reference: every view pixel from the tile pixel it shows."""
    colours, has = DEFAULT_SCHEMA.lut_rgb()
    a = int(round(s.opacity * 256))
    vh, vw = s.view_shape
    out = np.zeros((vh, vw, 3), np.uint8)
    mask, scrib, img = s.mask, s.scribbles, s.image
    h, w = s.shape
    for vr in range(vh):
        for vc in range(vw):
            r, c = s.transform.pixel_at(vr, vc)
            if not (0 <= r < h and 0 <= c < w):
                out[vr, vc] = (38, 38, 38)
                continue
            base = [int(img[r, c, 2]), int(img[r, c, 1]), int(img[r, c, 0])]
            m = int(mask[r, c])
            px = base
            if has[m]:
                col = [int(colours[m, 2]), int(colours[m, 1]), int(colours[m, 0])]
                px = [(b * (256 - a) + k * a) >> 8 for b, k in zip(base, col, strict=True)]
                nbrs = [(r + 1, c), (r - 1, c), (r, c + 1), (r, c - 1)]
                if outlines and any(0 <= q < h and 0 <= p < w and mask[q, p] != m
                                    for q, p in nbrs):
                    px = col
            if scrib[r, c] != 255:
                k = int(scrib[r, c])
                px = ([int(colours[k, 2]), int(colours[k, 1]), int(colours[k, 0])] if has[k]
                      else [225, 225, 225])
            out[vr, vc] = px
    return out


@pytest.mark.parametrize("outlines", [True, False])
def test_render_matches_slow_loop(outlines):
    s = _state(zoo_two_touching(), view_shape=(40, 52), opacity=0.6, radius=0.5)
    s.show_outlines = outlines
    s.active_class = 0
    s.scribble([(0, 0), (0, 3)])
    s.active_class = 3
    s.paint([(7, 0), (7, 7)])
    s.zoom_at((10, 10), 1.7)
    s.pan_view(3, -5)
    np.testing.assert_array_equal(s.render(), _render_loop(s, outlines=outlines))


def test_full_opacity_shows_the_palette_colours():
    s = _state(zoo_square(), opacity=1.0)
    s.show_outlines = False
    frame = s.render()  # zoom 8, view pixel (8r + 4, 8c + 4) shows tile pixel (r, c)
    assert tuple(frame[3 * 8 + 4, 3 * 8 + 4]) == CROP_BGR
    assert tuple(frame[4, 4]) == tuple(s.image[0, 0, ::-1])  # soil: no overlay
    s.active_class = 2
    s.paint([(3, 3)])
    assert tuple(s.render()[3 * 8 + 4, 3 * 8 + 4]) == WEED_BGR


def test_overlay_off_shows_the_bare_tile():
    s = _state(zoo_square())
    s.show_overlay = False
    frame = s.render()
    np.testing.assert_array_equal(frame[4::8, 4::8], s.image[:, :, ::-1])


def test_heat_map_needs_an_uncertainty_map():
    s = _state()
    s.show_heat = True
    assert not s.show_heat and "uncertainty" in s.notice
    u = np.zeros((2, 2))
    u[0, 0] = 1.0
    h = _state(uncertainty=u)
    plain = h.render()
    h.show_heat = True
    heat = h.render()
    assert (plain != heat).any()
    with pytest.raises(ValueError, match="uncertainty: expected a finite 2-D"):
        _state(uncertainty=np.zeros(3))
    h.set_uncertainty(None)
    assert not h.show_heat
    np.testing.assert_array_equal(h.render(), plain)
    with pytest.raises(ValueError, match="uncertainty: expected a finite 2-D"):
        h.set_uncertainty(np.full((2, 2), np.nan))


def test_side_by_side_shows_the_other_mask_in_the_right_pane():
    s = _state(zoo_square(), view_shape=(64, 132), opacity=1.0)
    s.show_outlines = False
    other = np.zeros((8, 8), np.uint8)
    other[:] = 2
    s.set_compare(other, label="saved by someone else")
    assert s.comparing and s.pane_shape == (64, 64)
    frame = s.render()
    right = 64 + PANE_GAP
    assert tuple(frame[40, right + 40]) == WEED_BGR
    assert tuple(frame[3 * 8 + 4, 3 * 8 + 4]) == CROP_BGR
    assert s.pane_of((10, right + 5)) == (1, 10.0, 5.0)
    assert s.pane_of((10, 65))[0] == -1
    s.tool = "brush"
    s.press((40, right + 40))  # clicks in the right pane do not edit
    s.release((40, right + 40))
    np.testing.assert_array_equal(s.mask, zoo_square())
    assert s.toggle_compare() and not s.comparing
    s.clear_compare()
    assert not s.toggle_compare()


def test_cursor_is_drawn_for_stroke_tools_only():
    s = _state()
    s.hover((32, 32))
    with_cursor = s.render()
    s.leave_view()
    assert (with_cursor != s.render()).any()
    s.tool = "fill"
    s.hover((32, 32))
    np.testing.assert_array_equal(s.render(), _state().render())


# ------------------------------------------------------------------ errors
def test_constructor_and_setter_errors():
    img = _image()
    with pytest.raises(ValueError, match=r"image: expected a \(H, W, 3\) uint8"):
        EditorState(img[:, :, 0], np.zeros((8, 8), np.uint8))
    with pytest.raises(ValueError, match=r"proposal: expected a uint8 array of shape \(8, 8\)"):
        EditorState(img, np.zeros((8, 7), np.uint8))
    with pytest.raises(ValueError, match="scribbles: expected a uint8 array"):
        EditorState(img, np.zeros((8, 8), np.uint8), scribbles=np.zeros((8, 8), np.int16))
    with pytest.raises(ValueError, match="connectivity: expected 4 or 8"):
        EditorState(img, np.zeros((8, 8), np.uint8), connectivity=6)
    with pytest.raises(ValueError, match="view_shape: expected"):
        EditorState(img, np.zeros((8, 8), np.uint8), view_shape=(4, 64))
    s = _state()
    with pytest.raises(ValueError, match=r"active_class: expected one of the class indices"):
        s.active_class = 7
    with pytest.raises(ValueError, match="tool: expected one of brush"):
        s.tool = "lasso"
    with pytest.raises(ValueError, match="kind: expected one of brush, erase, scribble"):
        s.stroke_start((1, 1), kind="smudge")
    with pytest.raises(ValueError, match="zoom: expected a positive number"):
        ViewTransform(0.0)
    with pytest.raises(ValueError, match="other: expected a uint8 array"):
        s.set_compare(np.zeros((3, 3), np.uint8))
    s.radius = 1000
    assert s.radius == 128.0
    s.opacity = 3
    assert s.opacity == 1.0
