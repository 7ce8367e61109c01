"""The invented demo scenario: determinism, georeferencing and the committed files."""

from __future__ import annotations

import json

import numpy as np
import pytest
import rasterio
from PIL import Image
from scipy import ndimage
from skimage.measure import regionprops
from sklearn.metrics import roc_curve

from labeler.demo.fields import (
    CRS,
    DEFAULT_SEED,
    DEFAULT_SIZE,
    GSD_M,
    PLOT_NAMES,
    make_plot,
    plot_seed,
    truth_path_for,
    write_scenario,
)
from labeler.demo.fields import main as fields_main
from labeler.masks.rows import detect_rows
from labeler.masks.vegetation import exg_minus_exr
from tests.common import REPO

DEMO = REPO / "demo_fields"

def _load(path, mode: str | None = None) -> np.ndarray:
    """Pixels of an image file (closed again at once)."""
    with Image.open(path) as im:
        return np.asarray(im if mode is None else im.convert(mode)).copy()



def _manifest() -> dict:
    return json.loads((DEMO / "scenario.json").read_text())


def _read_rgb(path):
    with rasterio.open(path) as src:
        return np.moveaxis(src.read(), 0, 2)


@pytest.fixture(scope="module")
def committed():
    """The first committed plot: (entry, image from the GeoTIFF, truth from the PNG)."""
    entry = _manifest()["plots"][0]
    return entry, _read_rgb(DEMO / entry["image"]), _load(DEMO / entry["truth"])


def test_same_seed_same_plot_other_seed_other_plot():
    a = make_plot("test-plot", seed=5, height=96, width=128)
    b = make_plot("test-plot", seed=5, height=96, width=128)
    c = make_plot("test-plot", seed=6, height=96, width=128)
    np.testing.assert_array_equal(a.image, b.image)
    np.testing.assert_array_equal(a.truth, b.truth)
    assert a.metadata == b.metadata
    assert not np.array_equal(a.image, c.image)
    assert a.image.shape == (96, 128, 3) and a.image.dtype == np.uint8
    assert a.truth.shape == (96, 128) and a.truth.dtype == np.uint8
    assert set(np.unique(a.truth)) <= {0, 1, 2, 3}


def test_committed_truth_is_reproduced_from_its_seed(committed):
    entry, image, truth = committed
    assert entry["seed"] == plot_seed(DEFAULT_SEED, 0)
    height, width = DEFAULT_SIZE
    plot = make_plot(entry["plot"], seed=entry["seed"], height=height, width=width)
    np.testing.assert_array_equal(plot.truth, truth)
    # the GeoTIFF holds the same picture up to JPEG loss: PSNR above 30 dB (common
    # practice for visually faithful JPEG, no source)
    mse = np.mean((plot.image.astype(float) - image.astype(float)) ** 2)
    assert 10 * np.log10(255.0**2 / mse) > 30.0
    assert plot.metadata["n_crop_plants"] == entry["n_crop_plants"]


def test_committed_files_are_georeferenced_in_utm_31n_at_4_mm():
    manifest = _manifest()
    assert len(manifest["plots"]) == 6
    boxes = []
    for entry in manifest["plots"]:
        with rasterio.open(DEMO / entry["image"]) as src:
            assert src.crs.to_epsg() == 32631
            assert src.res == pytest.approx((GSD_M, GSD_M))
            assert (src.height, src.width) == DEFAULT_SIZE
            assert src.count == 3
            b = src.bounds
        # UTM eastings lie between 166 000 and 834 000 m and northern northings above 0
        # (common practice, no source)
        assert 166_000 < b.left < b.right < 834_000
        assert 0 < b.bottom < b.top < 9_330_000
        boxes.append(b)
        with Image.open(DEMO / entry["truth"]) as truth:
            assert truth.mode == "L" and truth.size == (DEFAULT_SIZE[1], DEFAULT_SIZE[0])
    # distinct sample frames, no two overlapping
    for i, a in enumerate(boxes):
        for b in boxes[i + 1 :]:
            assert a.right < b.left or b.right < a.left or a.top < b.bottom or b.top < a.bottom


def test_scene_holds_every_class_with_plausible_shapes(committed):
    _, _, truth = committed
    counts = np.bincount(truth.ravel(), minlength=4)
    assert (counts > 0).all() and counts.size == 4
    # lesions: a few px to about 15 px across, lying on crop leaves
    labels, n = ndimage.label(truth == 3, structure=np.ones((3, 3)))
    areas = np.bincount(labels.ravel())[1:]
    assert n >= 10
    assert areas.min() <= 12 and areas.max() <= np.pi * 8.5**2
    ring = ndimage.binary_dilation(truth == 3, structure=np.ones((3, 3))) & (truth != 3)
    touching = np.unique(labels[ndimage.binary_dilation(ring & (truth == 1))])
    assert (np.setdiff1d(touching, [0]).size) / n >= 0.95
    # weeds: some touch crop plants (4-neighbours)
    weed = truth == 2
    crop = truth == 1
    next_to_crop = weed & ndimage.binary_dilation(crop)
    wl, wn = ndimage.label(weed, structure=np.ones((3, 3)))
    assert np.unique(wl[next_to_crop]).size >= 10
    # both weed kinds: thin grass blades and rounded broadleaf clumps
    props = regionprops(wl)
    thin = [p for p in props if p.area >= 20 and p.axis_minor_length > 0
            and p.axis_major_length / p.axis_minor_length > 5]
    round_ = [p for p in props if p.area >= 40 and p.eccentricity < 0.7 and p.solidity > 0.6]
    assert len(thin) >= 5 and len(round_) >= 5


def test_weeds_grow_between_and_within_rows(committed):
    _, _, truth = committed
    rows = detect_rows(truth == 1)
    band = rows.band_mask()
    wl, wn = ndimage.label(truth == 2, structure=np.ones((3, 3)))
    centres = np.rint(ndimage.center_of_mass(truth == 2, wl, range(1, wn + 1))).astype(int)
    on_row = band[centres[:, 0], centres[:, 1]].mean()
    assert 0.15 <= on_row <= 0.85


def _best_single_threshold_balanced_accuracy(pos: np.ndarray, neg: np.ndarray) -> float:
    # oracle: scikit-learn roc_curve; balanced accuracy = (TPR + TNR) / 2, either direction
    y = np.r_[np.ones(pos.size), np.zeros(neg.size)]
    fpr, tpr, _ = roc_curve(y, np.r_[pos, neg])
    return float(np.max(np.maximum(tpr + 1 - fpr, 1 - tpr + fpr)) / 2)


def _loop_balanced_accuracy(pos: np.ndarray, neg: np.ndarray) -> float:
    """Slow reference: try every cut between sorted distinct values, both directions."""
    values = np.unique(np.r_[pos, neg])
    cuts = np.r_[values[0] - 1, (values[:-1] + values[1:]) / 2, values[-1] + 1]
    best = 0.0
    for cut in cuts:
        tpr = float((pos > cut).mean())
        tnr = float((neg <= cut).mean())
        best = max(best, (tpr + tnr) / 2, (2 - tpr - tnr) / 2)
    return best


def test_balanced_accuracy_helper_matches_loop_reference():
    rng = np.random.default_rng(2)
    pos = np.round(rng.normal(0.3, 0.2, 60), 2)
    neg = np.round(rng.normal(0.1, 0.2, 50), 2)
    assert _best_single_threshold_balanced_accuracy(pos, neg) == pytest.approx(
        _loop_balanced_accuracy(pos, neg), abs=1e-12
    )


def test_colour_index_cannot_tell_crop_from_weed_but_finds_plants(committed):
    # ExG - ExR (Meyer & Neto 2008) per pixel: crop vs weed poorly separable by design,
    # vegetation vs soil easily
    _, image, truth = committed
    exgr = exg_minus_exr(image)
    crop, weed = exgr[truth == 1], exgr[truth == 2]
    assert _best_single_threshold_balanced_accuracy(crop[::3], weed[::3]) < 0.75
    plants, soil = exgr[truth > 0], exgr[truth == 0]
    assert _best_single_threshold_balanced_accuracy(plants[::3], soil[::17]) > 0.9


def test_write_scenario_and_command_line(tmp_path):
    out = tmp_path / "fields"
    seen = []
    paths = write_scenario(
        out, n_plots=2, seed=3, size=(64, 96), progress=lambda d, t: seen.append((d, t))
    )
    assert [p.name for p in paths] == [f"{PLOT_NAMES[0]}.tif", f"{PLOT_NAMES[1]}.tif"]
    assert seen == [(1, 2), (2, 2)]
    manifest = json.loads((out / "scenario.json").read_text())
    assert [e["plot"] for e in manifest["plots"]] == list(PLOT_NAMES[:2])
    for i, p in enumerate(paths):
        truth = _load(truth_path_for(p))
        expected = make_plot(PLOT_NAMES[i], seed=plot_seed(3, i), height=64, width=96).truth
        np.testing.assert_array_equal(truth, expected)
        with rasterio.open(p) as src:
            assert src.crs.to_string() == CRS and src.shape == (64, 96)
    assert fields_main([str(tmp_path / "cli"), "--plots", "1", "--size", "48", "64"]) == 0
    assert (tmp_path / "cli" / f"{PLOT_NAMES[0]}_truth.png").is_file()
    assert truth_path_for(tmp_path / "a.tif") == tmp_path / "a_truth.png"


def test_errors_name_the_parameter(tmp_path):
    with pytest.raises(ValueError, match="height, width: expected at least 32 pixels each"):
        make_plot("x", seed=1, height=16, width=64)
    with pytest.raises(ValueError, match="gsd_m: expected a positive"):
        make_plot("x", seed=1, height=64, width=64, gsd_m=0)
    with pytest.raises(ValueError, match="weed_density: expected a factor >= 0"):
        make_plot("x", seed=1, height=64, width=64, weed_density=-1)
    with pytest.raises(ValueError, match="symptom_share: expected a share in 0..1"):
        make_plot("x", seed=1, height=64, width=64, symptom_share=2)
    with pytest.raises(ValueError, match="n_plots: expected at least 1"):
        write_scenario(tmp_path, n_plots=0)
    with pytest.raises(ValueError, match=r"size: expected \(height, width\)"):
        write_scenario(tmp_path, n_plots=1, size=(64,))
