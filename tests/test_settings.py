"""The settings table resolves defaults < file < environment < flags, and rejects bad values."""

import pytest

from nearsight.indexer.core.errors import UsageError
from nearsight.indexer.core.settings import SETTINGS, describe, load_settings


def test_defaults_come_from_the_table():
    settings = load_settings(environ={})
    for setting in SETTINGS:
        assert settings[setting.name] == setting.parse(setting.default)
        assert settings.source(setting.name) == "default"


def test_file_then_environment_then_flags_win_in_that_order(tmp_path):
    (tmp_path / "settings.toml").write_text("thumb_side = 200\nworkers = 3\nmax_pixels = 1000\n")
    env = {"NEARSIGHT_WORKERS": "5", "NEARSIGHT_MAX_PIXELS": "2000"}
    settings = load_settings(store_dir=tmp_path, environ=env, overrides={"max_pixels": 3000})
    assert (settings.thumb_side, settings.source("thumb_side")) == (200, str(tmp_path / "settings.toml"))
    assert (settings.workers, settings.source("workers")) == (5, "NEARSIGHT_WORKERS")
    assert (settings.max_pixels, settings.source("max_pixels")) == (3000, "command line")


def test_extensions_are_normalised():
    settings = load_settings(environ={"NEARSIGHT_EXTENSIONS": "JPG, .Png,tif"})
    assert settings.extensions == (".jpg", ".png", ".tif")


@pytest.mark.parametrize(
    "env, message",
    [
        ({"NEARSIGHT_WORKERS": "many"}, "NEARSIGHT_WORKERS"),
        ({"NEARSIGHT_WORKERS": "-1"}, "NEARSIGHT_WORKERS"),
        ({"NEARSIGHT_SKIP_HIDDEN": "perhaps"}, "true or false"),
    ],
)
def test_bad_values_are_usage_errors_naming_their_origin(env, message):
    with pytest.raises(UsageError, match=message):
        load_settings(environ=env)


def test_unknown_setting_in_file_is_refused(tmp_path):
    (tmp_path / "settings.toml").write_text("thumbside = 100\n")
    with pytest.raises(UsageError, match="unknown setting 'thumbside'"):
        load_settings(store_dir=tmp_path, environ={})


def test_broken_settings_file_is_a_clear_error(tmp_path):
    (tmp_path / "settings.toml").write_text("workers = = 2\n")
    with pytest.raises(UsageError, match="cannot read settings file"):
        load_settings(store_dir=tmp_path, environ={})


def test_describe_lists_every_setting_with_help():
    rows = describe()
    assert [r["name"] for r in rows] == [s.name for s in SETTINGS]
    assert all(r["help"] and r["env"].startswith("NEARSIGHT_") for r in rows)
