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
