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
