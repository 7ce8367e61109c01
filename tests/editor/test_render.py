"""Rendering of the view: overlay, outlines, weak label, heat map, panes, cursor."""

from __future__ import annotations

import math
from fractions import Fraction

import numpy as np
import pytest

from labeler.classes import DEFAULT_SCHEMA, hex_to_rgb
from labeler.editor.render import Renderer
from labeler.editor.state import EditorState
from labeler.editor.view import PANE_GAP, Viewport
from labeler.masks.overlay import overlay_mask
from tests.common import zoo_square, zoo_two_touching
from tests.editor.helpers import make_state

# the crop and weed colours of the Okabe & Ito (2008) colour-blind-safe palette
# ("Color Universal Design", jfly.uni-koeln.de/color): blue #0072B2, orange #E69F00
CROP_BGR = hex_to_rgb("#0072B2")[::-1]
WEED_BGR = hex_to_rgb("#E69F00")[::-1]


def _blend(base: int, colour: int, opacity: float) -> int:
    """One channel, in exact fractions: (1 - o) * base + o * colour rounded half up, with
    the opacity o taken to the nearest thousandth (the documented overlay rule)."""
    o = Fraction(round(opacity * 1000), 1000)
    return math.floor((1 - o) * base + o * colour + Fraction(1, 2))


def _render_loop(s: EditorState, *, outlines: bool) -> np.ndarray:
    """Slow reference: every view pixel from the tile pixel it shows."""
    colours, has = DEFAULT_SCHEMA.lut_rgb()
    vh, vw = s.view_shape
    out = np.zeros((vh, vw, 3), np.uint8)
    mask, weak, img = s.mask, s.weak_label, s.image
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
                px = [_blend(b, k, s.opacity) for b, k in zip(base, col, strict=True)]
                nbrs = [(r + 1, c), (r - 1, c), (r, c + 1), (r, c - 1)]
                if outlines and any(0 <= q < h and 0 <= p < w and mask[q, p] != m
                                    for q, p in nbrs):
                    px = col
            if weak[r, c] != 255:
                k = int(weak[r, c])
                px = ([int(colours[k, 2]), int(colours[k, 1]), int(colours[k, 0])] if has[k]
                      else [225, 225, 225])
            out[vr, vc] = px
    return out


@pytest.mark.parametrize("outlines", [True, False])
def test_render_matches_slow_loop(outlines):
    s = make_state(zoo_two_touching(), view_shape=(40, 52), opacity=0.6, radius=0.5)
    s.show_outlines = outlines
    s.active_class = 0
    s.scribble([(0, 0), (0, 3)])
    s.active_class = 3
    s.paint([(7, 0), (7, 7)])
    s.zoom_at((10, 10), 1.7)
    s.pan_view(3, -5)
    np.testing.assert_array_equal(s.render(), _render_loop(s, outlines=outlines))


@pytest.mark.parametrize("opacity", [0.45, 0.5, 0.3337, 1.0])
def test_editor_overlay_is_the_overlay_of_every_other_picture(opacity):
    # one rounding for every picture: the editor's composite (BGR) equals the overlay the
    # export previews, the report and the queue preview draw (labeler.masks.overlay)
    image = np.random.default_rng(3).integers(0, 256, size=(16, 16, 3), dtype=np.uint8)
    mask = np.random.default_rng(4).integers(0, 4, size=(16, 16), dtype=np.uint8)
    mask[0, :4] = 255  # unlabelled pixels keep the image
    r = Renderer(image, schema=DEFAULT_SCHEMA, opacity=opacity)
    r.show_outlines = False
    weak = np.full((16, 16), 255, np.uint8)
    frame = r.render(mask, weak, viewport=Viewport((16, 16), (16, 16)))
    expected = overlay_mask(image, mask, schema=DEFAULT_SCHEMA, opacity=opacity)[:, :, ::-1]
    np.testing.assert_array_equal(frame, expected)


def test_blend_rounds_half_up():
    # crop #0072B2 is BGR (178, 114, 0): half of it is (89, 57, 0) exactly; over a pixel of
    # 1 the halves are (89.5, 57.5, 0.5), rounded half up to (90, 58, 1) (a shift by 8 bits,
    # (b * 128 + k * 128) >> 8, would give (89, 57, 0) again)
    image = np.zeros((8, 8, 3), np.uint8)
    image[:, 4:] = 1
    r = Renderer(image, schema=DEFAULT_SCHEMA, opacity=0.5)
    r.show_outlines = False
    frame = r.render(np.ones((8, 8), np.uint8), np.full((8, 8), 255, np.uint8),
                     viewport=Viewport((8, 8), (8, 8)))
    assert frame[0, 0].tolist() == [89, 57, 0] and frame[0, 7].tolist() == [90, 58, 1]


def test_full_opacity_shows_the_palette_colours():
    s = make_state(zoo_square(), opacity=1.0)
    s.show_outlines = False
    frame = s.render()  # zoom 8, view pixel (8r + 4, 8c + 4) shows tile pixel (r, c)
    assert tuple(frame[3 * 8 + 4, 3 * 8 + 4]) == CROP_BGR
    assert tuple(frame[4, 4]) == tuple(s.image[0, 0, ::-1])  # soil: no overlay
    s.active_class = 2
    s.paint([(3, 3)])
    assert tuple(s.render()[3 * 8 + 4, 3 * 8 + 4]) == WEED_BGR


def test_overlay_off_shows_the_bare_tile():
    s = make_state(zoo_square())
    s.show_overlay = False
    frame = s.render()
    np.testing.assert_array_equal(frame[4::8, 4::8], s.image[:, :, ::-1])


def test_heat_map_needs_an_uncertainty_map():
    s = make_state()
    s.show_heat = True
    assert not s.show_heat and "uncertainty" in s.notice
    u = np.zeros((2, 2))
    u[0, 0] = 1.0
    h = make_state(uncertainty=u)
    plain = h.render()
    h.show_heat = True
    heat = h.render()
    assert (plain != heat).any()
    with pytest.raises(ValueError, match="uncertainty: expected a finite 2-D"):
        make_state(uncertainty=np.zeros(3))
    h.set_uncertainty(None)
    assert not h.show_heat
    np.testing.assert_array_equal(h.render(), plain)
    with pytest.raises(ValueError, match="uncertainty: expected a finite 2-D"):
        h.set_uncertainty(np.full((2, 2), np.nan))


def test_side_by_side_shows_the_other_mask_in_the_right_pane():
    s = make_state(zoo_square(), view_shape=(64, 132), opacity=1.0)
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
    s = make_state()
    s.hover((32, 32))
    with_cursor = s.render()
    s.leave_view()
    assert (with_cursor != s.render()).any()
    s.tool = "fill"
    s.hover((32, 32))
    np.testing.assert_array_equal(s.render(), make_state().render())




def test_renderer_redraws_the_boxes_reported_and_nothing_else():
    image = np.zeros((8, 8, 3), np.uint8)
    mask = np.zeros((8, 8), np.uint8)
    weak = np.full((8, 8), 255, np.uint8)
    r = Renderer(image, schema=DEFAULT_SCHEMA, opacity=1.0)
    r.show_outlines = False
    vp = Viewport((8, 8), (64, 64))
    r.render(mask, weak, viewport=vp)
    mask[1, 1] = 1
    r.touched((1, 2, 1, 2))
    mask[6, 6] = 2  # changed but not reported: the cached composite keeps soil there
    frame = r.render(mask, weak, viewport=vp)
    assert tuple(frame[1 * 8 + 4, 1 * 8 + 4]) == CROP_BGR
    assert tuple(frame[6 * 8 + 4, 6 * 8 + 4]) == (0, 0, 0)
    r.opacity = 1.0  # a style change composes the whole tile again
    assert tuple(r.render(mask, weak, viewport=vp)[6 * 8 + 4, 6 * 8 + 4]) == WEED_BGR


def test_renderer_heat_map_stays_off_without_a_map():
    from labeler.editor.render import Renderer, check_uncertainty

    r = Renderer(np.zeros((4, 4, 3), np.uint8), schema=DEFAULT_SCHEMA)
    r.show_heat = True
    assert not r.show_heat and not r.has_uncertainty
    r.set_uncertainty(np.ones((2, 2)))
    r.show_heat = True
    assert r.show_heat
    with pytest.raises(ValueError, match=r"uncertainty: expected a finite 2-D \(h, w\) map"):
        check_uncertainty(np.array([[np.inf]]))


def test_settle_view_shows_every_mask_in_its_own_titled_pane():
    from labeler.editor.render import TITLE_ROWS

    # an 8 x 8 tile in three 64 x 64 panes: this edit, then two annotators' masks
    s = make_state(zoo_square(), view_shape=(64, 3 * 64 + 2 * PANE_GAP), opacity=1.0)
    s.show_outlines = False
    ana = np.full((8, 8), 2, np.uint8)  # all weed
    bo = np.full((8, 8), 1, np.uint8)  # all crop
    s.set_compare_all([ana, bo], labels=["ana", "bo"], edit_label="consensus (STAPLE)")
    assert s.comparing and s.pane_shape == (64, 64)
    assert s.pane_titles == ("consensus (STAPLE)", "ana", "bo")
    frame = s.render()
    step = 64 + PANE_GAP
    below_title = TITLE_ROWS + 4
    assert tuple(frame[40, step + 40]) == WEED_BGR
    assert tuple(frame[40, 2 * step + 40]) == CROP_BGR
    assert tuple(frame[below_title, 2 * step + 60]) == CROP_BGR
    assert tuple(frame[3 * 8 + 4, 3 * 8 + 4]) == CROP_BGR  # the edit: zoo square is crop
    # the gaps are drawn, and each title sits on a dark box at its pane's corner
    assert (frame[:, 64:step] == 200).all() and (frame[:, step + 64 : 2 * step] == 200).all()
    for off in (0, step, 2 * step):
        box = frame[:TITLE_ROWS, off : off + 8]
        assert (box.max(axis=2) <= 24).mean() > 0.5  # dark, with white letters further right
        assert (frame[2:TITLE_ROWS - 2, off + 6 : off + 30] > 200).any()  # some white text
    # no backdrop below the titles: every view pixel shows a tile pixel or a gap
    backdrop = (frame[TITLE_ROWS:] == 38).all(axis=2)  # _BACKDROP of labeler.editor.render
    assert not backdrop.any()
    # clicks in the annotators' panes never edit; once the edit changes its title says so
    s.tool = "brush"
    s.press((40, 2 * step + 40))
    s.release((40, 2 * step + 40))
    np.testing.assert_array_equal(s.mask, zoo_square())
    assert s.pane_titles[0] == "consensus (STAPLE)"
    s.press((4, 4))
    s.release((4, 4))
    assert s.pane_titles[0] == "consensus (STAPLE), edited"
    # Tab shows the edit alone, then all three again
    assert s.toggle_compare() and not s.comparing and s.pane_shape == (64, 200)
    assert s.toggle_compare() and s.pane_shape == (64, 64)
    with pytest.raises(ValueError, match="expected one title per mask"):
        s.set_compare_all([ana], labels=["ana", "bo"])
    with pytest.raises(ValueError, match=r"others\[0\]: expected a uint8 array"):
        s.set_compare_all([np.zeros((4, 4), np.uint8)], labels=["x"])


def test_pane_title_is_cut_to_the_pane():
    from labeler.editor.render import TITLE_ROWS, pane_title

    frame = np.full((32, 60, 3), 100, np.uint8)
    pane_title(frame, "a very long annotator name that cannot fit", left=0, width=40)
    assert (frame[:, 40:] == 100).all()  # nothing drawn right of the pane
    assert (frame[:TITLE_ROWS, :40] != 100).any()
    untouched = np.full((32, 60, 3), 100, np.uint8)
    pane_title(untouched, "abcdefgh", left=0, width=5)  # no room for any letter
    assert (untouched == 100).all()
