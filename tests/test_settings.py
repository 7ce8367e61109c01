"""Project settings: defaults, file, environment, errors."""

import pytest

from labeler.errors import SettingsError
from labeler.settings import (
    RANGES,
    RETIRED_OPTIONS,
    SETTINGS_FILE,
    Settings,
    default_settings_text,
    load_settings,
)


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
    ("text", "match"),
    [
        ("[model\n", "not valid TOML"),
        ("[nonsense]\n", "unknown section"),
        ("[model]\nwings = 2\n", r"unknown option\(s\) wings"),
        ('[model]\nmc_samples = "many"\n', "model.mc_samples: expected a whole number"),
        ("[model]\nmc_samples = 0\n", "at least 1"),
        ('[picker]\nstrategy = "greedy"\n', "picker.strategy: expected one of"),
        (
            '[model]\naugment = "rotate"\n',
            "model.augment: expected one of auto, turns, features, images",
        ),
        (
            '[model]\ntrain_precision = "half"\n',
            "model.train_precision: expected one of auto, float32, bfloat16",
        ),
        ("[model]\npatience = 0\n", "model.patience: expected a whole number at least 1, got 0"),
        ('[model]\nprecision = "int8"\n', "model.precision: expected one of auto, float32, bfloat16"),
        ("[tiles]\nsize = 64\noverlap = 64\n", "tiles.overlap"),
        ("[picker]\nk = true\n", "picker.k: expected a whole number at least 1, got True"),
        ('[editor]\nopacity = "half"\n', "editor.opacity: expected a number"),
        ("[classes]\nsoil = { index = 0 }\nweed = { index = 0 }\n", "used twice"),
    ],
)
def test_errors_name_the_option(tmp_path, text, match):
    (tmp_path / SETTINGS_FILE).write_text(text)
    with pytest.raises(SettingsError, match=match) as info:
        load_settings(tmp_path, environ={})
    assert str(info.value).startswith(str(tmp_path / SETTINGS_FILE))
    assert isinstance(info.value, ValueError)  # callers that catch ValueError keep working


# The values that passed loading but broke a command later, or were accepted although
# wrong (nan threshold: no tile ever contested; epochs <= 0: an untrained head).
@pytest.mark.parametrize(
    ("text", "line", "match"),
    [
        ("[editor]\nopacity = 50\n", 2, r"editor\.opacity: expected a number at least 0 and at most 1, got 50\.0"),
        ("[export]\nseed = 1\nval_share = nan\n", 3, r"export\.val_share: expected a number .*\(finite.*got nan"),
        ("[export]\nsimplify_tolerance_px = -1\n", 2, r"export\.simplify_tolerance_px: expected a number at least 0, got -1\.0"),
        ("[model]\nbatch_size = 0\n", 2, r"model\.batch_size: expected a whole number at least 1, got 0"),
        ("[model]\nepochs = -5\n", 2, r"model\.epochs: expected a whole number at least 1, got -5"),
        ("[model]\nepochs = 0\n", 2, r"model\.epochs: .* at least 1, got 0"),
        ("[model]\nepochs = nan\n", 2, r"model\.epochs: .*finite.*got nan"),
        ("[model]\nepochs = 1e400\n", 2, r"model\.epochs: .*finite.*got inf"),
        ("[model]\nseed = inf\n", 2, r"model\.seed: .*finite.*got inf"),
        ("[model]\nseed = -1\n", 2, r"model\.seed: expected a whole number at least 0, got -1"),
        ("[model]\nmc_samples = 2.5\n", 2, r"model\.mc_samples: expected a whole number"),
        ("[agreement]\nthreshold = nan\n", 2, r"agreement\.threshold: .*finite.*got nan"),
        ("[agreement]\nthreshold = 1.5\n", 2, r"agreement\.threshold: expected a number at least -1 and at most 1"),
        ('[agreement]\nmetric = "iou"\nthreshold = -0.2\n', 3, r"agreement\.threshold: expected an IoU between 0 and 1"),
        ("[tiles]\nsize = 99999999999999999999\n", 2, r"tiles\.size: .*finite, at most"),
        ("[classes]\nsoil = { index = 0 }\ncrop = 3\n", 3, r'classes\.crop: expected a table like \{ index = 1, colour = "#0072B2" \}, got 3'),
        ("[classes]\nsoil = { index = 0 }\ncrop = { index = 255 }\n", 3, r"classes\.crop\.index: expected a whole number from 0 to 254"),
        ("\n\nmodel.epochs = 0\n", 3, r"model\.epochs"),  # a dotted key outside any table
    ],
)  # fmt: skip
def test_bad_values_name_the_file_line_and_option(tmp_path, text, line, match):
    (tmp_path / SETTINGS_FILE).write_text(text)
    with pytest.raises(SettingsError, match=match) as info:
        load_settings(tmp_path, environ={})
    message = str(info.value)
    assert message.startswith(f"{tmp_path / SETTINGS_FILE} line {line}: ")
    assert message.endswith("to use the default") or message.endswith("the default classes")
    assert "\n" not in message


@pytest.mark.parametrize(
    ("variable", "value", "match"),
    [
        ("LABELER_PICKER_K", "some", r"picker\.k: expected a whole number at least 1, got 'some'"),
        ("LABELER_MODEL_EPOCHS", "nan", r"model\.epochs: .*finite.*got 'nan'"),
        ("LABELER_MODEL_EPOCHS", "1e400", r"model\.epochs: .*finite.*got '1e400'"),
        ("LABELER_MODEL_BATCH_SIZE", "0", r"model\.batch_size: .* at least 1, got 0"),
        (
            "LABELER_TILES_OVERLAP",
            "300",
            r"tiles\.overlap: expected fewer pixels than tiles\.size \(256\)",
        ),
        ("LABELER_AGREEMENT_THRESHOLD", "inf", r"agreement\.threshold: .*finite"),
        ("LABELER_STORE_URL", "not a url", r"store\.url: expected a database URL"),
    ],
)
def test_errors_from_variables_name_the_variable_not_the_file(tmp_path, variable, value, match):
    (tmp_path / SETTINGS_FILE).write_text(default_settings_text())
    with pytest.raises(SettingsError, match=match) as info:
        load_settings(tmp_path, environ={variable: value})
    message = str(info.value)
    assert message.startswith(f"environment variable {variable}: ")
    assert SETTINGS_FILE not in message and info.value.origin == variable


def test_store_url_is_not_echoed(tmp_path):
    # a URL may carry a password: a malformed one is described, never printed
    with pytest.raises(SettingsError, match="store.url") as info:
        load_settings(tmp_path, environ={"LABELER_STORE_URL": "user:s3cret@server/labeler"})
    assert "s3cret" not in str(info.value)


def test_settings_file_that_is_a_folder(tmp_path):
    (tmp_path / SETTINGS_FILE).mkdir()
    with pytest.raises(
        SettingsError, match=r"labeler\.toml: is a folder, expected the settings file"
    ):
        load_settings(tmp_path, environ={})


def test_settings_file_that_is_not_utf8(tmp_path):
    (tmp_path / SETTINGS_FILE).write_bytes(b"[model]\nseed = 1 # \xff\xfe\n")
    with pytest.raises(SettingsError, match=r"labeler\.toml: not UTF-8 text .* at byte 20"):
        load_settings(tmp_path, environ={})


def test_every_range_end_is_accepted_and_the_value_beyond_refused():
    # a boundary check for each entry of RANGES: the closed end (or just inside an open
    # end) is accepted, the end itself (open) or one step beyond it (closed) is refused
    for section, options in RANGES.items():
        for option, limits in options.items():
            kind = type(getattr(getattr(Settings(), section), option))
            step = 1 if kind is int else 1e-6
            for end, outward, open_end in (
                (limits.low, -step, limits.low_open),
                (limits.high, step, limits.high_open),
            ):
                if end is None:
                    continue
                inside = kind(end - outward) if open_end else kind(end)
                outside = kind(end) if open_end else kind(end + outward)
                # the tile overlap must stay below the tile size
                extra = {"overlap": 0} if (section, option) == ("tiles", "size") else {}
                s = Settings().replace(**{section: {option: inside, **extra}})
                assert getattr(getattr(s, section), option) == inside
                with pytest.raises(SettingsError, match=rf"^{section}\.{option}: expected"):
                    Settings().replace(**{section: {option: outside, **extra}})


def test_origins_tell_where_each_value_came_from(tmp_path):
    (tmp_path / SETTINGS_FILE).write_text("[model]\n\nseed = 3\nepochs = 12\n")
    s = load_settings(tmp_path, environ={"LABELER_MODEL_EPOCHS": "7"})
    assert s.origin("model.seed") == f"{tmp_path / SETTINGS_FILE} line 3"
    assert s.origin("model.epochs") == "LABELER_MODEL_EPOCHS" and s.model.epochs == 7
    assert s.origin("model.batch_size") == "default"


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
