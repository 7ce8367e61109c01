"""The one colour overlay (labeler/masks/overlay.py)."""

from __future__ import annotations

import math
from fractions import Fraction

import cv2
import numpy as np
import pytest

from labeler.classes import DEFAULT_SCHEMA, ClassSchema, LabelClass
from labeler.masks.overlay import OPACITY_STEPS, blend_palette, overlay_mask


def _slow_overlay(rgb, mask, colours, has, opacity):
    """Pixel by pixel in exact fractions: round_half_up((1 - a) * p + a * c)."""
    a = Fraction(round(opacity * OPACITY_STEPS), OPACITY_STEPS)
    out = rgb.copy()
    for r in range(mask.shape[0]):
        for c in range(mask.shape[1]):
            v = int(mask[r, c])
            if not 0 <= v <= 255 or not has[v]:
                continue
            for k in range(3):
                exact = (1 - a) * int(rgb[r, c, k]) + a * int(colours[v][k])
                out[r, c, k] = math.floor(exact + Fraction(1, 2))
    return out


def test_hand_worked_blend_of_the_default_palette():
    rgb = np.full((1, 5, 3), 100, np.uint8)
    mask = np.array([[0, 1, 2, 3, 255]], np.uint8)
    out = overlay_mask(rgb, mask, schema=DEFAULT_SCHEMA, opacity=0.45)
    # default palette, Okabe & Ito 2008: crop #0072B2 = (0, 114, 178), weed #E69F00 =
    # (230, 159, 0), symptom #CC79A7 = (204, 121, 167); 0.55 * 100 + 0.45 * colour, worked
    # by hand: crop 55, 106.3, 135.1; weed 158.5 (half: up), 126.55, 55; symptom 146.8,
    # 109.45, 130.15
    assert out[0].tolist() == [
        [100, 100, 100],  # soil: no overlay
        [55, 106, 135],
        [159, 127, 55],
        [147, 109, 130],
        [100, 100, 100],  # unlabelled: untouched
    ]
    np.testing.assert_array_equal(overlay_mask(rgb, mask, schema=DEFAULT_SCHEMA, opacity=0), rgb)
    full = overlay_mask(rgb, mask, schema=DEFAULT_SCHEMA, opacity=1)
    assert full[0, 1].tolist() == [0, 114, 178]


def test_halves_round_up_not_to_even():
    # 0.5 * 100 + 0.5 * 113 = 106.5 -> 107 (np.rint would give 106); common practice, no source
    schema = ClassSchema([LabelClass(0, "soil", None), LabelClass(1, "crop", "#717171")])
    rgb = np.full((1, 1, 3), 100, np.uint8)
    out = overlay_mask(rgb, np.ones((1, 1), np.uint8), schema=schema, opacity=0.5)
    assert out[0, 0].tolist() == [107, 107, 107]


def test_matches_the_slow_reference_and_opencv():
    rng = np.random.default_rng(3)
    rgb = rng.integers(0, 256, (9, 11, 3), dtype=np.uint8)
    mask = rng.choice(np.array([0, 1, 2, 3, 255], np.uint8), size=(9, 11))
    colours, has = DEFAULT_SCHEMA.lut_rgb()
    for opacity in (0.0, 0.3, 0.45, 0.5, 0.777, 1.0):
        out = overlay_mask(rgb, mask, schema=DEFAULT_SCHEMA, opacity=opacity)
        np.testing.assert_array_equal(out, _slow_overlay(rgb, mask, colours, has, opacity))
        # oracle: cv2.addWeighted(image, 1 - a, colour, a, 0) rounds to nearest, ties may
        # differ by one grey level
        ref = cv2.addWeighted(rgb, 1 - opacity, colours[mask], opacity, 0.0)
        sel = has[mask]
        assert np.abs(out[sel].astype(int) - ref[sel].astype(int)).max(initial=0) <= 1


def test_blend_palette_is_channel_order_agnostic():
    rng = np.random.default_rng(5)
    rgb = rng.integers(0, 256, (6, 7, 3), dtype=np.uint8)
    mask = rng.integers(0, 4, (6, 7)).astype(np.uint8)
    colours, has = DEFAULT_SCHEMA.lut_rgb()
    as_rgb = blend_palette(rgb, mask, colours=colours, has_colour=has, opacity=0.45)
    as_bgr = blend_palette(
        rgb[:, :, ::-1], mask, colours=colours[:, ::-1], has_colour=has, opacity=0.45
    )
    np.testing.assert_array_equal(as_bgr[:, :, ::-1], as_rgb)
    np.testing.assert_array_equal(as_rgb, overlay_mask(rgb, mask, schema=DEFAULT_SCHEMA))


def test_wider_integer_masks_colour_only_values_in_range():
    rgb = np.full((1, 3, 3), 100, np.uint8)
    mask = np.array([[1, -1, 257]], np.int32)  # 257 would wrap to 1 in uint8
    out = overlay_mask(rgb, mask, schema=DEFAULT_SCHEMA)
    assert out[0].tolist() == [[55, 106, 135], [100, 100, 100], [100, 100, 100]]


def test_errors_name_the_argument():
    rgb = np.zeros((2, 2, 3), np.uint8)
    with pytest.raises(ValueError, match=r"mask: expected shape \(2, 2\) like rgb"):
        overlay_mask(rgb, np.zeros((2, 3), np.uint8), schema=DEFAULT_SCHEMA)
    with pytest.raises(ValueError, match=r"rgb: expected a uint8 \(H, W, 3\) image"):
        overlay_mask(rgb[..., 0], np.zeros((2, 2), np.uint8), schema=DEFAULT_SCHEMA)
    with pytest.raises(TypeError, match="mask: expected integer class indices"):
        overlay_mask(rgb, np.zeros((2, 2), np.float32), schema=DEFAULT_SCHEMA)
    with pytest.raises(ValueError, match="opacity: expected a weight in 0..1"):
        overlay_mask(rgb, np.zeros((2, 2), np.uint8), schema=DEFAULT_SCHEMA, opacity=2)
    with pytest.raises(ValueError, match="opacity: expected a weight in 0..1"):
        blend_palette(
            rgb,
            np.zeros((2, 2), np.uint8),
            colours=np.zeros((256, 3), np.uint8),
            has_colour=np.zeros(256, bool),
            opacity=-0.1,
        )
