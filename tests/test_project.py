"""Project folders and path safety."""

import pytest

from labeler.errors import InputError
from labeler.project import init_project, open_project


def test_stored_path_may_not_leave_project(tmp_path):
    with init_project(tmp_path / "p") as project:
        assert project.resolve("images/a.tif") == tmp_path / "p" / "images" / "a.tif"
        with pytest.raises(InputError, match="leaves the project folder"):
            project.resolve("../../etc/passwd")


def test_open_reads_settings(tmp_path):
    init_project(tmp_path / "p").close()
    (tmp_path / "p" / "labeler.toml").write_text("[model]\nmc_samples = 3\n")
    with open_project(tmp_path / "p") as project:
        assert project.settings.model.mc_samples == 3
    (tmp_path / "p" / "labeler.toml").write_text("[model]\nmc_samples = -3\n")
    from labeler.errors import LabelerError

    with pytest.raises(LabelerError, match="model.mc_samples"):
        open_project(tmp_path / "p")


def test_in_place_image_is_hashed_once_while_unchanged(tmp_path, monkeypatch):
    import numpy as np
    from PIL import Image

    import labeler.project as project_mod
    from labeler.workflow import add_images

    image = tmp_path / "leaf.png"
    Image.fromarray(np.full((20, 30, 3), 90, np.uint8)).save(image)
    init_project(tmp_path / "p").close()
    with open_project(tmp_path / "p") as project:
        add_images(project, [image], copy=False)
        record = project.store.images()[0]
    calls = []
    real = project_mod.sha256_file
    monkeypatch.setattr(project_mod, "sha256_file", lambda p: calls.append(p) or real(p))
    with open_project(tmp_path / "p") as project:
        assert project.image_path(record) == image.resolve()
        assert project.image_path(record) == image.resolve()
    with open_project(tmp_path / "p") as project:  # remembered in cache/ across commands
        assert project.image_path(record) == image.resolve()
    assert len(calls) == 1
    Image.fromarray(np.full((20, 30, 3), 91, np.uint8)).save(image)  # same size, new content
    with open_project(tmp_path / "p") as project:
        with pytest.raises(
            InputError,
            match=r"leaf\.png: image 'leaf' was added in place, but the file has changed",
        ):
            project.image_path(record)
    image.unlink()
    with open_project(tmp_path / "p") as project:
        with pytest.raises(InputError, match=r"was added in place and the file is gone"):
            project.image_path(record)
