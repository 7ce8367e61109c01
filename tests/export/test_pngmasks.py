"""Tests of labeler.export.pngmasks: class-index PNGs and colour previews."""

from __future__ import annotations

import cv2
import numpy as np
import pytest
from PIL import Image

from labeler.classes import DEFAULT_SCHEMA
from labeler.export.pngmasks import check_stem, preview_rgb, write_class_mask, write_image_masks
from tests.common import zoo_four_classes, zoo_ring


def field_image(shape=(8, 8), seed=0) -> np.ndarray:
    return np.random.default_rng(seed).integers(0, 256, size=(*shape, 3), dtype=np.uint8)


def test_class_mask_png_is_single_channel_with_unlabelled_kept(tmp_path):
    m = zoo_four_classes()
    m[0, :3] = 255
    files = write_image_masks(tmp_path, "north-07", m)
    assert files.mask == tmp_path / "north-07.png" and files.preview is None
    with Image.open(files.mask) as im:
        assert im.mode == "L" and im.size == (8, 8)
        np.testing.assert_array_equal(np.asarray(im), m)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["north-07.png"]  # no temp file


def test_preview_matches_opencv_add_weighted():
    # oracle: cv2.addWeighted(image, 0.55, palette colour, 0.45, 0) where a class has a
    # colour; default palette colours (Okabe & Ito 2008): crop #0072B2, weed #E69F00,
    # symptom #CC79A7
    img = field_image()
    m = zoo_four_classes()
    m[5, 5] = 255
    out = preview_rgb(img, m)
    palette = np.zeros((256, 3), np.uint8)
    palette[1], palette[2], palette[3] = (0, 114, 178), (230, 159, 0), (204, 121, 167)
    ref = cv2.addWeighted(img, 0.55, palette[m], 0.45, 0.0)
    coloured = np.isin(m, [1, 2, 3])
    np.testing.assert_allclose(out[coloured].astype(int), ref[coloured].astype(int), atol=1)
    # soil (no overlay) and unlabelled show the plain image
    np.testing.assert_array_equal(out[~coloured], img[~coloured])


def test_preview_opacity_limits_and_image_forms():
    img = field_image()
    m = zoo_ring()[:8, :8]
    np.testing.assert_array_equal(preview_rgb(img, m, opacity=0.0), img)
    full = preview_rgb(img, m, opacity=1.0)
    colours, _ = DEFAULT_SCHEMA.lut_rgb()
    np.testing.assert_array_equal(full[m == 2], np.broadcast_to(colours[2], full[m == 2].shape))
    grey = img[:, :, 0]
    np.testing.assert_array_equal(
        preview_rgb(grey, m), preview_rgb(np.repeat(grey[:, :, None], 3, axis=2), m)
    )
    rgba = np.concatenate([img, np.full((8, 8, 1), 9, np.uint8)], axis=2)
    np.testing.assert_array_equal(preview_rgb(rgba, m), preview_rgb(img, m))


def test_preview_file_is_rgb(tmp_path):
    img = field_image()
    files = write_image_masks(tmp_path, "plot", zoo_four_classes(), image=img)
    assert files.preview == tmp_path / "plot_preview.png"
    with Image.open(files.preview) as im:
        assert im.mode == "RGB"
        np.testing.assert_array_equal(np.asarray(im), preview_rgb(img, zoo_four_classes()))


def test_errors(tmp_path):
    m = zoo_four_classes()
    for stem in ("", "..", "a/b", "a\\b"):
        with pytest.raises(ValueError, match="stem: expected a plain file name"):
            check_stem(stem)
    with pytest.raises(ValueError, match="stem: expected a plain file name"):
        write_image_masks(tmp_path, "../escape", m)
    with pytest.raises(ValueError, match=r"mask: expected shape \(8, 8\) like the image"):
        preview_rgb(field_image(), np.zeros((8, 9), np.uint8))
    with pytest.raises(ValueError, match=r"opacity: expected a weight in 0..1"):
        preview_rgb(field_image(), m, opacity=1.5)
    with pytest.raises(ValueError, match="image: expected uint8 RGB"):
        preview_rgb(field_image().astype(np.float32), m)
    with pytest.raises(ValueError, match="image: expected shape"):
        preview_rgb(np.zeros((8, 8, 2), np.uint8), m)
    with pytest.raises(ValueError, match="holds values"):
        write_class_mask(tmp_path / "x.png", np.full((4, 4), 9, np.uint8))
    with pytest.raises(ValueError, match="mask: expected a non-empty mask"):
        write_class_mask(tmp_path / "x.png", np.zeros((0, 4), np.uint8))
    assert not (tmp_path / "x.png").exists()
