"""Settings: precedence, types, documentation."""
from __future__ import annotations

import re
import tomllib
from pathlib import Path

import pytest

from fleetwatch.config import SETTINGS, default_toml, load_settings
from fleetwatch.errors import ConfigError

ROOT = Path(__file__).resolve().parents[1]


def test_defaults_when_nothing_set(tmp_path):
    s = load_settings(tmp_path, env={})
    for setting in SETTINGS:
        assert s[setting.name] == setting.default
        assert s.source(setting.name) == "default"


def test_precedence_default_file_env_cli(tmp_path):
    (tmp_path / "fleetwatch.toml").write_text(
        "[health]\nslip_limit = 0.06\nalert_horizon_days = 10\n[analyze]\nwindow_min = 5\n")
    env = {"FLEETWATCH_SLIP_LIMIT": "0.07", "FLEETWATCH_WINDOW_MIN": "15"}
    s = load_settings(tmp_path, overrides={"slip_limit": 0.08, "persist_k": None}, env=env)
    assert s.slip_limit == 0.08 and s.source("slip_limit") == "cli"        # cli beats env
    assert s.window_min == 15 and s.source("window_min") == "env"          # env beats file
    assert s.alert_horizon_days == 10.0 and s.source("alert_horizon_days") == "file"
    assert isinstance(s.alert_horizon_days, float)                         # int in TOML -> float
    assert s.persist_k == 2 and s.source("persist_k") == "default"         # None = not given


def test_project_from_env(tmp_path):
    s = load_settings(None, env={"FLEETWATCH_PROJECT": str(tmp_path)})
    assert s.project == tmp_path.resolve()
    assert s.lake_path == (tmp_path / "lake").resolve()


@pytest.mark.parametrize("env,needle", [
    ({"FLEETWATCH_WINDOW_MIN": "ten"}, "window_min"),
    ({"FLEETWATCH_PERSIST_K": "2.5"}, "persist_k"),
])
def test_bad_env_value_names_the_setting(tmp_path, env, needle):
    with pytest.raises(ConfigError) as ei:
        load_settings(tmp_path, env=env)
    assert needle in ei.value.message and "FLEETWATCH_" in ei.value.message
    assert ei.value.exit_code == 2


def test_unknown_key_in_file(tmp_path):
    (tmp_path / "fleetwatch.toml").write_text("slip_limitt = 0.1\n")
    with pytest.raises(ConfigError, match="unknown setting 'slip_limitt'"):
        load_settings(tmp_path, env={})


def test_default_toml_round_trips(tmp_path):
    text = default_toml()
    # every setting appears, commented, with its help line
    for s in SETTINGS:
        assert f"# {s.name} = " in text
    # uncommenting every line gives a valid file equal to the defaults
    uncommented = re.sub(r"^# (\w+ = )", r"\1", text, flags=re.M)
    data = tomllib.loads(uncommented)
    flat = {k: v for sec in data.values() for k, v in sec.items()}
    assert set(flat) == {s.name for s in SETTINGS}
    (tmp_path / "fleetwatch.toml").write_text(uncommented)
    s = load_settings(tmp_path, env={})
    assert all(s[x.name] == x.default for x in SETTINGS)


def test_every_setting_is_in_readme():
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    missing = [s.name for s in SETTINGS if f"`{s.name}`" not in readme]
    assert not missing, f"settings missing from the README's settings table: {missing}"
