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


# -- names claimed while an add runs, leftovers of killed adds -----------------------------
def test_files_named_are_exactly_the_image_and_its_side_files(tmp_path):
    from labeler.imagery.intake import files_named

    for name in ("plot-a.tif", "plot-a.tfw", "plot-a-2.tif", "plot-a.b.tif", ".plot-a.tif.x.part"):
        (tmp_path / name).write_bytes(b"x")
    assert [p.name for p in files_named(tmp_path, "plot-a")] == ["plot-a.tfw", "plot-a.tif"]
    assert [p.name for p in files_named(tmp_path, "plot-a.b")] == ["plot-a.b.tif"]
    assert files_named(tmp_path / "missing", "plot-a") == []


def test_reserved_names_never_collide(tmp_path):
    from labeler.imagery.intake import reserve_image_name

    (tmp_path / "plot.tif").write_bytes(b"an earlier copy")
    first, held1 = reserve_image_name(tmp_path, "plot", taken={"plot-2"})
    second, held2 = reserve_image_name(tmp_path, "plot", taken={"plot-2"})
    assert (first, second) == ("plot-3", "plot-4")  # plot: a file; plot-2: stored
    held1.release()
    held2.release()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["plot.tif"]


def test_leftovers_removed_only_for_dead_claims(tmp_path):
    from labeler.fileio import claim
    from labeler.imagery.intake import remove_leftovers

    (tmp_path / "kept.tif").write_bytes(b"a stored image")
    (tmp_path / ".adding-dead").write_text("")  # nobody holds it: its add was killed
    (tmp_path / "dead.tif").write_bytes(b"copied before the kill")
    (tmp_path / ".dead.tfw.abc_123.part").write_bytes(b"half a side file")
    (tmp_path / ".adding-stored").write_text("")  # killed after the store had it
    (tmp_path / "stored.tif").write_bytes(b"in the store")
    (tmp_path / "..adding-x.q1w2e3.tmp").write_text("")  # a claim killed while being made
    live = claim(tmp_path / ".adding-busy")
    (tmp_path / ".busy.tif.zz9.part").write_bytes(b"being copied")
    asked = []

    def stored():
        asked.append(1)
        return ["kept", "stored"]

    try:
        removed = remove_leftovers(tmp_path, stored=stored)
        assert sorted(p.name for p in removed) == [
            "..adding-x.q1w2e3.tmp",
            ".adding-dead",
            ".adding-stored",
            ".dead.tfw.abc_123.part",
            "dead.tif",
        ]
        assert sorted(p.name for p in tmp_path.iterdir()) == [
            ".adding-busy",
            ".busy.tif.zz9.part",
            "kept.tif",
            "stored.tif",
        ]
        assert asked == [1]  # the store is asked once, and only because claims were found
    finally:
        live.release()
    assert remove_leftovers(tmp_path, stored=lambda: pytest.fail("no claim, no question")) == [
        tmp_path / ".busy.tif.zz9.part"
    ]
