"""The open-dataset label decoders the benchmarks share (benchmarks/datasets.py)."""

from __future__ import annotations

import numpy as np
import pytest

from benchmarks.datasets import peanut_truth
from tests.common import DATASETS

PEANUT = DATASETS / "peanut-weed"


def test_peanut_colours_map_to_soil_crop_weed():
    # Label colours from the dataset's SOURCE.md (Tran & Phan 2023): black soil,
    # (0, 255, 0) crop, (255, 0, 0) weed.
    rgb = np.array([[[0, 0, 0], [0, 255, 0]], [[255, 0, 0], [0, 255, 0]]], np.uint8)
    np.testing.assert_array_equal(peanut_truth(rgb, "x.png"), [[0, 1], [2, 1]])


def test_peanut_other_colours_are_refused():
    rgb = np.zeros((2, 2, 3), np.uint8)
    rgb[1, 1] = (0, 254, 0)
    with pytest.raises(ValueError, match=r"x\.png: label holds colours other than black"):
        peanut_truth(rgb, "x.png")


@pytest.mark.dataset
def test_peanut_first_label_decodes_whole():
    labels = sorted((PEANUT / "labels").glob("*.png")) if PEANUT.is_dir() else []
    if not labels:
        pytest.skip(f"peanut-weed dataset absent at {PEANUT.name}")
    from labeler.imagery.read import read_image

    mask = peanut_truth(read_image(labels[0]), labels[0].name)
    assert set(np.unique(mask)) <= {0, 1, 2}
    assert (mask == 0).any() and (mask > 0).any()
