"""Settings from defaults, a TOML file and OCCFUSE_* environment variables, with clear errors."""

from __future__ import annotations

import pytest

from fusion.config import DEFAULTS, load_settings
from fusion.errors import ConfigError


def test_defaults_without_file_or_environment():
    assert load_settings(environ={}) == DEFAULTS


def test_environment_overrides_file(tmp_path):
    f = tmp_path / "occfuse.toml"
    f.write_text('database_url = "sqlite:///from-file.db"\ninterval_s = 5\nadmin_token = "f"\n')
    got = load_settings(environ={"OCCFUSE_CONFIG": str(f), "OCCFUSE_INTERVAL_S": "2.5"})
    assert got["DATABASE_URL"] == "sqlite:///from-file.db"
    assert got["INTERVAL_S"] == 2.5 and got["ADMIN_TOKEN"] == "f"


@pytest.mark.parametrize("env,needle", [({"OCCFUSE_INTERVAL_S": "soon"}, "OCCFUSE_INTERVAL_S"),
                                        ({"OCCFUSE_MIN_NODES": "2.5"}, "MIN_NODES"),
                                        ({"OCCFUSE_SCHEDULER_ENABLED": "maybe"}, "SCHEDULER_ENABLED")])
def test_bad_environment_values_name_the_variable(env, needle):
    with pytest.raises(ConfigError, match=needle):
        load_settings(environ=env)


def test_unknown_key_in_file_is_an_error(tmp_path):
    f = tmp_path / "c.toml"
    f.write_text("intervl_s = 3\n")
    with pytest.raises(ConfigError, match="intervl_s"):
        load_settings(environ={"OCCFUSE_CONFIG": str(f)})


def test_missing_and_malformed_files(tmp_path):
    with pytest.raises(ConfigError, match="does not exist"):
        load_settings(environ={"OCCFUSE_CONFIG": str(tmp_path / "none.toml")})
    bad = tmp_path / "bad.toml"
    bad.write_text("interval_s = = 3")
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_settings(environ={"OCCFUSE_CONFIG": str(bad)})
