"""Georeferencing of pixel centres, world files and .prj sidecars."""

import numpy as np
import pytest
import rasterio.transform
from affine import Affine

from labeler.errors import InputError
from labeler.imagery.georef import (
    affine_to_world_file,
    find_world_file,
    map_to_pixel,
    pixel_centres_to_map,
    pixel_size,
    read_prj,
    read_world_file,
    world_file_to_affine,
)


def test_pixel_centres_match_rasterio_xy():
    # oracle: rasterio.transform.xy(offset="center") (reference library)
    transform = Affine(0.004, 0.0, 431250.0, 0.0, -0.004, 5712300.0) @ Affine.rotation(7.0)
    rng = np.random.default_rng(0)
    rows = rng.integers(0, 5000, 50)
    cols = rng.integers(0, 5000, 50)
    x, y = pixel_centres_to_map(transform, rows, cols)
    xr, yr = rasterio.transform.xy(transform, rows, cols, offset="center")
    np.testing.assert_allclose(x, xr, rtol=0, atol=1e-6)
    np.testing.assert_allclose(y, yr, rtol=0, atol=1e-6)
    r, c = map_to_pixel(transform, x, y)
    np.testing.assert_allclose(r, rows + 0.5, atol=1e-6)
    np.testing.assert_allclose(c, cols + 0.5, atol=1e-6)


def test_world_file_line_order_and_centre_reference(tmp_path):
    # conventional line order A, D, B, E, C, F; (C, F) is the CENTRE of the upper-left
    # pixel (common GIS practice, no single source)
    wf = tmp_path / "plot.tfw"
    wf.write_text("0.005\n0.0\n0.0\n-0.005\n431250.0025\n5712299.9975\n")
    t = read_world_file(wf)
    assert (t.a, t.b, t.d, t.e) == (0.005, 0.0, 0.0, -0.005)
    # the corner of the upper-left pixel is half a pixel up-left of (C, F)
    assert t.c == pytest.approx(431250.0)
    assert t.f == pytest.approx(5712300.0)
    x, y = pixel_centres_to_map(t, np.array([0]), np.array([0]))
    assert (x[0], y[0]) == (pytest.approx(431250.0025), pytest.approx(5712299.9975))
    np.testing.assert_allclose(
        affine_to_world_file(t), [0.005, 0.0, 0.0, -0.005, 431250.0025, 5712299.9975]
    )


def test_world_file_rotation_terms_go_to_b_and_d():
    # lines 2 and 3 are D (row rotation of x... y per column) and B (x per row)
    t = world_file_to_affine(1.0, 0.2, 0.3, -1.0, 10.0, 20.0)
    assert (t.a, t.b, t.d, t.e) == (1.0, 0.3, 0.2, -1.0)


@pytest.mark.parametrize(
    ("text", "match"),
    [
        ("1\n0\n0\n-1\n5\n", "6 numbers"),
        ("1\n0\n0\nminus one\n5\n6\n", "must be numbers"),
        ("0\n0\n0\n0\n5\n6\n", "zero pixel size"),
        ("1\n0\n0\n-1\nnan\n6\n", "non-finite"),
    ],
)
def test_world_file_errors(tmp_path, text, match):
    wf = tmp_path / "bad.jgw"
    wf.write_text(text)
    with pytest.raises(InputError, match=match):
        read_world_file(wf)


def test_find_world_file_suffixes(tmp_path):
    img = tmp_path / "leaf.jpg"
    img.write_bytes(b"")
    assert find_world_file(img) is None
    (tmp_path / "leaf.wld").write_text("1\n0\n0\n-1\n0\n0\n")
    assert find_world_file(img).name == "leaf.wld"
    (tmp_path / "leaf.jgw").write_text("1\n0\n0\n-1\n0\n0\n")
    assert find_world_file(img).name == "leaf.jgw"


def test_prj(tmp_path):
    from rasterio.crs import CRS

    prj = tmp_path / "a.prj"
    prj.write_text(CRS.from_epsg(32631).to_wkt())
    assert CRS.from_wkt(read_prj(prj)).to_epsg() == 32631
    prj.write_text("not a crs at all")
    with pytest.raises(InputError, match="coordinate reference system"):
        read_prj(prj)


def test_pixel_size():
    assert pixel_size(Affine(0.004, 0, 0, 0, -0.004, 0)) == pytest.approx(0.004)
