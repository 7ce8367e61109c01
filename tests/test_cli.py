"""The command line: init, add, status; exit codes and messages."""

import subprocess
import sys

import numpy as np
import pytest
from affine import Affine
from PIL import Image

from labeler.cli import main
from labeler.imagery.write import write_geotiff


@pytest.fixture
def images(tmp_path):
    rng = np.random.default_rng(5)
    a = rng.integers(0, 256, (300, 500, 3), dtype=np.uint8)
    write_geotiff(
        tmp_path / "north-strip.tif",
        a,
        transform=Affine(0.004, 0, 431000, 0, -0.004, 5712000),
        crs="EPSG:32631",
    )
    Image.fromarray(rng.integers(0, 256, (200, 200, 3), dtype=np.uint8)).save(tmp_path / "leaf.png")
    return tmp_path


def test_help_lists_commands():
    out = subprocess.run(
        [sys.executable, "-m", "labeler.cli", "--help"], capture_output=True, text=True, check=True
    )
    for cmd in ("init", "add", "status", "demo"):
        assert cmd in out.stdout
    assert "licensed agronomic advice" in out.stdout


def test_usage_error_exit_2(capsys):
    with pytest.raises(SystemExit) as info:
        main(["add"])
    assert info.value.code == 2


def test_init_add_status(tmp_path, images, capsys, project_store):
    proj = tmp_path / "proj"
    assert main(["init", str(proj)]) == 0
    assert main(["add", str(proj), str(images / "north-strip.tif"), str(images / "leaf.png")]) == 0
    out = capsys.readouterr().out
    assert "added north-strip: 6 tiles" in out and "added leaf: 1 tiles" in out
    assert (proj / "images" / "north-strip.tif").exists()
    # same content again: skipped with a message
    assert main(["add", str(proj), str(images / "north-strip.tif")]) == 0
    assert "already in the project as 'north-strip'" in capsys.readouterr().out
    assert main(["status", str(proj)]) == 0
    out = capsys.readouterr().out
    assert "2 images, 7 tiles" in out and "unseen" in out and "north-strip" in out


def test_bad_image_leaves_project_as_it_was(tmp_path, images, capsys, project_store):
    proj = tmp_path / "proj"
    main(["init", str(proj)])
    (images / "broken.png").write_bytes(b"\x89PNG\r\n\x1a\n" + b"\x00" * 40)
    listing = sorted(p.name for p in (proj / "images").iterdir())
    assert main(["add", str(proj), str(images / "broken.png")]) == 1
    err = capsys.readouterr().err
    assert err.startswith("labeler: error: ") and "broken.png" in err and err.count("\n") == 1
    assert sorted(p.name for p in (proj / "images").iterdir()) == listing
    from labeler.project import open_project

    with open_project(proj) as p:
        assert p.store.images() == [] and p.store.tiles() == []


def test_errors_exit_1(tmp_path, capsys):
    assert main(["status", str(tmp_path / "nowhere")]) == 1
    assert "labeler init" in capsys.readouterr().err
    main(["init", str(tmp_path / "p")])
    assert main(["init", str(tmp_path / "p")]) == 1
    assert "already holds a labeler project" in capsys.readouterr().err
    assert main(["add", str(tmp_path / "p"), str(tmp_path / "missing.tif")]) == 1
    assert "missing.tif: no such file" in capsys.readouterr().err


def test_add_with_a_date_or_the_tag_date(tmp_path, images, capsys):
    proj = tmp_path / "proj"
    main(["init", str(proj)])
    # EXIF DateTimeOriginal (tag 36867 in the EXIF sub-directory; Exif 2.32, CIPA DC-008-2019)
    exif = Image.Exif()
    exif.get_ifd(0x8769)[36867] = "2027:05:14 10:21:00"
    Image.open(images / "leaf.png").save(tmp_path / "dated.jpg", exif=exif)
    assert main(["add", str(proj), str(tmp_path / "dated.jpg")]) == 0
    assert "taken 2027-05-14 (from its DateTimeOriginal tag)" in capsys.readouterr().out
    assert main(["add", str(proj), str(images / "north-strip.tif"), "--date", "2027-06-02"]) == 0
    assert "added north-strip: 6 tiles, taken 2027-06-02 (as given)" in capsys.readouterr().out
    with pytest.raises(SystemExit) as info:
        main(["add", str(proj), str(images / "leaf.png"), "--date", "14/05/2027"])
    assert info.value.code == 2
    assert "expected a date like 2027-05-14 (YYYY-MM-DD), got '14/05/2027'" in capsys.readouterr().err


def test_adapt_then_status_names_the_encoder(tmp_path, images, capsys):
    proj = tmp_path / "proj"
    main(["init", str(proj)])
    (proj / "labeler.toml").write_text("[tiles]\nsize = 64\noverlap = 0\n[model]\nthreads = 1\n")
    main(["add", str(proj), str(images / "leaf.png")])
    capsys.readouterr()
    assert main(["adapt", str(proj), "--minutes", "0.25", "--method", "image"]) == 0
    out = capsys.readouterr().out
    assert "adapted encoder-1 (lite0-" in out and "with the image method on 16 tiles" in out
    assert main(["status", str(proj)]) == 0
    assert "propose uses: cold start (no trained head yet) on encoder encoder-1" in (
        capsys.readouterr().out
    )
    with pytest.raises(SystemExit) as info:
        main(["adapt", str(proj), "--minutes", "0"])
    assert info.value.code == 2
