"""The half-block renderer: exact cells, fitting, block averaging and the overlay."""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from rich.console import Console
from skimage.measure import block_reduce

from labeler.classes import DEFAULT_SCHEMA
from labeler.tui.preview import (
    HALF_BLOCK,
    box_downsample,
    fit_picture,
    fit_pixels,
    half_block_text,
    overlay,
    tile_picture,
)


def _cells(text):
    """(character, foreground rgb, background rgb or None) of every rendered cell."""
    console = Console(color_system="truecolor", width=200, force_terminal=True)
    out = []
    for seg in text.render(console):
        if seg.text == "\n" or not seg.text:
            continue
        for ch in seg.text:
            fg = seg.style.color.get_truecolor() if seg.style.color else None
            bg = seg.style.bgcolor.get_truecolor() if seg.style.bgcolor else None
            out.append((ch, None if fg is None else tuple(fg), None if bg is None else tuple(bg)))
    return out


def test_two_by_two_image_gives_two_exact_cells():
    # hand-made: top row red, green; bottom row blue, white
    rgb = np.array(
        [[[255, 0, 0], [0, 255, 0]], [[0, 0, 255], [255, 255, 255]]], dtype=np.uint8
    )
    text = half_block_text(rgb)
    assert text.plain == HALF_BLOCK * 2
    cells = _cells(text)
    assert cells == [
        ("\u2580", (255, 0, 0), (0, 0, 255)),
        ("\u2580", (0, 255, 0), (255, 255, 255)),
    ]
    # the same through the Style objects of the spans
    styles = [text.get_style_at_offset(Console(), i) for i in range(2)]
    assert styles[0].color.triplet == (255, 0, 0) and styles[0].bgcolor.triplet == (0, 0, 255)
    assert styles[1].color.triplet == (0, 255, 0)
    assert styles[1].bgcolor.triplet == (255, 255, 255)


def test_odd_height_last_line_has_no_background():
    rgb = np.array([[[10, 20, 30]], [[40, 50, 60]], [[70, 80, 90]]], dtype=np.uint8)
    text = half_block_text(rgb)
    assert text.plain == f"{HALF_BLOCK}\n{HALF_BLOCK}"
    assert _cells(text) == [
        ("\u2580", (10, 20, 30), (40, 50, 60)),
        ("\u2580", (70, 80, 90), None),
    ]


@settings(max_examples=25, deadline=None)
@given(h=st.integers(1, 7), w=st.integers(1, 6), seed=st.integers(0, 2**16))
def test_every_cell_carries_its_two_pixels(h, w, seed):
    rgb = np.random.default_rng(seed).integers(0, 256, (h, w, 3), dtype=np.uint8)
    text = half_block_text(rgb)
    lines = text.plain.split("\n")
    assert len(lines) == math.ceil(h / 2) and all(line == HALF_BLOCK * w for line in lines)
    cells = _cells(text)
    # slow reference: walk the cells in reading order
    expected = []
    for k in range(0, h, 2):
        for j in range(w):
            bottom = tuple(int(v) for v in rgb[k + 1, j]) if k + 1 < h else None
            expected.append((HALF_BLOCK, tuple(int(v) for v in rgb[k, j]), bottom))
    assert cells == expected


@pytest.mark.parametrize(
    ("shape", "cols", "rows", "expected"),
    [
        ((256, 256), 46, 30, (46, 46)),  # width limits: 46 / 256
        ((256, 256), 100, 10, (20, 20)),  # height limits: 2 * 10 / 256
        ((300, 500), 100, 100, (60, 100)),  # keeps 3:5
        ((2, 2), 80, 40, (2, 2)),  # never enlarged
        ((1, 1000), 10, 10, (1, 10)),  # a side never below 1
    ],
)
def test_fit_pixels(shape, cols, rows, expected):
    assert fit_pixels(shape, cols=cols, rows=rows) == expected


def test_fit_pixels_errors():
    with pytest.raises(ValueError, match="cols, rows: expected at least one cell"):
        fit_pixels((10, 10), cols=0, rows=3)
    with pytest.raises(ValueError, match="shape: expected"):
        fit_pixels((0, 10), cols=5, rows=3)


def _downsample_loop(rgb, out_shape):
    """Slow reference of box_downsample: one block mean per output pixel."""
    big_h, big_w = rgb.shape[:2]
    h, w = out_shape
    out = np.zeros((h, w, 3), np.uint8)
    for i in range(h):
        r0, r1 = i * big_h // h, (i + 1) * big_h // h
        for j in range(w):
            c0, c1 = j * big_w // w, (j + 1) * big_w // w
            for ch in range(3):
                block = [int(rgb[r, c, ch]) for r in range(r0, r1) for c in range(c0, c1)]
                s, n = sum(block), len(block)
                out[i, j, ch] = (2 * s + n) // (2 * n)  # mean rounded half up
    return out


@settings(max_examples=25, deadline=None)
@given(
    big=st.tuples(st.integers(1, 23), st.integers(1, 23)),
    frac=st.tuples(st.floats(0.01, 1.0), st.floats(0.01, 1.0)),
    seed=st.integers(0, 2**16),
)
def test_box_downsample_matches_loop_reference(big, frac, seed):
    rgb = np.random.default_rng(seed).integers(0, 256, (*big, 3), dtype=np.uint8)
    out_shape = (max(1, int(big[0] * frac[0])), max(1, int(big[1] * frac[1])))
    np.testing.assert_array_equal(box_downsample(rgb, out_shape), _downsample_loop(rgb, out_shape))


@pytest.mark.parametrize("factor", [2, 3, 4])
def test_box_downsample_equals_block_mean_for_whole_factors(factor):
    # oracle: scikit-image block_reduce(np.mean) over factor x factor blocks, rounded half up
    rgb = np.random.default_rng(factor).integers(0, 256, (12 * factor, 8 * factor, 3), np.uint8)
    oracle = block_reduce(rgb.astype(np.float64), (factor, factor, 1), np.mean)
    expected = np.floor(oracle + 0.5).astype(np.uint8)
    np.testing.assert_array_equal(box_downsample(rgb, (12, 8)), expected)


def test_box_downsample_errors():
    rgb = np.zeros((4, 4, 3), np.uint8)
    with pytest.raises(ValueError, match=r"out_shape: expected 1..4 rows .* \(no enlarging\)"):
        box_downsample(rgb, (5, 4))
    with pytest.raises(ValueError, match="rgb: expected a uint8 \\(H, W, 3\\) RGB array"):
        box_downsample(rgb.astype(np.float32), (2, 2))
    with pytest.raises(ValueError, match="rgb: expected a uint8"):
        half_block_text(np.zeros((2, 2), np.uint8))


def test_tile_picture_overlay_colours_exact():
    # grey 100 tile: soil, crop, weed, symptom, unlabelled side by side (2 px each)
    rgb = np.full((2, 10, 3), 100, np.uint8)
    mask = np.repeat(np.array([0, 1, 2, 3, 255], np.uint8), 2)[None, :].repeat(2, axis=0)
    pic = tile_picture(rgb, mask, schema=DEFAULT_SCHEMA, opacity=0.45, cols=5, rows=1)
    assert pic.shape == (1, 5, 3)
    # out = round_half_up(0.55 * 100 + 0.45 * colour) with the default palette colours
    # (Okabe & Ito 2008): crop #0072B2, weed #E69F00, symptom #CC79A7; worked by hand
    assert pic[0].tolist() == [
        [100, 100, 100],  # soil: no overlay
        [55, 106, 135],  # crop (0, 114, 178)
        [159, 127, 55],  # weed (230, 159, 0)
        [147, 109, 130],  # symptom (204, 121, 167)
        [100, 100, 100],  # unlabelled: no overlay
    ]


def test_tile_picture_without_mask_is_the_shrunk_tile():
    rgb = np.random.default_rng(5).integers(0, 256, (40, 60, 3), dtype=np.uint8)
    pic = tile_picture(rgb, None, schema=DEFAULT_SCHEMA, cols=30, rows=10)
    np.testing.assert_array_equal(pic, _downsample_loop(rgb, (20, 30)))


def test_overlay_without_mask_is_a_copy_and_fit_picture_checks_input():
    rgb = np.random.default_rng(8).integers(0, 256, (6, 4, 3), dtype=np.uint8)
    out = overlay(rgb, None, schema=DEFAULT_SCHEMA)
    np.testing.assert_array_equal(out, rgb)
    assert out is not rgb and not np.shares_memory(out, rgb)
    with pytest.raises(ValueError, match="picture: expected a uint8"):
        fit_picture(np.zeros((4, 4), np.uint8), cols=2, rows=2)
    with pytest.raises(ValueError, match="mask: expected shape \\(6, 4\\) like rgb"):
        overlay(rgb, np.zeros((5, 4), np.uint8), schema=DEFAULT_SCHEMA)


def test_zoom_window_hand_worked():
    from labeler.tui.preview import zoom_window

    # a 16 x 16 tile in 8 cells x 4 rows (8 x 8 preview pixels): zoom 1 = half size
    assert zoom_window((16, 16), zoom=1, centre=(7.5, 7.5), cols=8, rows=4) == (
        (0, 16, 0, 16), 0.5)
    # zoom 2: one preview pixel per tile pixel, the middle 8 x 8 part
    assert zoom_window((16, 16), zoom=2, centre=(7.5, 7.5), cols=8, rows=4) == (
        (4, 12, 4, 12), 1.0)
    # zoom 4: two preview pixels per tile pixel, 4 x 4 round the centre, kept inside
    assert zoom_window((16, 16), zoom=4, centre=(0, 15), cols=8, rows=4) == (
        (0, 4, 12, 16), 2.0)
    assert zoom_window((16, 16), zoom=4, centre=(9.5, 5.5), cols=8, rows=4)[0] == (8, 12, 4, 8)
    with pytest.raises(ValueError, match="zoom: expected a level of 1 or more"):
        zoom_window((16, 16), zoom=0, centre=(0, 0), cols=8, rows=4)
    with pytest.raises(ValueError, match="expected sizes of at least 1"):
        zoom_window((16, 16), zoom=2, centre=(0, 0), cols=0, rows=4)


def test_zoom_picture_repeats_whole_pixels_like_a_slow_loop():
    from labeler.tui.preview import zoom_picture, zoom_window

    rng = np.random.default_rng(7)
    tile = rng.integers(0, 256, size=(16, 12, 3), dtype=np.uint8)
    for zoom in (2, 4, 8):
        out, (r0, r1, c0, c1) = zoom_picture(tile, zoom=zoom, centre=(5.0, 6.0), cols=12, rows=8)
        assert (r0, r1, c0, c1) == zoom_window((16, 12), zoom=zoom, centre=(5.0, 6.0), cols=12,
                                               rows=8)[0]
        assert out.shape[0] <= 16 and out.shape[1] <= 12
        k = out.shape[0] // (r1 - r0)
        assert k >= 1 and out.shape == ((r1 - r0) * k, (c1 - c0) * k, 3)
        for i in range(out.shape[0]):  # slow reference: each tile pixel a k x k block
            for j in range(out.shape[1]):
                assert (out[i, j] == tile[r0 + i // k, c0 + j // k]).all()
    # zoom 1 is the fitted whole tile
    whole, window = zoom_picture(tile, zoom=1, centre=(0, 0), cols=6, rows=4)
    assert window == (0, 16, 0, 12)
    np.testing.assert_array_equal(whole, fit_picture(tile, cols=6, rows=4))
