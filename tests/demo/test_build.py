"""labeler demo: a project built from the committed demo plots."""

import pytest

from labeler.cli import main
from labeler.demo.build import DEMO_FIELDS, demo_images, truth_path
from labeler.errors import LabelerError


def test_demo_plots_are_committed():
    images = demo_images()
    assert len(images) == 6
    assert all(truth_path(p).exists() for p in images)


def test_demo_command_builds_and_refuses_to_clobber(tmp_path, capsys):
    out = tmp_path / "demo"
    assert main(["demo", "--out", str(out), "--setup-only"]) == 0
    text = capsys.readouterr().out
    assert "6 images, 120 tiles" in text and "far-terrace" in text
    assert main(["demo", "--out", str(out), "--setup-only"]) == 1  # already there: needs --fresh
    assert "--fresh" in capsys.readouterr().err
    other = tmp_path / "work"
    other.mkdir()
    (other / "notes.txt").write_text("somebody's work")
    assert main(["demo", "--out", str(other), "--fresh", "--setup-only"]) == 1  # never deletes a non-demo folder
    assert (other / "notes.txt").exists()


def test_demo_images_error(tmp_path):
    with pytest.raises(LabelerError, match="no demo plots"):
        demo_images(tmp_path / "none")
    assert DEMO_FIELDS.name == "demo_fields"
