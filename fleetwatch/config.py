"""Settings: every setting is declared once in ``SETTINGS`` (name, default, unit, help).

Precedence, lowest first (design.md section 7, style.md 7):

1. the defaults below;
2. ``fleetwatch.toml`` in the project folder (flat keys, or keys grouped under
   ``[section]`` tables named like the sections below: both are read);
3. environment variables ``FLEETWATCH_<NAME>`` (for example ``FLEETWATCH_SLIP_LIMIT=0.06``);
4. command-line options (passed as ``overrides``).

The README's settings table and ``fleetwatch init`` read this one table; a test
fails when a setting is missing from the README.
"""
from __future__ import annotations

import os
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterable, Mapping

from .errors import ConfigError

__all__ = [
    "Setting", "SETTINGS", "Settings", "load_settings", "find_project",
    "default_toml", "write_default_toml", "CONFIG_FILE", "ENV_PREFIX",
]

CONFIG_FILE = "fleetwatch.toml"
ENV_PREFIX = "FLEETWATCH_"
PROJECT_ENV = "FLEETWATCH_PROJECT"


@dataclass(frozen=True)
class Setting:
    name: str
    default: Any
    unit: str
    help: str
    section: str

    @property
    def type(self) -> type:
        return type(self.default)


def _s(section: str, rows: Iterable[tuple[str, Any, str, str]]) -> list[Setting]:
    return [Setting(n, d, u, h, section) for n, d, u, h in rows]


# Values marked (common practice, no source) or (from memory) follow domain.md's rule.
SETTINGS: tuple[Setting, ...] = tuple(
    _s("plant", [
        ("plant_timezone", "UTC", "IANA zone",
         "Time zone of the plant: report weeks and naive timestamps are read in it."),
        ("ratio_min", 0.2, "-",
         "Lowest valid commanded ratio i = n_in/n_out; rows below it are quarantined."),
        ("ratio_max", 5.0, "-",
         "Highest valid commanded ratio; rows above it are quarantined."),
        ("v_max_v", 1000.0, "V", "Highest plausible motor voltage; above it a row is quarantined."),
        ("i_max_a", 1000.0, "A", "Highest plausible motor current magnitude."),
        ("p_max_w", 1.0e6, "W", "Highest plausible input power magnitude."),
        ("n_max_rpm", 20000.0, "rpm", "Highest plausible shaft speed."),
        ("t_out_max_nm", 1.0e5, "N*m", "Highest plausible output torque magnitude."),
        ("temp_min_c", -50.0, "degC", "Lowest plausible temperature."),
        ("temp_max_c", 250.0, "degC", "Highest plausible temperature."),
    ])
    + _s("lake", [
        ("lake_dir", "lake", "path", "Folder of the Delta tables, relative to the project folder."),
        ("ingest_chunk_rows", 500_000, "rows",
         "Rows read per chunk when streaming large files (bounds memory)."),
        ("lock_timeout_s", 0.0, "s",
         "How long a writer waits for the lake's writer lock before giving up (0: fail at once)."),
        ("retention_hours", 168.0, "h",
         "`fleetwatch compact` removes table versions older than this."),
        ("sql_time_limit_s", 30.0, "s", "Time limit of one ad-hoc SQL query."),
        ("sql_row_cap", 10_000, "rows", "Rows shown or returned by one ad-hoc SQL query."),
        ("sql_memory_limit", "1GB", "bytes", "DuckDB memory limit of one ad-hoc SQL query."),
    ])
    + _s("analyze", [
        ("window_min", 10, "min", "Length of the `windows` aggregation interval."),
        ("sample_period_s", 60.0, "s",
         "Expected logging period, for completeness and gap detection."),
        ("steady_n_in_min_rpm", 300.0, "rpm",
         "A sample counts as steady only above this input speed (slip is ill-conditioned near 0)."),
        ("steady_settle_s", 120.0, "s",
         "A sample counts as steady only when ratio_cmd has been unchanged this long."),
        ("gross_slip_limit", 0.10, "-",
         "Slip above this is gross slip (common practice, no source)."),
        ("gross_slip_min_samples", 2, "samples",
         "Consecutive samples above the gross-slip limit that make a gross-slip event."),
        ("stall_i_a", 8.0, "A",
         "Current above this with input speed about zero is a stall."),
        ("stall_n_in_max_rpm", 30.0, "rpm", "Input speed below this counts as standing still."),
        ("stall_min_s", 0.0, "s",
         "Shortest stall reported (0: a single sample is enough)."),
        ("flatline_min_s", 1800.0, "s",
         "A value unchanged to the last digit this long while the drive runs is a flatline."),
        ("gap_min_s", 900.0, "s", "A pause in the log longer than this is a data gap."),
        ("clock_jump_s", 3600.0, "s",
         "A timestamp step backwards, or forwards by more than this between samples logged in "
         "sequence, is a clock jump."),
        ("ratio_bin_width", 0.5, "-", "Width of the ratio bins for creep-versus-load fits."),
        ("reference_days", 14, "d",
         "Days after a unit's first data (or its last wear reset) that form its reference period."),
        ("load_ref_nm", 1.0, "N*m",
         "Motor shaft torque at which 'steady slip at rated load' is evaluated (a + b*load)."),
        ("motor_i0_a", 0.2, "A",
         "No-load current I_0 of the motors in T_shaft = k_e*(I - I_0) when output torque is "
         "not logged (domain.md section 6 #8 example value; set it from the motor data sheet)."),
    ])
    + _s("health", [
        ("slip_limit", 0.05, "-",
         "Wear limit of steady slip at rated load; days to limit count to this level."),
        ("alert_horizon_days", 14.0, "d", "Alert when the median days to limit fall below this."),
        ("watch_horizon_days", 45.0, "d", "Watch when the median days to limit fall below this."),
        ("watch_score", 0.62, "-",
         "Isolation-forest score (paper scale, 0.5 = nothing distinct) at or above which a day is "
         "anomalous."),
        ("persist_k", 2, "days", "Trend- and score-based states need k of the last n days..."),
        ("persist_n", 3, "days", "...out of this many days."),
        ("clear_m", 3, "days", "Clean days needed before a trend- or score-based state clears."),
        ("gross_slip_events_per_day", 3.0, "1/d",
         "Gross-slip events in one day at or above this raise an alert at once."),
        ("stall_repeat", 2, "events", "Stalls in one day at or above this raise an alert at once."),
        ("forecast_confidence", 0.90, "-", "Confidence level of the Theil-Sen slope interval."),
        ("min_trend_days", 7, "d", "Fewest days with data behind a trend or forecast."),
        ("trend_window_days", 42, "d",
         "A trend as of a day looks back at most this many days since the last wear reset "
         "(bounds the cost, follows wear that speeds up; common practice, no source)."),
        ("random_state", 0, "-", "Seed of the isolation forest (fixed for reproducible reports)."),
    ])
    + _s("report", [
        ("reports_dir", "reports", "path", "Folder of weekly reports, relative to the project."),
        ("report_units_max", 30, "units", "Most units given an evidence section in one report."),
        ("plan_margin_days", 7, "d",
         "actions.csv plans work this many days before the forecast limit crossing (never "
         "before the report date; common practice, no source)."),
    ])
    + _s("dashboard", [
        ("dashboard_host", "127.0.0.1", "host", "Address the dashboard listens on."),
        ("dashboard_port", 8501, "port", "Port the dashboard listens on."),
    ])
    + _s("advisor", [
        ("advice_min_windows", 20, "windows", "Fewest steady windows behind one duty-bin advice."),
        ("max_start_ratio", 3.0, "-",
         "Highest ratio a drive may be asked to start in (steep ratios stall at start)."),
        ("motor_n_max_rpm", 3500.0, "rpm", "Motor speed limit the advisor respects."),
        ("motor_i_max_a", 10.0, "A", "Motor current limit the advisor respects."),
        ("duty_bins_per_decade", 10, "bins/decade",
         "Duty bins per decade of output speed and of output torque: 5, 10 or 20 (ISO 3 "
         "preferred-number series R5/R10/R20; R10 bins are about 26 % wide)."),
        ("advice_bootstrap", 200, "replicates",
         "Bootstrap replicates (days resampled) behind the advisor's saving intervals."),
        ("advice_confidence", 0.90, "-", "Confidence level of the advisor's saving intervals."),
    ])
)

_BY_NAME = {s.name: s for s in SETTINGS}
assert len(_BY_NAME) == len(SETTINGS), "a setting is declared twice"


def _coerce(setting: Setting, value: Any, where: str) -> Any:
    """Convert ``value`` to the setting's type; strings come from env or CLI."""
    t = setting.type
    try:
        if t is bool:
            if isinstance(value, str):
                v = value.strip().lower()
                if v in ("1", "true", "yes", "on"):
                    return True
                if v in ("0", "false", "no", "off"):
                    return False
                raise ValueError(value)
            return bool(value)
        if t is int:
            if isinstance(value, float) and not value.is_integer():
                raise ValueError(value)
            return int(value)
        if t is float:
            return float(value)
        return str(value)
    except (TypeError, ValueError):
        raise ConfigError(
            f"setting '{setting.name}' from {where}: {value!r} is not a valid {t.__name__}",
            hint=f"{setting.help} Unit: {setting.unit}. Default: {setting.default!r}.",
        ) from None


class Settings:
    """Resolved settings; read them as attributes (``settings.slip_limit``).

    ``source(name)`` says where a value came from: default, file, env or cli.
    """

    def __init__(self, values: Mapping[str, Any], sources: Mapping[str, str], project: Path):
        self._values = dict(values)
        self._sources = dict(sources)
        self.project = Path(project)

    def __getattr__(self, name: str) -> Any:
        try:
            return self.__dict__["_values"][name]
        except KeyError:
            raise AttributeError(name) from None

    def __getitem__(self, name: str) -> Any:
        return self._values[name]

    def source(self, name: str) -> str:
        return self._sources[name]

    def as_dict(self) -> dict[str, Any]:
        return dict(self._values)

    def replace(self, **overrides: Any) -> "Settings":
        """A copy with some values changed (checked and coerced like CLI options)."""
        values, sources = dict(self._values), dict(self._sources)
        for k, v in overrides.items():
            if k not in _BY_NAME:
                raise ConfigError(f"unknown setting '{k}'", hint=_known_hint())
            values[k] = _coerce(_BY_NAME[k], v, "override")
            sources[k] = "cli"
        return Settings(values, sources, self.project)

    @property
    def lake_path(self) -> Path:
        return (self.project / self.lake_dir).resolve()

    @property
    def reports_path(self) -> Path:
        return (self.project / self.reports_dir).resolve()


def _known_hint() -> str:
    return "Known settings: " + ", ".join(s.name for s in SETTINGS) + "."


def find_project(project: str | os.PathLike | None = None, env: Mapping[str, str] | None = None) -> Path:
    """The project folder: ``project`` if given, else $FLEETWATCH_PROJECT, else the cwd."""
    env = os.environ if env is None else env
    if project:
        return Path(project).expanduser().resolve()
    if env.get(PROJECT_ENV):
        return Path(env[PROJECT_ENV]).expanduser().resolve()
    return Path.cwd().resolve()


def _read_toml(path: Path) -> dict[str, Any]:
    try:
        with open(path, "rb") as fh:
            data = tomllib.load(fh)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{path}: {exc}", hint="Fix the TOML syntax, or rerun `fleetwatch init` "
                          "in an empty folder to see a valid file.") from None
    flat: dict[str, Any] = {}
    for key, value in data.items():
        if isinstance(value, dict):
            for k2, v2 in value.items():
                flat[k2] = v2
        else:
            flat[key] = value
    for key in flat:
        if key not in _BY_NAME:
            raise ConfigError(f"{path}: unknown setting '{key}'", hint=_known_hint())
    return flat


def load_settings(project: str | os.PathLike | None = None,
                  overrides: Mapping[str, Any] | None = None,
                  env: Mapping[str, str] | None = None) -> Settings:
    """Resolve every setting: defaults < fleetwatch.toml < FLEETWATCH_* env < overrides.

    ``overrides`` holds command-line values; ``None`` values are ignored (option not given).
    Raises ConfigError on an unknown key or a value of the wrong type.
    """
    env = os.environ if env is None else env
    root = find_project(project, env)
    values = {s.name: s.default for s in SETTINGS}
    sources = {s.name: "default" for s in SETTINGS}
    cfg = root / CONFIG_FILE
    if cfg.is_file():
        for k, v in _read_toml(cfg).items():
            values[k] = _coerce(_BY_NAME[k], v, str(cfg))
            sources[k] = "file"
    for s in SETTINGS:
        key = ENV_PREFIX + s.name.upper()
        if key in env:
            values[s.name] = _coerce(s, env[key], f"environment variable {key}")
            sources[s.name] = "env"
    for k, v in (overrides or {}).items():
        if v is None:
            continue
        if k not in _BY_NAME:
            raise ConfigError(f"unknown setting '{k}'", hint=_known_hint())
        values[k] = _coerce(_BY_NAME[k], v, "the command line")
        sources[k] = "cli"
    return Settings(values, sources, root)


def _toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
    return repr(v)


def default_toml() -> str:
    """The commented fleetwatch.toml that ``fleetwatch init`` writes (all defaults)."""
    lines = ["# fleetwatch project settings. Every line shows the default; uncomment to change.",
             "# Precedence: defaults < this file < FLEETWATCH_<NAME> environment < command line.",
             ""]
    section = None
    for s in SETTINGS:
        if s.section != section:
            section = s.section
            lines += ["", f"[{section}]"]
        lines.append(f"# {s.help} Unit: {s.unit}.")
        lines.append(f"# {s.name} = {_toml_value(s.default)}")
    return "\n".join(lines) + "\n"


def write_default_toml(path: str | os.PathLike, overwrite: bool = False) -> Path:
    path = Path(path)
    if path.exists() and not overwrite:
        raise ConfigError(f"{path} already exists", hint="Edit it, or remove it first.")
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(default_toml(), encoding="utf-8")
    return path


def settings_table_markdown() -> str:
    """The README's settings table, generated from ``SETTINGS`` (paste it after a change)."""
    rows = ["| setting | default | unit | section | meaning |", "|---|---|---|---|---|"]
    for s in SETTINGS:
        rows.append(f"| `{s.name}` | `{_toml_value(s.default)}` | {s.unit} | {s.section} | "
                    f"{s.help} |")
    return "\n".join(rows)
