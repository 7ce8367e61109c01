"""Project settings: defaults, file, environment, errors."""

import pytest

from labeler.settings import RETIRED_OPTIONS, SETTINGS_FILE, default_settings_text, load_settings


def test_defaults_without_file(tmp_path):
    s = load_settings(tmp_path, environ={})
    assert (s.tiles.size, s.tiles.overlap) == (256, 32)
    assert s.cold_start.exr_coefficient == 1.4  # Meyer & Neto 2008
    assert s.model.mc_samples == 8 and s.picker.strategy == "mixed"
    assert s.db_url.startswith("sqlite:///") and s.db_url.endswith("labeler.db")


def test_default_file_parses_to_defaults(tmp_path):
    (tmp_path / SETTINGS_FILE).write_text(default_settings_text())
    assert load_settings(tmp_path, environ={}) == load_settings(
        tmp_path / "nothing", environ={}
    ).replace(project=tmp_path)


def test_file_and_environment(tmp_path):
    (tmp_path / SETTINGS_FILE).write_text(
        "[model]\nmc_samples = 4\n[cold_start]\nexr_coefficient = 1.3\n"
    )
    s = load_settings(
        tmp_path, environ={"LABELER_MODEL_MC_SAMPLES": "2", "LABELER_STORE_URL": "sqlite:///x.db"}
    )
    assert s.model.mc_samples == 2  # the environment wins
    assert s.cold_start.exr_coefficient == 1.3
    assert s.db_url == "sqlite:///x.db"


def test_custom_classes(tmp_path):
    (tmp_path / SETTINGS_FILE).write_text(
        '[classes]\nsoil = { index = 0 }\nbeet = { index = 1, colour = "#009E73" }\n'
    )
    s = load_settings(tmp_path, environ={})
    assert s.classes.names == ("soil", "beet")


@pytest.mark.parametrize(
    ("text", "env", "match"),
    [
        ("[model\n", {}, "not valid TOML"),
        ("[nonsense]\n", {}, "unknown section"),
        ("[model]\nwings = 2\n", {}, r"unknown option\(s\) wings"),
        ('[model]\nmc_samples = "many"\n', {}, "model.mc_samples: expected an integer"),
        ("[model]\nmc_samples = 0\n", {}, "at least 1"),
        ('[picker]\nstrategy = "greedy"\n', {}, "picker.strategy: expected one of"),
        ('[model]\naugment = "rotate"\n', {}, "model.augment: expected one of auto, features, images"),
        ("[model]\npatience = 0\n", {}, "model.patience: expected at least 1 epoch, got 0"),
        ("[tiles]\nsize = 64\noverlap = 64\n", {}, "tiles.overlap"),
        ("", {"LABELER_PICKER_K": "some"}, "picker.k: expected an integer, got 'some'"),
        ("[picker]\nk = true\n", {}, "picker.k: expected an integer, got True"),
        ('[editor]\nopacity = "half"\n', {}, "editor.opacity: expected a number"),
        ("[classes]\nsoil = { index = 0 }\nweed = { index = 0 }\n", {}, "used twice"),
    ],
)
def test_errors_name_the_option(tmp_path, text, env, match):
    (tmp_path / SETTINGS_FILE).write_text(text)
    with pytest.raises(ValueError, match=match) as info:
        load_settings(tmp_path, environ=env)
    assert SETTINGS_FILE in str(info.value)


def test_replace_one_option(tmp_path):
    s = load_settings(tmp_path, environ={}).replace(model={"mc_samples": 3})
    assert s.model.mc_samples == 3 and s.model.seed == 0


def test_retired_options_are_ignored_so_older_projects_open(tmp_path):
    # a settings file written by an older version still carries these two options
    (tmp_path / SETTINGS_FILE).write_text(
        "[picker]\nvegetation_only = true\nk = 5\n[agreement]\nboundary_tolerance_px = 2\n"
    )
    s = load_settings(tmp_path, environ={})
    assert s.picker.k == 5
    assert not hasattr(s.picker, "vegetation_only")
    assert not hasattr(s.agreement, "boundary_tolerance_px")
    for section, options in RETIRED_OPTIONS.items():
        for option in options:
            assert option not in default_settings_text()
            (tmp_path / SETTINGS_FILE).write_text(f"[{section}]\n{option}_x = 1\n")
            with pytest.raises(ValueError, match=rf"unknown option\(s\) {option}_x"):
                load_settings(tmp_path, environ={})
