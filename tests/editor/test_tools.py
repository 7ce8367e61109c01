"""The editor's tools and gestures: brush, erase, fill, polygon, box, scribble, refine."""

from __future__ import annotations

import numpy as np
import pytest
from skimage import data

from labeler.editor.state import EditorState
from tests.common import zoo_diagonal, zoo_square, zoo_two_touching
from tests.editor.helpers import make_state


def test_brush_stroke_radius_1_from_1_1_to_1_6():
    s = make_state(radius=1, active_class=2)
    assert s.paint([(1, 1), (1, 6)])
    expected = np.zeros((8, 8), np.uint8)
    expected[0, 1:7] = 2
    expected[1, 0:8] = 2
    expected[2, 1:7] = 2
    np.testing.assert_array_equal(s.mask, expected)
    assert s.changed and s.actions == 1


def test_fast_drag_samples_far_apart_leave_no_gap():
    s = make_state(shape=(5, 40), radius=0.5)
    s.stroke_start((2, 0))
    s.stroke_to((2, 39))  # one sample 39 px on
    s.stroke_end()
    assert (s.mask[2] == 1).all() and s.mask.sum() == 40


def test_erase_puts_the_proposal_back_not_soil():
    s = make_state(zoo_square(), radius=1.5, active_class=2)
    s.paint([(3, 0), (3, 7)])
    assert (s.mask[3] == 2).all()
    s.erase([(3, 1), (3, 6)])
    np.testing.assert_array_equal(s.mask[2:5, 2:6], zoo_square()[2:5, 2:6])
    np.testing.assert_array_equal(s.mask[3], zoo_square()[3])  # radius 1.5 reaches cols 0, 7
    assert s.actions == 2


def test_fill_reclasses_one_connected_region():
    # a flat grey tile: neither the plant/soil split nor a colour edge cuts the region
    flat = np.full((8, 8, 3), 128, np.uint8)
    s = EditorState(flat, zoo_two_touching(), active_class=3, view_shape=(64, 64))
    assert s.fill_at((3, 2))
    expected = zoo_two_touching()
    expected[expected == 1] = 3
    np.testing.assert_array_equal(s.mask, expected)


def test_fill_connectivity_4_and_8():
    # a flat tile: no colour edge limits the fill, only the mask's connectivity
    flat = np.full((6, 6, 3), 128, np.uint8)
    four = EditorState(flat, zoo_diagonal(), active_class=2, view_shape=(64, 64))
    four.fill_at((2, 2))
    assert (four.mask == 2).sum() == 1
    eight = EditorState(
        flat, zoo_diagonal(), active_class=2, connectivity=8, view_shape=(64, 64)
    )
    eight.fill_at((2, 2))
    assert (eight.mask == 2).sum() == 6


def test_fill_on_an_empty_mask_stops_at_the_plant_edge():
    # a green 5 x 5 plant on brown soil, nothing labelled yet: a click on the plant takes
    # the plant only, never the whole tile (hand-made scene)
    rgb = np.zeros((12, 12, 3), np.uint8)
    rgb[:] = (120, 90, 60)
    rgb[3:8, 4:9] = (40, 160, 40)
    s = EditorState(rgb, np.zeros((12, 12), np.uint8), active_class=1, view_shape=(64, 64))
    s.fill_at((5, 6))
    expected = np.zeros((12, 12), np.uint8)
    expected[3:8, 4:9] = 1
    np.testing.assert_array_equal(s.mask, expected)


def _disc_scene(n=64, radius=10):
    """A leaf-green disc on brown loam (the colours of tests/masks/scenes.py), no noise."""
    r, c = np.indices((n, n))
    plant = (r - n // 2) ** 2 + (c - n // 2) ** 2 <= radius**2
    rgb = np.empty((n, n, 3), np.uint8)
    rgb[:] = (150, 110, 70)
    rgb[plant] = (50, 160, 60)
    return rgb, plant


def test_fill_on_soil_of_an_empty_mask_is_refused_with_a_notice():
    # soil minus one disc is about 92 % of the tile: more than FILL_MAX_SHARE (one half)
    rgb, plant = _disc_scene()
    s = EditorState(rgb, np.zeros((64, 64), np.uint8), active_class=2, view_shape=(64, 64))
    assert not s.fill_at((2, 2))
    assert (s.mask == 0).all() and s.actions == 1
    assert "fill refused" in s.notice and f"{int((~plant).sum())} px" in s.notice


def test_fill_all_takes_the_whole_same_class_region():
    rgb, _ = _disc_scene()
    s = EditorState(rgb, np.zeros((64, 64), np.uint8), active_class=2, view_shape=(64, 64))
    assert s.fill_at((2, 2), fill_all=True)
    assert (s.mask == 2).all()
    assert "filled 4096 px (100.0% of the tile)" in s.notice


def test_a_press_with_the_fill_tool_fills_bounded_or_whole_when_asked():
    # the editor passes a shift-click as fill_all (keymap row "f")
    rgb, plant = _disc_scene()
    s = EditorState(rgb, np.zeros((64, 64), np.uint8), active_class=2, view_shape=(64, 64))
    s.tool = "fill"
    s.press((2.0, 2.0))
    assert (s.mask == 0).all() and "fill refused" in s.notice
    s.press((2.0, 2.0), fill_all=True)
    assert (s.mask == 2).all()


def test_fill_on_the_disc_takes_the_disc_and_says_so():
    rgb, plant = _disc_scene()
    s = EditorState(rgb, np.zeros((64, 64), np.uint8), active_class=1, view_shape=(64, 64))
    assert s.fill_at((32, 32))
    np.testing.assert_array_equal(s.mask == 1, plant)
    assert s.notice.startswith(f"filled {int(plant.sum())} px")


def test_polygon_fills_with_the_active_class():
    s = make_state(active_class=1)
    for v in [(2, 2), (2, 5), (5, 5), (5, 2)]:
        s.polygon_add(v)
    assert s.polygon_vertices == [(2.0, 2.0), (2.0, 5.0), (5.0, 5.0), (5.0, 2.0)]
    assert s.polygon_close()
    np.testing.assert_array_equal(s.mask, zoo_square())
    assert s.actions == 5 and s.polygon_vertices == []


def test_polygon_with_two_vertices_does_nothing():
    s = make_state()
    s.polygon_add((1, 1))
    s.polygon_add((3, 3))
    assert not s.polygon_close()
    assert "3 vertices" in s.notice and not s.changed
    assert s.polygon_drop() and s.polygon_vertices == [(1.0, 1.0)]


def test_polygon_closes_on_a_click_near_the_first_vertex():
    s = make_state(tool="polygon", active_class=1)  # 8 x 8 tile in a 64 x 64 view: zoom 8
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
    s = make_state()
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


def test_scribble_marks_the_weak_label_and_clear_is_undoable():
    s = make_state(radius=0.5, active_class=3)
    s.scribble([(4, 1), (4, 6)])
    expected = np.full((8, 8), 255, np.uint8)
    expected[4, 1:7] = 3
    np.testing.assert_array_equal(s.weak_label, expected)
    assert not s.changed and s.has_weak_label
    s.clear_weak_label()
    assert not s.has_weak_label
    s.undo()
    np.testing.assert_array_equal(s.weak_label, expected)


def test_refine_changes_only_the_band_around_the_marks():
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
    sc = s.weak_label
    from labeler.masks.refine import weak_label_band

    band = weak_label_band(sc, band_px=6)
    assert not s.mask[~band].any()
    assert (s.mask[sc == 1] == 1).all() and s.changed


def test_restore_draft_adds_its_counters_and_undoes():
    s = make_state()
    m = np.ones((8, 8), np.uint8)
    sc = np.full((8, 8), 255, np.uint8)
    sc[0, 0] = 2
    s.restore_draft(m, sc, actions=7, seconds=30.0)
    np.testing.assert_array_equal(s.mask, m)
    assert s.actions == 8 and s.seconds == 30.0
    s.undo()
    assert not s.changed and not s.has_weak_label
    with pytest.raises(ValueError, match=r"mask: expected a uint8 array of shape \(8, 8\)"):
        s.restore_draft(np.ones((7, 8), np.uint8), sc)


