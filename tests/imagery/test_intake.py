"""Copying an image with its georeferencing side files into a project (labeler/imagery/intake.py)."""

import hashlib

import numpy as np
import pytest
from PIL import Image
from rasterio.crs import CRS

from labeler.errors import InputError
from labeler.imagery.intake import ImageCopy, copy_image, side_files
from labeler.imagery.read import open_image

#: A world file of 1 cm pixels (six numbers A, D, B, E, C, F; ESRI world file format).
WORLD = "0.01\n0\n0\n-0.01\n1000.005\n2000.995\n"


@pytest.fixture
def plot_png(tmp_path):
    src = tmp_path / "in" / "Plot 7.PNG"
    src.parent.mkdir()
    rgb = np.random.default_rng(2).integers(0, 256, (12, 16, 3), dtype=np.uint8)
    Image.fromarray(rgb).save(src, format="PNG")
    (src.parent / "Plot 7.pgw").write_text(WORLD)
    (src.parent / "Plot 7.prj").write_text(CRS.from_epsg(32632).to_wkt())
    return src


def test_copy_keeps_the_georeferencing(tmp_path, plot_png):
    assert [p.suffix for p in side_files(plot_png)] == [".pgw", ".prj"]
    sha = hashlib.sha256(plot_png.read_bytes()).hexdigest()
    copied = copy_image(plot_png, tmp_path / "images", "plot-7", sha256=sha)
    assert copied.image == tmp_path / "images" / "plot-7.png"
    assert [p.name for p in copied.side_files] == ["plot-7.pgw", "plot-7.prj"]
    with open_image(plot_png) as a, open_image(copied.image) as b:
        assert b.info.georef == a.info.georef
        np.testing.assert_array_equal(b.read(), a.read())
    copied.remove()
    assert list((tmp_path / "images").iterdir()) == []


def test_a_changed_image_leaves_nothing(tmp_path, plot_png):
    with pytest.raises(InputError, match=r"Plot 7.PNG: the file changed while it was being copied"):
        copy_image(plot_png, tmp_path / "images", "plot-7", sha256="0" * 64)
    assert list((tmp_path / "images").iterdir()) == []


def test_a_prj_that_is_not_a_file_is_not_copied(tmp_path, plot_png):
    (plot_png.parent / "Plot 7.prj").unlink()
    (plot_png.parent / "Plot 7.prj").mkdir()  # a folder where the .prj should be: skipped
    assert [p.suffix for p in side_files(plot_png)] == [".pgw"]
    copied = copy_image(plot_png, tmp_path / "images", "plot-7")
    assert copied == ImageCopy(tmp_path / "images" / "plot-7.png", (tmp_path / "images" / "plot-7.pgw",))


def test_a_side_file_that_cannot_be_copied_removes_the_image_copy(tmp_path, plot_png, monkeypatch):
    import labeler.imagery.intake as intake

    real = intake.atomic_copy_file

    def refuse_world_file(source, path, **kw):
        if str(path).endswith(".pgw"):
            raise PermissionError(13, "Permission denied", str(path))
        return real(source, path, **kw)

    monkeypatch.setattr(intake, "atomic_copy_file", refuse_world_file)
    with pytest.raises(PermissionError):
        copy_image(plot_png, tmp_path / "images", "plot-7")
    assert list((tmp_path / "images").iterdir()) == []
