"""Physics-based demo fleet: drive logs with injected faults and an answer key.

The fictional plant "Harbourside Packaging" runs cone-and-wheel friction drives on three
production lines (L1-L3). Each unit is a DC gear-motor turning the input cone of a
variator; a thin elastomer-rimmed wheel pressed between two opposed cones carries the power
to the output cone, and an actuator moves the wheel to set the ratio. ``simulate_fleet``
writes, into one folder:

- ``telemetry_<line>_<YYYY-MM>.csv``: one file per line and month, plant-style column names
  (``drive,time,motor_volts,motor_amps,input_speed_rpm,output_speed_rpm,ratio_setpoint,
  torque_out_nm,temperature_c``), times ISO 8601 UTC (``2026-06-01T06:00:00Z``), rows
  sorted by time then drive, with logger gaps, ~0.2 % exact duplicate rows and a few
  corrupt rows on purpose;
- ``maintenance.csv`` (``drive,time,action,note``);
- ``answer_key.json``: the truth per unit (condition, fault start, wear-limit crossing day,
  motor constants...) and the injected duplicate/corrupt rows per file;
- ``mapping.toml`` and ``maintenance_mapping.toml``: the column mappings for ``ingest``.

Same arguments, same bytes (deterministic for a seed).

Model, per sample (period ``period_s``), see domain.md for the formulas:

1. Schedule: weekday shifts 06-22 h UTC (plant time = UTC) with breaks and unplanned stops,
   idle nights and weekends (n_in = 0, I = 0). While running, the product (a recipe: ratio
   set point, motor speed set point 1150-1450 rpm) and the load change every ~45 min; a few
   set points are changed while the drive stands still.
   Recipes: about half the units (``UNTUNED_SHARE``) also run each product on an old,
   untuned recipe part of the time: a shallower ratio (0.5-0.8 of the tuned one) with the
   motor slowed to the same output speed and torque, so more motor torque, current and
   copper loss. Some of them run one product steeper than ``MAX_START_RATIO``: the drive
   shifts down to the product's old ratio while running down before a stop, starts in it
   and keeps it until the next set-point change. The answer key's ``recipes`` entry gives
   per unit the products' ratios, their least-power ratio and the true weekly saving of
   running every product there (``true_operating_point`` is the physics).
2. Variator: the actuator puts the wheel at ``cone_position(i_cmd)`` of the nominal cones plus
   a per-unit position offset (and the actuator fault's lost steps); the real cones (with
   manufacturing spread) give the kinematic ratio ``cone_ratio``. The load is an output
   torque ``T_out = tau * i_kin`` (near-constant-power process, tau ~ 0.4-2 N*m); the motor
   torque is ``T_m = T_out / (i_kin * eta_c(i)) + T_drag`` so the torque efficiency falls at
   light load and extreme ratios. The tangential contact force is ``T_m / r_in``; the required
   traction ``F_t / F_n`` inverted on the traction curve (``physics.slip_for_traction``)
   gives the creep of each of the two contacts in series, plus a spin term that depends on
   the contact radii. Beyond the traction peak the contact slides: gross slip.
3. Motor: ``I = T_m / k_e + I_0``; speed control up to the supply voltage limit, so n_in
   droops with load: ``omega = min(omega_set, (V_max - I*R) / k_e)``; ``V = I*R + k_e*omega``
   with R rising with the winding temperature (first-order thermal lag on the losses).
4. Faults (``CONDITIONS``): preload loss (wear), wear then a logged roller replacement,
   contamination (mu_max drops, bursts of gross slip, partial recovery), actuator lost steps
   (load-independent ratio offset), stalled starts at steep ratios, output speed sensor
   flatline.

The wear-limit crossing day in the answer key is the first day on which the noise-free
steady slip at motor shaft torque ``LOAD_REF_NM`` (1.0 N*m), averaged over the unit's
ratio usage (time share of each set point in steady running), reaches ``SLIP_LIMIT`` (0.05).
Where the contact would slide at that load the slip is taken at the traction peak.
"""
from __future__ import annotations

import datetime as dt
import json
import math
import re
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Optional

import numpy as np
import polars as pl

from . import physics as ph
from .errors import UsageError

__all__ = [
    "simulate_fleet", "SimulationResult", "write_sample_data", "SAMPLE_ARGS", "CONDITIONS",
    "LINES", "PLANT_NAME", "TELEMETRY_COLUMNS", "MAINTENANCE_COLUMNS", "SCHEMA_VERSION",
    "DEFAULT_UNITS", "DEFAULT_DAYS", "DEFAULT_PERIOD_S", "DEFAULT_SEED", "DEFAULT_START",
    "SLIP_LIMIT", "LOAD_REF_NM", "GROSS_SLIP_LIMIT", "MAX_START_RATIO", "UNTUNED_SHARE",
    "STEEP_RECIPE_RATIOS", "true_operating_point",
    "MAPPING_TOML", "MAINTENANCE_MAPPING_TOML", "fault_plan",
]

# ---------------------------------------------------------------- public constants
DEFAULT_UNITS = 24
DEFAULT_DAYS = 120
DEFAULT_PERIOD_S = 60.0
DEFAULT_SEED = 7
DEFAULT_START = "2026-06-01"

#: Arguments of the committed demo fleet in ``sample_data/`` (see its README.md).
#: 5-minute logging keeps the folder under 10 MB; set ``sample_period_s = 300`` for it.
SAMPLE_ARGS: dict[str, Any] = dict(units=8, days=45, period_s=300.0, seed=11,
                                   start="2026-06-01")

SCHEMA_VERSION = 1
PLANT_NAME = "Harbourside Packaging"
LINES = ("L1", "L2", "L3")
CONDITIONS = ("healthy", "wear", "wear_replaced", "contamination", "actuator", "stall",
              "sensor_flatline")

# Same values as the defaults in fleetwatch.config, repeated so the answer key is
# self-contained; test_simulate checks they agree.
SLIP_LIMIT = 0.05          # wear limit of steady slip at rated load
LOAD_REF_NM = 1.0          # motor shaft torque of "rated load", N*m
GROSS_SLIP_LIMIT = 0.10    # slip above this is gross slip (common practice, no source)
MAX_START_RATIO = 3.0      # steeper starts stall on the stall unit

TELEMETRY_COLUMNS = ("drive", "time", "motor_volts", "motor_amps", "input_speed_rpm",
                     "output_speed_rpm", "ratio_setpoint", "torque_out_nm", "temperature_c")
MAINTENANCE_COLUMNS = ("drive", "time", "action", "note")

MAPPING_TOML = """\
# Column mapping of the simulated Harbourside Packaging drive logs (telemetry_*.csv).
[format]
timezone = "UTC"

[columns]
unit_id = "drive"
ts = "time"
v_in = { column = "motor_volts", unit = "V" }
i_in = { column = "motor_amps", unit = "A" }
n_in = { column = "input_speed_rpm", unit = "rpm" }
n_out = { column = "output_speed_rpm", unit = "rpm" }
ratio_cmd = "ratio_setpoint"
t_out = { column = "torque_out_nm", unit = "N*m" }
temp = { column = "temperature_c", unit = "degC" }
"""

MAINTENANCE_MAPPING_TOML = """\
# Column mapping of the simulated maintenance log (maintenance.csv).
[format]
timezone = "UTC"

[columns]
unit_id = "drive"
ts = "time"
action = "action"
note = "note"

[maintenance]
resets_wear = ["roller replaced", "cones reground"]
"""

# ---------------------------------------------------------------- physical parameters
# Nominal values; each unit draws its own around them (manufacturing spread).
SUPPLY_V = 48.0            # DC supply of the motor controller, V
MAX_DUTY = 0.98            # highest PWM duty: V_max = duty * supply
R_ARM_OHM = 0.80           # armature resistance at 20 degC, +/-10 % spread
K_E = 0.30                 # V*s/rad referred to the variator input shaft, +/-5 % spread
I0_A = 0.30                # no-load current, A
CURRENT_LIMIT_A = (12.0, 15.0)   # controller current limit (seen in stalls), A
R_SMALL_M, R_LARGE_M, CONE_LENGTH_M = 0.020, 0.080, 0.120   # cones: ratio 0.25 .. 4
WHEEL_WIDTH_M = 0.008
NORMAL_FORCE_N = 135.0     # preload of the wheel between the cones
# Elastomer rim on steel: peak traction ~0.5-0.9 (domain.md 2.2, from memory); we use 0.7.
MU_MAX = 0.70
SLIP_AT_PEAK = 0.06        # contact slip at the traction peak (per contact)
T_DRAG_NM = 0.04           # bearing/seal drag of the variator referred to its input
RECIPE_RATIOS = np.round(np.arange(0.5, 3.0001, 0.1), 2)    # ratio set points used running
STEEP_START_RATIOS = (3.2, 3.8)
LOAD_CAP = 3.9             # cap on tau * (1 + i): keeps healthy contacts well below the peak
LOAD_CAP_SPIKE = 4.6
LOAD_MAX_NM = 1.9          # highest tau: steady current stays below the 8 A stall threshold
# Untuned recipes (set points chosen once and never tuned): on about half the units each
# product also has an old recipe that runs it at a shallower ratio with the motor slowed down
# to the same output speed (same output torque, so more motor torque and current). A share
# of the product's runs uses the old recipe. Some of these units run one product in a steep
# ratio above MAX_START_RATIO; the drive cannot start there, so it shifts down to that
# product's old (shallower) ratio while running down before a stop, starts in it, and runs
# in it until the next set-point change.
UNTUNED_SHARE = 0.5                      # share of units with untuned recipes
UNTUNED_FACTOR = (0.5, 0.8)              # old ratio / tuned ratio of a product
UNTUNED_USE = (0.3, 0.7)                 # share of a product's runs on the old recipe
STEEP_RECIPE_RATIOS = np.round(np.arange(3.2, 3.6001, 0.1), 2)
STEEP_PRODUCT_P = 0.7                    # chance an untuned unit runs one steep product
RUNDOWN_SHIFT_S = 150.0                  # shift down to the start ratio this long before a stop


# ---------------------------------------------------------------- results and plans
@dataclass
class SimulationResult:
    """What ``simulate_fleet`` wrote.

    ``files``: every file written (telemetry, maintenance, answer key, mappings);
    ``rows``: telemetry data rows written (duplicates and corrupt rows included);
    ``answer_key``: path of answer_key.json; ``elapsed_s``: wall-clock seconds.
    """

    out_dir: Path
    files: list[Path]
    rows: int
    answer_key: Path
    elapsed_s: float


@dataclass
class _UnitPlan:
    index: int
    unit_id: str
    line: str
    condition: str
    instrumented: bool
    untuned: bool = False


@dataclass
class _Grid:
    start: dt.datetime
    days: int
    period_s: int
    n: int
    t_s: np.ndarray          # seconds since start, int64
    day: np.ndarray          # day index
    weekday0: int            # weekday of day 0 (Mon = 0)

    def idx(self, sec: float) -> int:
        """First sample index at or after ``sec`` seconds (clipped to [0, n])."""
        return int(min(self.n, max(0, math.ceil(sec / self.period_s - 1e-9))))

    def iso(self, k: int) -> str:
        return _iso(self.start + dt.timedelta(seconds=int(self.t_s[k])))

    def date_of(self, k: int) -> str:
        return (self.start + dt.timedelta(seconds=int(self.t_s[k]))).date().isoformat()


@dataclass
class _UnitOut:
    plan: _UnitPlan
    cols: dict[str, np.ndarray]      # logged columns (float32), full grid
    logged: np.ndarray               # bool: row present (no gap)
    truth: dict[str, Any]
    maintenance: list[tuple[int, str, str]] = field(default_factory=list)  # (t_s, action, note)


def _iso(t: dt.datetime) -> str:
    return t.strftime("%Y-%m-%dT%H:%M:%SZ")


# ---------------------------------------------------------------- fleet layout
def fault_plan(units: int) -> list[str]:
    """Fault conditions injected into a fleet of ``units`` drives (the rest are healthy).

    About a third of the fleet is faulty; from 8 units on every kind appears at least once
    (6 faulty of 8); below 8 a subset in the order wear, contamination, stall, actuator,
    sensor_flatline. At 24 units: 3 wear, 1 wear_replaced, 1 contamination, 1 actuator,
    1 stall, 1 sensor_flatline. Raises UsageError when units < 1.
    """
    if units < 1:
        raise UsageError(f"units must be at least 1, got {units}")
    order = ["wear", "contamination", "stall", "actuator", "sensor_flatline", "wear_replaced",
             "wear"]
    cycle = ["wear", "contamination", "actuator", "stall", "sensor_flatline", "wear_replaced"]
    if units == 1:
        n_faulty = 1
    elif units < 8:
        n_faulty = units - math.ceil(units / 3)
    else:
        n_faulty = min(units - 2, max(6, round(units / 3)))
    kinds = []
    for k in range(n_faulty):
        kinds.append(order[k] if k < len(order) else cycle[(k - len(order)) % len(cycle)])
    return kinds


def _layout(units: int, rng: np.random.Generator) -> list[_UnitPlan]:
    per_line = [units // 3 + (1 if k < units % 3 else 0) for k in range(3)]
    width = 2 if max(per_line) <= 99 else 3
    names: list[tuple[str, str]] = []
    for line, count in zip(LINES, per_line):
        names += [(f"{line}-U{j + 1:0{width}d}", line) for j in range(count)]
    kinds = fault_plan(units)
    conditions = ["healthy"] * units
    for pos, kind in zip(rng.permutation(units)[: len(kinds)], kinds):
        conditions[int(pos)] = kind
    instrumented = set()
    start = 0
    for count in per_line:
        if count:
            instrumented.add(start + int(rng.integers(count)))
        start += count
    return [_UnitPlan(k, names[k][0], names[k][1], conditions[k], k in instrumented)
            for k in range(units)]


def _choose_untuned(plans: list[_UnitPlan], seed: int) -> None:
    """Mark about half the units (at least one) as running untuned recipes.

    Drawn from a stream of its own, so the rest of the fleet's draws do not change.
    """
    rng = np.random.default_rng(np.random.SeedSequence([seed, 4]))
    k = max(1, round(len(plans) * UNTUNED_SHARE))
    for pos in rng.permutation(len(plans))[:k]:
        plans[int(pos)].untuned = True


# ---------------------------------------------------------------- argument checks
def _check_args(units: Any, days: Any, period_s: Any, seed: Any, start: Any) -> tuple:
    try:
        units_i = int(units)
        days_i = int(days)
        period = float(period_s)
        seed_i = int(seed)
    except (TypeError, ValueError):
        raise UsageError("units, days and seed must be integers and period_s a number",
                         hint="For example: units=24, days=120, period_s=60, seed=7.") from None
    if units_i != units or days_i != days or seed_i != seed:
        raise UsageError("units, days and seed must be whole numbers")
    if units_i < 1:
        raise UsageError(f"units must be at least 1, got {units_i}", hint="Use --units 24.")
    if days_i < 1:
        raise UsageError(f"days must be at least 1, got {days_i}", hint="Use --days 120.")
    if not (1.0 <= period <= 3600.0) or not period.is_integer():
        raise UsageError(f"period_s must be a whole number of seconds from 1 to 3600, got "
                         f"{period_s}", hint="Use --period-s 60.")
    if seed_i < 0:
        raise UsageError(f"seed must be zero or positive, got {seed_i}")
    if isinstance(start, dt.datetime):
        start_d = start.date()
    elif isinstance(start, dt.date):
        start_d = start
    else:
        try:
            start_d = dt.date.fromisoformat(str(start))
        except ValueError:
            raise UsageError(f"start must be a date like 2026-06-01, got {start!r}",
                             hint="Use --start YYYY-MM-DD (UTC).") from None
    return units_i, days_i, int(period), seed_i, start_d


_OUR_TELEMETRY = re.compile(r"^telemetry_L\d+_\d{4}-\d{2}\.csv$")


def _prepare_out_dir(out_dir: Path) -> None:
    """Create ``out_dir``; clear our own files from an earlier simulation there.

    Telemetry files named like ours in a folder without our answer key are not touched:
    raise UsageError rather than mix two fleets.
    """
    out_dir.mkdir(parents=True, exist_ok=True)
    ours = sorted(p for p in out_dir.iterdir() if _OUR_TELEMETRY.match(p.name))
    if not ours:
        return
    key = out_dir / "answer_key.json"
    generated = False
    if key.is_file():
        try:
            generated = json.loads(key.read_text(encoding="utf-8")).get(
                "generator") == "fleetwatch.simulate"
        except (OSError, ValueError, AttributeError):
            generated = False
    if not generated:
        raise UsageError(f"{out_dir} already holds telemetry files ({ours[0].name}, ...) that "
                         "fleetwatch simulate did not write",
                         hint="Choose an empty folder for the simulated fleet.")
    for p in ours:
        p.unlink()


# ---------------------------------------------------------------- schedule
def _schedule(grid: _Grid, rng: np.random.Generator, line: str) -> np.ndarray:
    """Running mask: weekday shifts 06-22 h with breaks and unplanned stops."""
    run = np.zeros(grid.n, dtype=bool)
    saturday_p = {"L1": 0.0, "L2": 0.15, "L3": 0.35}[line]
    for d in range(grid.days):
        wd = (grid.weekday0 + d) % 7
        base = d * 86400.0
        if wd < 5:
            t0 = 6 * 3600.0 + rng.uniform(0, 900)
            t1 = 22 * 3600.0 - rng.uniform(0, 900)
        elif wd == 5 and rng.random() < saturday_p:
            t0 = 6 * 3600.0 + rng.uniform(0, 900)
            t1 = 14 * 3600.0 - rng.uniform(0, 900)
        else:
            continue
        run[grid.idx(base + t0): grid.idx(base + t1)] = True
        stops = [(rng.uniform(t0 + 3600, t1 - 3600), rng.uniform(600, 2400))
                 for _ in range(int(rng.integers(1, 4)))]
        stops += [(rng.uniform(t0 + 1800, t1 - 1800), rng.uniform(300, 1200))
                  for _ in range(int(rng.poisson(0.4)))]
        for s, length in stops:
            a, b = grid.idx(base + s), grid.idx(base + s + length)
            if b <= a:
                b = a + 1
            run[a:min(b, grid.n)] = False
    return run


def _edges(run: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    prev = np.r_[False, run[:-1]]
    starts = np.flatnonzero(run & ~prev)
    stops = np.flatnonzero(~run & prev)
    return starts, stops


def _ffill_index(mask: np.ndarray) -> np.ndarray:
    """Index of the last True at or before each position (0 before the first True)."""
    idx = np.where(mask, np.arange(mask.size), -1)
    return np.maximum(np.maximum.accumulate(idx), 0)


def _first_order(x: np.ndarray, a: float, y0: float) -> np.ndarray:
    """y[k] = a*y[k-1] + (1 - a)*x[k] with y[-1] = y0 (a recursive filter run in polars)."""
    y = pl.Series(np.r_[y0, x]).ewm_mean(alpha=1.0 - a, adjust=False).to_numpy()
    return y[1:]


def _ar1(rng: np.random.Generator, n: int, period_s: float, tau_s: float, sigma: float):
    """Stationary AR(1) noise of standard deviation ``sigma`` and time constant ``tau_s``."""
    a = math.exp(-period_s / tau_s)
    w = rng.standard_normal(n) * sigma * math.sqrt(1.0 - a * a)
    return _first_order(w / (1.0 - a), a, 0.0)


def _lag(x: np.ndarray, period_s: float, tau_s: float, x0: float) -> np.ndarray:
    """First-order lag y' = (x - y)/tau sampled every period_s, starting at x0."""
    return _first_order(x, math.exp(-period_s / tau_s), x0)


# ---------------------------------------------------------------- one unit
def _noise_free_slip_at_ref(ratios: np.ndarray, weights: np.ndarray, p: dict,
                            f_n: Any, mu_factor: Any, dx_fault: Any) -> np.ndarray:
    """Steady slip at LOAD_REF_NM averaged over ratio usage, for arrays of states.

    ``f_n``, ``mu_factor``, ``dx_fault`` broadcast over days (shape (D,)); returns (D,).
    """
    f_n = np.asarray(f_n, float)[:, None]
    mu_factor = np.asarray(mu_factor, float)[:, None]
    dx_fault = np.asarray(dx_fault, float)[:, None]
    i_cmd = ratios[None, :]
    x = ph.cone_position(i_cmd, R_SMALL_M, R_LARGE_M, CONE_LENGTH_M) + p["dx_m"] + dx_fault
    x = np.clip(x, 0.0, p["length_m"])
    r_in, r_out = ph.cone_radii(x, p["r_small_m"], p["r_large_m"], p["length_m"])
    i_kin = r_out / r_in
    mu_req = LOAD_REF_NM / (r_in * f_n)
    s_c = ph.slip_for_traction(mu_req, p["mu_max"] * mu_factor, p["slip_at_peak"])
    s_c = np.minimum(s_c, p["slip_at_peak"])  # sliding: take the slip at the traction peak
    s_spin = p["spin_k"] * WHEEL_WIDTH_M * 0.5 * (1.0 / r_in + 1.0 / r_out)
    s_tot = ph.series_slip(s_c, s_c, s_spin)
    s_log = 1.0 - i_cmd * (1.0 - s_tot) / i_kin
    return (s_log * weights[None, :]).sum(axis=1) / weights.sum()


def _unit_params(rng: np.random.Generator) -> dict:
    u = rng.uniform
    return {
        "r_ohm_20c": R_ARM_OHM * u(0.90, 1.10),
        "k_e": K_E * u(0.95, 1.05),
        "i0_a": I0_A * u(0.85, 1.15),
        "supply_v": SUPPLY_V * u(0.98, 1.02),
        "current_limit_a": u(*CURRENT_LIMIT_A),
        "r_small_m": R_SMALL_M * u(0.995, 1.005),
        "r_large_m": R_LARGE_M * u(0.995, 1.005),
        "length_m": CONE_LENGTH_M,
        "normal_force_n": NORMAL_FORCE_N * u(0.92, 1.08),
        "mu_max": MU_MAX * u(0.93, 1.07),
        "slip_at_peak": SLIP_AT_PEAK * u(0.85, 1.15),
        "spin_k": u(0.010, 0.025),
        "dx_m": float(np.clip(rng.normal(0.0, 0.08e-3), -0.2e-3, 0.2e-3)),
        "eta_c0": u(0.945, 0.965),
        "r_th_k_per_w": u(0.9, 1.1),
        "tau_th_s": 1500.0 * u(0.8, 1.2),
        "noise_scale": u(0.6, 1.6),
        "load_median_nm": u(0.8, 1.15),
    }


def _recipe_tuning(recipes: np.ndarray, untuned: bool,
                   rng: np.random.Generator) -> dict[str, np.ndarray]:
    """Per product: tuned ratio, old-recipe ratio and the share of runs on the old recipe.

    Tuned units: old = tuned, share 0. Untuned units: old = tuned * U(UNTUNED_FACTOR),
    rounded to 0.1, at least 0.5 and at most MAX_START_RATIO; with chance STEEP_PRODUCT_P
    the steepest product is replaced by one from STEEP_RECIPE_RATIOS.
    """
    tuned = recipes.astype(float).copy()
    if not untuned:
        return {"ratio_tuned": tuned, "ratio_old": tuned.copy(),
                "old_share": np.zeros(tuned.size)}
    if rng.random() < STEEP_PRODUCT_P:
        tuned[-1] = float(rng.choice(STEEP_RECIPE_RATIOS))
    factor = rng.uniform(*UNTUNED_FACTOR, tuned.size)
    old = np.clip(np.round(tuned * factor, 1), 0.5, MAX_START_RATIO)
    share = rng.uniform(*UNTUNED_USE, tuned.size)
    share = np.where(old < tuned - 0.05, share, 0.0)
    old = np.where(share > 0, old, tuned)
    return {"ratio_tuned": tuned, "ratio_old": old, "old_share": share}


def _energy_truth(p: dict, n_out: np.ndarray, t_out: np.ndarray, sp: np.ndarray,
                  rec: np.ndarray, temp: np.ndarray, tuning: dict, hours: float,
                  weeks: float) -> dict[str, Any]:
    """True input energy of steady running and the true saving of the least-power ratios.

    ``n_out``, ``t_out``, ``sp``, ``rec`` (product index), ``temp``: noise-free values of
    the steady logged samples (or an even subsample of them standing for ``hours`` of
    running). For each sample the least-power ratio is searched on a 0.01 grid between
    the product's old and tuned ratios, at most MAX_START_RATIO (every product starts
    from standstill), where the motor stays inside its supply voltage and current limit.
    Healthy physics (``_steady_state``). ``weeks``: days with any logged sample / 7 (the
    advisor's "per week"). Returns kWh per week and per-product optima.
    """
    out: dict[str, Any] = {"steady_hours_per_week": round(hours / weeks, 3)}
    if sp.size == 0:
        out.update(input_kwh_per_week=0.0, true_saving_kwh_per_week=0.0, true_saving_pct=0.0,
                   products=[])
        return out
    used = _steady_state(p, n_out, t_out, sp, temp)["p_in_w"]
    best = used.copy()
    products = []
    t_r, o_r = tuning["ratio_tuned"], tuning["ratio_old"]
    for k in range(t_r.size):
        m = rec == k
        lo, hi = min(t_r[k], o_r[k]), min(max(t_r[k], o_r[k]), MAX_START_RATIO)
        entry = {"ratio_tuned": round(float(t_r[k]), 2), "ratio_old": round(float(o_r[k]), 2),
                 "old_share": round(float(tuning["old_share"][k]), 3),
                 "steady_share": round(float(m.mean()), 4)}
        if m.any() and hi > lo + 1e-9:
            grid = np.round(np.arange(lo, hi + 1e-9, 0.01), 2)
            st = _steady_state(p, n_out[m, None], t_out[m, None], grid[None, :],
                               temp[m, None])
            pg = np.where(st["feasible"], st["p_in_w"], np.inf)
            low = pg.min(axis=1)
            # a sample at a steep tuned ratio (above the start limit) may need less than
            # any startable ratio: its "saving" is then negative, as following it would be
            best[m] = np.where(np.isfinite(low), low, used[m])
            tot = pg.sum(axis=0)
            entry["least_power_ratio"] = float(grid[int(np.argmin(tot))])
        products.append(entry)
    scale = hours / sp.size / 1000.0 / weeks          # W per sample -> kWh per week
    e_in = float(used.sum() * scale)
    save = float((used - best).sum() * scale)
    out.update(input_kwh_per_week=round(e_in, 4), true_saving_kwh_per_week=round(save, 4),
               true_saving_pct=round(100.0 * save / e_in, 3) if e_in > 0 else 0.0,
               products=products)
    return out


def _weekday_morning(grid: _Grid, day: float, rng: np.random.Generator) -> int:
    """Seconds since start of a weekday at 05:00-05:50, on or after ``day``."""
    d = int(math.ceil(day))
    while (grid.weekday0 + d) % 7 >= 5:
        d += 1
    return int(d * 86400 + 5 * 3600 + int(rng.integers(0, 50)) * 60)


def _first_running_at_or_after(run: np.ndarray, k: int) -> Optional[int]:
    idx = np.flatnonzero(run[k:])
    return int(k + idx[0]) if idx.size else None


def _simulate_unit(plan: _UnitPlan, grid: _Grid, rng: np.random.Generator,
                   line_ambient_c: float,
                   tune_rng: Optional[np.random.Generator] = None) -> _UnitOut:
    n, per = grid.n, float(grid.period_s)
    days = grid.days
    p = _unit_params(rng)
    if tune_rng is None:
        tune_rng = np.random.default_rng(0)
    t_s = grid.t_s.astype(np.float64)
    t_day = t_s / 86400.0
    cond = plan.condition
    truth_fault: dict[str, Any] = {}
    maint: list[tuple[int, str, str]] = []

    # --- schedule, set points, loads
    run = _schedule(grid, rng, plan.line)
    n_rec = int(rng.integers(3, 6))
    recipes = np.sort(rng.choice(RECIPE_RATIOS, size=n_rec, replace=False))
    rec_w = rng.dirichlet(np.full(n_rec, 2.0))
    gaps = np.maximum(1, np.ceil(rng.exponential(2700.0, size=int(3 * n * per / 2700) + 8)
                                 / per)).astype(np.int64)
    change_idx = np.cumsum(gaps)
    change_idx = change_idx[change_idx < n]
    seg = np.searchsorted(change_idx, np.arange(n), side="right")
    n_seg = change_idx.size + 1
    seg_rec = rng.choice(n_rec, size=n_seg, p=rec_w)        # product run in each segment
    seg_load = np.clip(p["load_median_nm"] * np.exp(rng.normal(0.0, 0.35, n_seg)), 0.35, 2.0)
    seg_nset = np.round(rng.uniform(1150.0, 1450.0, n_seg), -1)
    # recipes: per product the tuned ratio and, on untuned units, the old one and its share
    tuning = _recipe_tuning(recipes, plan.untuned, tune_rng)
    ratio_t, ratio_u, use_u = tuning["ratio_tuned"], tuning["ratio_old"], tuning["old_share"]
    seg_old = tune_rng.random(n_seg) < use_u[seg_rec]
    ffill_run = _ffill_index(run)
    rec_at = seg_rec[seg][ffill_run]          # product per sample (held while stopped)
    old_at = seg_old[seg][ffill_run]          # old recipe in use per sample

    # a few set points changed while the drive stands still
    starts, stops = _edges(run)
    n_idle_changes = int(rng.poisson(max(1.0, days / 20.0)))
    for a in rng.choice(stops, size=min(n_idle_changes, stops.size), replace=False) \
            if stops.size else []:
        nxt = starts[starts > a]
        b = int(nxt[0]) if nxt.size else n
        if b - a < 3:
            continue
        c = int(rng.integers(a + 1, b - 1))
        other = np.flatnonzero(np.arange(n_rec) != rec_at[a])
        if other.size:
            rec_at[c:b] = rng.choice(other)
            old_at[c:b] = tune_rng.random() < use_u[rec_at[c]]
    sp = np.where(old_at, ratio_u[rec_at], ratio_t[rec_at])

    # a drive cannot start in a steep ratio: where a product runs steeper than
    # MAX_START_RATIO, the drive shifts down to that product's old ratio while running down
    # before the stop (the ratio only changes while the cones turn), starts in it and keeps
    # it until the next set-point change
    k_shift = max(1, math.ceil(RUNDOWN_SHIFT_S / per))
    for s0 in starts:
        s0 = int(s0)
        if sp[s0] <= MAX_START_RATIO + 1e-9:
            continue
        same = sp == sp[s0]
        b0 = s0 - int(np.argmin(same[s0::-1])) + 1 if not same[: s0 + 1].all() else 0
        b1 = s0 + int(np.argmin(same[s0:])) if not same[s0:].all() else n
        prev = stops[stops <= s0]
        lo = max(b0, int(prev[-1]) - k_shift) if prev.size else b0
        old_at[lo:b1] = True
        sp[lo:b1] = ratio_u[rec_at[lo:b1]]
    prod_at = ratio_t[rec_at]                 # the product's tuned ratio: fixes its duty

    # --- stalled starts at steep ratios (stall unit, after onset)
    stall = np.zeros(n, dtype=bool)
    onset_k: Optional[int] = None
    if cond == "stall":
        t_on = rng.uniform(0.25, 0.6) * days * 86400.0
        p_steep = rng.uniform(0.25, 0.5)
        cand = starts[starts >= grid.idx(t_on)]
        chosen = [s for j, s in enumerate(cand) if j == 0 or rng.random() < p_steep]
        n_events = 0
        for s0 in chosen:
            s0 = int(s0)
            nxt_stop = stops[stops > s0]
            end = int(nxt_stop[0]) if nxt_stop.size else n
            k_st = max(1, round(rng.uniform(30, 150) / per))
            k_pause = max(1, round(rng.uniform(60, 300) / per))
            if s0 + k_st + k_pause + 3 >= end or s0 < 1:
                continue
            prev_stop = stops[stops < s0]
            a0 = int(prev_stop[-1]) if prev_stop.size else 0
            j_ahead = min(s0 - a0, int(rng.integers(1, 4)))
            steep = round(float(rng.uniform(*STEEP_START_RATIOS)), 2)
            resume = s0 + k_st + k_pause
            sp[s0 - j_ahead: s0 + k_st] = steep
            sp[s0 + k_st: resume] = sp[resume]
            stall[s0: s0 + k_st] = True
            run[s0: resume] = False
            if onset_k is None:
                onset_k = s0
            n_events += 1
        truth_fault = {"steep_start_share": round(p_steep, 3), "stall_events": n_events,
                       "current_limit_a": round(p["current_limit_a"], 3)}
        starts, stops = _edges(run)

    prev_sp = np.r_[sp[0], sp[:-1]]
    chg = sp != prev_sp
    chg_run = chg & run
    is_start = np.zeros(n, dtype=bool)
    is_start[starts] = True

    # ratio usage: time share of each set point in steady running (noise-free definition)
    settle = max(1, math.ceil(120.0 / per))
    since_chg = np.arange(n) - _ffill_index(chg)
    steady = run & (since_chg >= settle) & ~is_start
    use_r, use_c = np.unique(sp[steady], return_counts=True)
    if use_r.size == 0:
        use_r, use_c = recipes, np.ones_like(recipes)
    use_w = use_c.astype(float)

    # --- fault state arrays: preload, traction factor, actuator position error
    f_n = np.full(n, p["normal_force_n"])
    mu_f = np.ones(n)
    dx_f = np.zeros(n)
    replacement_k: Optional[int] = None
    base_slip = float(_noise_free_slip_at_ref(use_r, use_w, p, [p["normal_force_n"]], [1.0],
                                              [0.0])[0])

    if cond in ("wear", "wear_replaced"):
        if cond == "wear":
            t_on_d = rng.uniform(0.03, 0.25) * days
            t_cross_d = rng.uniform(max(0.42, (t_on_d / days) + 0.25), 0.92) * days
        else:
            t_on_d = rng.uniform(0.03, 0.15) * days
            t_cross_d = rng.uniform(max(0.35, (t_on_d / days) + 0.2), 0.55) * days
        t_cross_d = math.floor(t_cross_d) + 0.5   # evaluated at noon, like the daily truth
        expo = rng.uniform(1.0, 2.0)
        lo, hi = 0.0, 0.9
        for _ in range(60):   # preload loss that puts the usage-averaged slip at the limit
            mid = 0.5 * (lo + hi)
            s_mid = _noise_free_slip_at_ref(use_r, use_w, p, [p["normal_force_n"] * (1 - mid)],
                                            [1.0], [0.0])[0]
            lo, hi = (mid, hi) if s_mid < SLIP_LIMIT else (lo, mid)
        d_star = hi
        span = max(t_cross_d - t_on_d, 0.5)
        rate = d_star / (span / days) ** expo
        loss = np.where(t_day > t_on_d,
                        rate * (np.clip(t_day - t_on_d, 0, None) / days) ** expo, 0.0)
        loss = np.minimum(loss, 0.9)
        f_n = p["normal_force_n"] * (1.0 - loss)
        truth_fault = {"onset_day": round(t_on_d, 3), "preload_loss_exponent": round(expo, 3),
                       "preload_loss_at_crossing": round(d_star, 4),
                       "preload_loss_rate_per_span": round(rate, 4)}
        onset_k = grid.idx(t_on_d * 86400.0)
        if cond == "wear_replaced":
            t_rep = _weekday_morning(grid, t_cross_d + rng.uniform(1.0, max(2.0, 0.08 * days)),
                                     rng)
            replacement_k = grid.idx(t_rep)
            if replacement_k < n:
                new_fn = p["normal_force_n"] * rng.uniform(0.98, 1.04)
                f_n[replacement_k:] = new_fn
                maint.append((int(grid.t_s[replacement_k]), "roller replaced",
                              "rim worn, new roller fitted, preload reset"))
                truth_fault["normal_force_after_replacement_n"] = round(new_fn, 3)
            else:
                replacement_k = None

    elif cond == "contamination":
        k0 = grid.idx(rng.uniform(0.3, 0.65) * days * 86400.0)
        k_on = _first_running_at_or_after(run, k0)
        if k_on is not None:
            onset_k = k_on
            t_on = t_s[k_on]
            m_drop, m_mid = rng.uniform(0.30, 0.40), rng.uniform(0.5, 0.65)
            tau1 = rng.uniform(0.5, 3.0) * 86400.0
            m_rec = rng.uniform(0.82, 0.95)
            t_clean = float(_weekday_morning(grid, t_on / 86400.0 + rng.uniform(1.0, 4.0),
                                             rng))
            after = t_s >= t_on
            mu_f = np.where(after, m_drop + (m_mid - m_drop)
                            * (1.0 - np.exp(-np.clip(t_s - t_on, 0, None) / tau1)), 1.0)
            # the first hours are the worst (fresh film): a burst of gross slip
            m_wet, wet_s = rng.uniform(0.12, 0.22), rng.uniform(1.0, 4.0) * 3600.0
            mu_f = np.where(after & (t_s < t_on + wet_s), m_wet, mu_f)
            mu_f = np.where(t_s >= t_clean, m_rec, mu_f)
            episodes = [{"start": grid.iso(k_on), "mu_factor_first_hours": round(m_wet, 3),
                         "first_hours": round(wet_s / 3600.0, 2),
                         "mu_factor_min": round(m_drop, 3),
                         "recovery_tau_days": round(tau1 / 86400.0, 3),
                         "mu_factor_before_cleaning": round(m_mid, 3)}]
            if t_clean < t_s[-1]:
                maint.append((int(t_clean), "contact cleaned",
                              "oil film found on the cones, cleaned and dried"))
            if rng.random() < 0.6:   # relapse: a second, shorter episode without a log entry
                k2 = _first_running_at_or_after(
                    run, grid.idx(t_clean + rng.uniform(3.0, 10.0) * 86400.0))
                if k2 is not None:
                    f2, tau2 = rng.uniform(0.45, 0.6), rng.uniform(0.3, 1.5) * 86400.0
                    el = np.clip(t_s - t_s[k2], 0, None)
                    mu_f = np.where(t_s >= t_s[k2],
                                    m_rec * (f2 + (1 - f2) * (1 - np.exp(-el / tau2))), mu_f)
                    episodes.append({"start": grid.iso(k2), "mu_factor_min": round(m_rec * f2, 3),
                                     "recovery_tau_days": round(tau2 / 86400.0, 3)})
            truth_fault = {"episodes": episodes, "mu_factor_after_cleaning": round(m_rec, 3),
                           "cleaned": _iso(grid.start + dt.timedelta(seconds=t_clean))
                           if t_clean < t_s[-1] else None}

    elif cond == "actuator":
        k0 = grid.idx(rng.uniform(0.25, 0.7) * days * 86400.0)
        cands = np.flatnonzero(chg_run[k0:]) + k0
        if cands.size:
            onset_k = int(cands[0])
            sign = 1.0 if rng.random() < 0.5 else -1.0
            jump = rng.uniform(0.8e-3, 2.0e-3)
            grows = bool(rng.random() < 0.6)
            later = cands[1:]
            inc = np.zeros(later.size)
            if grows:
                hit = rng.random(later.size) < rng.uniform(0.02, 0.08)
                inc[hit] = rng.uniform(0.05e-3, 0.25e-3, int(hit.sum()))
            steps_at = np.r_[onset_k, later]
            total = np.minimum(np.cumsum(np.r_[jump, inc]), 3.0e-3)
            pos = np.searchsorted(steps_at, np.arange(n), side="right") - 1
            dx_f = np.where(pos >= 0, sign * total[np.clip(pos, 0, None)], 0.0)
            truth_fault = {"position_error_first_mm": round(sign * jump * 1e3, 4),
                           "position_error_final_mm": round(float(dx_f[-1]) * 1e3, 4),
                           "grows": grows}

    # --- variator kinematics
    x_cmd = ph.cone_position(sp, R_SMALL_M, R_LARGE_M, CONE_LENGTH_M)
    x_tgt = x_cmd + p["dx_m"] + dx_f
    frac = rng.uniform(0.15, 0.9, n)
    x_prev = np.r_[x_tgt[0], x_tgt[:-1]]
    x_act = np.where(chg_run, x_prev + frac * (x_tgt - x_prev), x_tgt)
    x_act = np.clip(x_act, 0.0, p["length_m"])
    r_in, r_out = ph.cone_radii(x_act, p["r_small_m"], p["r_large_m"], p["length_m"])
    i_kin = r_out / r_in
    eta_c = p["eta_c0"] - 0.035 * np.log(i_kin) ** 2

    # --- load: output torque of a near-constant-power process, tau = T_out / i_cmd.
    # A product's duty (output speed and torque) is set at its tuned ratio; an old recipe
    # runs the same duty at a shallower ratio: m = i_tuned / i_cmd times the torque per unit
    # ratio, the motor speed set point divided by m.
    m_old = prod_at / sp
    tau = np.minimum(seg_load[seg] * m_old, LOAD_CAP / (1.0 + sp))
    tau = tau * (1.0 + _ar1(rng, n, per, 600.0, 0.06))
    spikes = rng.choice(n, size=int(rng.poisson(2.0 * days)), replace=False) if n > 10 else []
    tau[spikes] *= rng.uniform(1.2, 1.5, len(spikes))
    tau = np.clip(np.minimum(tau, LOAD_CAP_SPIKE / (1.0 + sp)), 0.05, LOAD_MAX_NM)
    t_out = tau * i_kin   # during a ratio move the load follows the actual ratio
    t_m = t_out / (i_kin * eta_c) + T_DRAG_NM

    # --- traction and slip
    mu_max_t = p["mu_max"] * mu_f
    mu_req = t_m / (r_in * f_n)
    s_c = ph.slip_for_traction(mu_req, mu_max_t, p["slip_at_peak"])
    s_spin = p["spin_k"] * WHEEL_WIDTH_M * 0.5 * (1.0 / r_in + 1.0 / r_out)
    gross = run & ~np.isfinite(s_c)
    s_ok = np.where(np.isfinite(s_c), s_c, 0.0)
    s_tot = np.where(gross, rng.uniform(0.12, 0.45, n), ph.series_slip(s_ok, s_ok, s_spin))
    t_slide = 0.9 * mu_max_t * f_n * r_in   # sliding contact passes less torque
    t_m = np.where(gross, t_slide, t_m)
    t_out = np.where(gross, (t_slide - T_DRAG_NM) * i_kin * eta_c, t_out)

    # --- motor
    k_e, r20, i0 = p["k_e"], p["r_ohm_20c"], p["i0_a"]
    v_max = MAX_DUTY * p["supply_v"]
    i_a = t_m / k_e + i0
    i_a = np.where(is_start, i_a + rng.uniform(0.5, 2.0, n), i_a)   # acceleration
    i_a = np.minimum(i_a, p["current_limit_a"])   # the controller limits the current
    i_a = np.where(stall, p["current_limit_a"] * (1.0 + 0.01 * rng.standard_normal(n)), i_a)
    on = run | stall
    i_a = np.where(on, i_a, 0.0)
    omega_set = ph.omega_from_rpm(seg_nset[seg] / m_old)
    ambient = (line_ambient_c + 2.0 * np.sin(2 * np.pi * (t_day - 0.375))
               + 1.5 * np.sin(2 * np.pi * t_day / 23.0 + rng.uniform(0, 6.3)))
    omega1 = np.where(run, np.minimum(omega_set, (v_max - i_a * r20 * 1.2) / k_e), 0.0)
    temp = ambient
    r_hot = r20
    for _ in range(2):   # losses heat the winding; R follows the temperature
        p_loss = i_a ** 2 * r_hot + k_e * i0 * omega1 * run
        temp = ambient + _lag(p["r_th_k_per_w"] * p_loss, per, p["tau_th_s"], 0.0)
        r_hot = ph.winding_resistance(r20, temp)
    omega = np.minimum(omega_set, (v_max - i_a * r_hot) / k_e)
    omega = omega * (1.0 + 0.002 * rng.standard_normal(n))
    omega = np.where(is_start, omega * rng.uniform(0.4, 0.9, n), omega)
    omega = np.where(run, omega, 0.0)
    v = ph.motor_voltage_v(i_a, omega, r_hot, k_e)
    n_in = ph.rpm_from_omega(omega)
    n_out = np.where(run, n_in * (1.0 - s_tot) / i_kin, 0.0)
    t_out = np.where(run, t_out, 0.0)
    t_out = np.where(stall, ph.shaft_torque_nm(k_e, i_a, i0) * i_kin * eta_c, t_out)

    # --- sensors: noise, resolution
    ns = p["noise_scale"]
    g = rng.standard_normal
    v_log = np.where(on, v + 0.05 * ns * g(n), np.abs(0.01 * g(n)))
    i_log = np.where(on, i_a + 0.02 * ns * g(n), np.abs(0.005 * g(n)))
    n_in_log = np.where(run, n_in + 0.3 * ns * g(n), 0.0)
    n_in_log = np.where(stall, np.abs(1.0 * g(n)), n_in_log)
    n_out_log = np.where(run, n_out + 0.3 * ns * g(n), 0.0)
    t_out_log = t_out + 0.01 * ns * g(n) if plan.instrumented else np.full(n, np.nan)
    temp_log = temp + 0.15 * g(n)
    cols = {
        "motor_volts": np.round(np.clip(v_log, 0, None), 2),
        "motor_amps": np.round(np.clip(i_log, 0, None), 3),
        "input_speed_rpm": np.round(np.clip(n_in_log, 0, None), 1),
        "output_speed_rpm": np.round(np.clip(n_out_log, 0, None), 1),
        "ratio_setpoint": np.round(sp, 2),
        "torque_out_nm": np.round(t_out_log, 3),
        "temperature_c": np.round(temp_log, 1),
    }

    if cond == "sensor_flatline":
        k0 = grid.idx(rng.uniform(0.3, 0.8) * days * 86400.0)
        k_on = _first_running_at_or_after(run, k0)
        if k_on is not None:
            onset_k = k_on
            frozen = cols["output_speed_rpm"][k_on]
            cols["output_speed_rpm"][k_on:] = frozen
            truth_fault = {"frozen_value_rpm": float(frozen)}
    cols = {k: c.astype(np.float32) for k, c in cols.items()}

    # --- logger gaps (unit level; line-level gaps are added by the caller)
    logged = np.ones(n, dtype=bool)
    gap_list = []
    for _ in range(int(rng.poisson(days / 15.0))):
        a = grid.idx(rng.uniform(0, days * 86400.0))
        b = grid.idx(t_s[min(a, n - 1)] + rng.uniform(1.0, 10.0) * 3600.0)
        if b > a:
            logged[a:b] = False
            gap_list.append((a, b))

    # --- true energy and saving of the recipes (noise-free duty of steady logged samples)
    ok_e = steady & logged & ~gross & ~stall & np.isfinite(t_out)
    idx_e = np.flatnonzero(ok_e)
    days_e = np.unique(grid.day[logged]).size      # per calendar week of logs, as advise()
    hours_e = idx_e.size * per / 3600.0
    if idx_e.size > 20000:                    # an even subsample keeps this cheap
        idx_e = idx_e[np.linspace(0, idx_e.size - 1, 20000).astype(np.int64)]
    energy = _energy_truth(p, n_out[idx_e], t_out[idx_e], sp[idx_e], rec_at[idx_e],
                           temp[idx_e], tuning, hours_e, max(days_e, 1) / 7.0)

    # --- noise-free daily truth
    noon = np.minimum(((np.arange(days) * 86400 + 43200) // grid.period_s).astype(int), n - 1)
    slip_ref = _noise_free_slip_at_ref(use_r, use_w, p, f_n[noon], mu_f[noon], dx_f[noon])
    over = np.flatnonzero(slip_ref >= SLIP_LIMIT)
    cross_n = int(over[0]) if over.size else None

    # --- maintenance that does not reset wear
    t = rng.uniform(3, 30)
    while t < days:
        maint.append((_weekday_morning(grid, t, rng), "inspection",
                      str(rng.choice(["visual check, no finding", "noise check, normal",
                                      "guard and cabling checked, no finding"]))))
        t += rng.uniform(25, 40)
    t = rng.uniform(5, 35)
    while t < days:
        maint.append((_weekday_morning(grid, t, rng), "lubrication",
                      str(rng.choice(["actuator lead screw greased", "cone bearings greased"]))))
        t += rng.uniform(28, 35)
    maint = [m for m in maint if m[0] < days * 86400]

    def day_n(k: Optional[int]) -> Optional[int]:
        return None if k is None else int(grid.day[k])

    def date_iso(k: Optional[int]) -> Optional[str]:
        return None if k is None else grid.date_of(k)

    onset_for_counts = onset_k if cond != "healthy" else None
    before = np.arange(n) < (onset_for_counts if onset_for_counts is not None else n)
    stopped_change = chg & ~run
    truth = {
        "line": plan.line,
        "condition": cond,
        "fault_start": date_iso(onset_k) if cond != "healthy" else None,
        "fault_start_ts": grid.iso(onset_k) if (cond != "healthy" and onset_k is not None)
        else None,
        "limit_crossing_day": (grid.start.date() + dt.timedelta(days=cross_n)).isoformat()
        if cross_n is not None else None,
        "replacement_day": date_iso(replacement_k),
        "instrumented": plan.instrumented,
        "r_ohm": round(r20, 5),
        "k_e": round(k_e, 5),
        "day_numbers": {"fault_start": day_n(onset_k) if cond != "healthy" else None,
                        "limit_crossing": cross_n, "replacement": day_n(replacement_k)},
        "motor": {"r_ohm_20c": round(r20, 5), "k_e_v_s_per_rad": round(k_e, 5),
                  "i0_a": round(i0, 4), "supply_v": round(p["supply_v"], 3),
                  "current_limit_a": round(p["current_limit_a"], 3),
                  "alpha_per_k": ph.ALPHA_COPPER_PER_K},
        "variator": {"r_small_m": round(p["r_small_m"], 6), "r_large_m": round(p["r_large_m"], 6),
                     "length_m": p["length_m"], "wheel_width_m": WHEEL_WIDTH_M,
                     "normal_force_n": round(p["normal_force_n"], 3),
                     "mu_max": round(p["mu_max"], 4), "slip_at_peak": round(p["slip_at_peak"], 4),
                     "spin_k": round(p["spin_k"], 4),
                     "position_offset_mm": round(p["dx_m"] * 1e3, 4)},
        "ratio_usage": {"ratios": [float(r) for r in use_r],
                        "weights": [round(float(w) / float(use_w.sum()), 5) for w in use_w]},
        "baseline_slip_at_ref": round(base_slip, 5),
        "recipes": {"tuning": "untuned" if plan.untuned else "tuned", **energy},
        "fault": truth_fault,
        "events": {
            "gross_slip_samples": int((gross & logged).sum()),
            "gross_slip_samples_before_fault": int((gross & logged & before).sum()),
            "stall_samples": int((stall & logged).sum()),
            "ratio_changes_while_stopped": int((stopped_change & logged).sum()),
        },
        "gaps": [[grid.iso(a), grid.iso(min(b, n - 1))] for a, b in gap_list],
        "slip_at_ref_by_day": [round(float(s), 5) for s in slip_ref],
    }
    return _UnitOut(plan, cols, logged, truth, maint)


# ---------------------------------------------------------------- writing
def _fmt(x: float) -> str:
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return ""
    return np.format_float_positional(np.float32(x), trim="0")


_CORRUPT_KINDS = ("text_in_numeric", "negative_speed", "empty_unit_id", "bad_timestamp")
_NUMERIC = ("motor_volts", "motor_amps", "input_speed_rpm", "output_speed_rpm",
            "ratio_setpoint", "temperature_c")


def _corrupt_line(row: dict, kind: str, rng: np.random.Generator) -> tuple[str, str]:
    """One spoiled CSV line made from a real row; returns (line, column spoiled)."""
    vals = {c: row[c] for c in TELEMETRY_COLUMNS}
    ts: dt.datetime = vals["time"]
    out = {c: _fmt(vals[c]) for c in TELEMETRY_COLUMNS[2:]}
    drive, tstr = vals["drive"], _iso(ts)
    column = ""
    if kind == "text_in_numeric":
        column = str(rng.choice(_NUMERIC))
        out[column] = str(rng.choice(["ERR", "#VALUE!", "--", "overflow"]))
    elif kind == "negative_speed":
        column = str(rng.choice(["input_speed_rpm", "output_speed_rpm"]))
        out[column] = "-" + out[column]
    elif kind == "empty_unit_id":
        column, drive = "drive", ""
    else:
        column = "time"
        tstr = str(rng.choice([ts.strftime("%Y-%m-%dT25:%M:00Z"), "#TIME",
                               ts.strftime("%Y-%m-%dT%H:%M:99Z")]))
    return ",".join([drive, tstr] + [out[c] for c in TELEMETRY_COLUMNS[2:]]) + "\n", column


def _write_file(path: Path, df: pl.DataFrame, rng: np.random.Generator,
                running: np.ndarray) -> dict:
    """Write one telemetry file with duplicates and corrupt rows; return its answer-key entry."""
    n = df.height
    n_dup = int(rng.binomial(n, 0.002)) if n else 0
    n_bad = min(int(1 + rng.poisson(1.5)), max(0, n // 50))
    run_rows = np.flatnonzero(running)
    pool = run_rows if run_rows.size >= n_dup + n_bad else np.arange(n)
    picks = rng.choice(pool, size=min(pool.size, n_dup + n_bad), replace=False)
    dup_rows = np.sort(picks[:n_dup])
    bad_rows = np.sort(picks[n_dup:])
    counts = np.ones(n, dtype=np.int64)
    counts[dup_rows] = 2
    take = np.repeat(np.arange(n), counts)
    new_pos = np.cumsum(counts) - counts      # position of each original row after repeats
    bad_pos = new_pos[bad_rows]
    full = df[take] if n_dup else df
    kinds = [_CORRUPT_KINDS[int(j)] for j in rng.integers(0, len(_CORRUPT_KINDS),
                                                          bad_rows.size)]
    corrupt = []
    with open(path, "wb") as fh:
        fh.write((",".join(TELEMETRY_COLUMNS) + "\n").encode())
        prev = 0
        for pos, kind in zip(bad_pos, kinds):
            pos = int(pos)
            if pos > prev:
                full.slice(prev, pos - prev).write_csv(
                    fh, include_header=False, datetime_format="%Y-%m-%dT%H:%M:%SZ")
            row = full.row(pos, named=True)
            line, column = _corrupt_line(row, kind, rng)
            fh.write(line.encode())
            corrupt.append({"line": pos + 2, "kind": kind, "column": column,
                            "unit_id": row["drive"], "time": _iso(row["time"])})
            prev = pos + 1
        if prev < full.height:
            full.slice(prev).write_csv(fh, include_header=False,
                                       datetime_format="%Y-%m-%dT%H:%M:%SZ")
    return {"rows": int(full.height), "duplicate_rows": n_dup, "corrupt_rows": len(corrupt),
            "corrupt": corrupt}


def _month_ranges(grid: _Grid) -> list[tuple[str, int, int]]:
    out = []
    d0 = grid.start
    end = d0 + dt.timedelta(seconds=grid.n * grid.period_s)
    cur = dt.datetime(d0.year, d0.month, 1, tzinfo=dt.timezone.utc)
    while cur < end:
        nxt = dt.datetime(cur.year + (cur.month == 12), cur.month % 12 + 1, 1,
                          tzinfo=dt.timezone.utc)
        a = grid.idx(max((cur - d0).total_seconds(), 0.0))
        b = grid.idx((nxt - d0).total_seconds())
        if b > a:
            out.append((cur.strftime("%Y-%m"), a, b))
        cur = nxt
    return out


# ---------------------------------------------------------------- entry point
def simulate_fleet(out_dir: str | Path, units: int = DEFAULT_UNITS, days: int = DEFAULT_DAYS,
                   period_s: float = DEFAULT_PERIOD_S, seed: int = DEFAULT_SEED,
                   start: str | dt.date = DEFAULT_START,
                   progress: Optional[Callable[[int, int], None]] = None) -> SimulationResult:
    """Simulate a fleet of ``units`` friction drives for ``days`` days into ``out_dir``.

    ``period_s``: logging period in whole seconds (1-3600); ``start``: first day
    (YYYY-MM-DD, UTC midnight); ``progress``: optional callable ``(done, total)`` called as
    units are simulated and files written. Writes telemetry CSVs (one per line and month),
    maintenance.csv, answer_key.json, mapping.toml and maintenance_mapping.toml; files of an
    earlier simulation in the folder are replaced. Deterministic: the same arguments give
    the same bytes.

    Raises UsageError on a bad argument, or when ``out_dir`` holds telemetry files that an
    earlier simulation did not write. OSError propagates if the folder cannot be written.
    """
    t0 = time.perf_counter()
    units, days, period, seed, start_d = _check_args(units, days, period_s, seed, start)
    out = Path(out_dir)
    _prepare_out_dir(out)

    start_dt = dt.datetime(start_d.year, start_d.month, start_d.day, tzinfo=dt.timezone.utc)
    n = (days * 86400) // period
    t_s = np.arange(n, dtype=np.int64) * period
    grid = _Grid(start_dt, days, period, int(n), t_s, t_s // 86400, start_d.weekday())
    fleet_rng = np.random.default_rng(np.random.SeedSequence([seed, 0]))
    plans = _layout(units, fleet_rng)
    _choose_untuned(plans, seed)
    line_ambient = {ln: float(fleet_rng.uniform(19.0, 25.0)) for ln in LINES}
    months = _month_ranges(grid)
    lines_used = [ln for ln in LINES if any(pl_.line == ln for pl_ in plans)]
    total_steps = units + len(lines_used) * len(months) + 1
    done = 0

    results: list[_UnitOut] = []
    for plan in plans:
        rng = np.random.default_rng(np.random.SeedSequence([seed, 1, plan.index]))
        tune_rng = np.random.default_rng(np.random.SeedSequence([seed, 5, plan.index]))
        results.append(_simulate_unit(plan, grid, rng, line_ambient[plan.line], tune_rng))
        done += 1
        if progress:
            progress(done, total_steps)

    # line-level logger gaps (the line's logger offline: every unit of the line)
    line_gaps: dict[str, list[list[str]]] = {}
    for ln in lines_used:
        g_rng = np.random.default_rng(np.random.SeedSequence([seed, 3, LINES.index(ln)]))
        line_gaps[ln] = []
        for _ in range(int(g_rng.poisson(days / 30.0))):
            a = grid.idx(g_rng.uniform(0, days * 86400.0))
            b = grid.idx(float(t_s[min(a, n - 1)]) + g_rng.uniform(0.5, 6.0) * 3600.0)
            if b > a:
                for r in results:
                    if r.plan.line == ln:
                        r.logged[a:b] = False
                line_gaps[ln].append([grid.iso(a), grid.iso(min(b, n - 1))])

    files: list[Path] = []
    file_info: dict[str, dict] = {}
    rows_total = 0
    epoch_ms = (np.datetime64(start_dt.replace(tzinfo=None), "ms")
                + (t_s * 1000).astype("timedelta64[ms]"))
    file_no = 0
    for ln in lines_used:
        members = [r for r in results if r.plan.line == ln]
        names = [r.plan.unit_id for r in members]
        m = len(members)
        for month, a, b in months:
            seg_len = b - a
            mask = np.stack([r.logged[a:b] for r in members], axis=1).ravel()
            data: dict[str, Any] = {
                "drive": pl.Series("drive", names, dtype=pl.Enum(names)).gather(
                    np.tile(np.arange(m, dtype=np.uint32), seg_len)[mask]),
                "time": np.repeat(epoch_ms[a:b], m)[mask],
            }
            for col in TELEMETRY_COLUMNS[2:]:
                arr = np.stack([r.cols[col][a:b] for r in members], axis=1).ravel()[mask]
                data[col] = pl.Series(col, arr, nan_to_null=True)
            df = pl.DataFrame(data)
            running = df["input_speed_rpm"].to_numpy() > 100.0
            f_rng = np.random.default_rng(np.random.SeedSequence([seed, 2, file_no]))
            file_no += 1
            name = f"telemetry_{ln}_{month}.csv"
            info = _write_file(out / name, df, f_rng, running)
            file_info[name] = info
            rows_total += info["rows"]
            files.append(out / name)
            done += 1
            if progress:
                progress(done, total_steps)
            del df, data

    # maintenance log
    entries = sorted((t, r.plan.unit_id, action, note)
                     for r in results for (t, action, note) in r.maintenance)
    maint_df = pl.DataFrame({
        "drive": [e[1] for e in entries],
        "time": [_iso(start_dt + dt.timedelta(seconds=int(e[0]))) for e in entries],
        "action": [e[2] for e in entries],
        "note": [e[3] for e in entries],
    }, schema={c: pl.String for c in MAINTENANCE_COLUMNS})
    maint_path = out / "maintenance.csv"
    maint_df.write_csv(maint_path)
    (out / "mapping.toml").write_text(MAPPING_TOML, encoding="utf-8")
    (out / "maintenance_mapping.toml").write_text(MAINTENANCE_MAPPING_TOML, encoding="utf-8")

    by_cond = {c: sum(1 for r in results if r.plan.condition == c) for c in CONDITIONS}
    dup_total = sum(f["duplicate_rows"] for f in file_info.values())
    bad_total = sum(f["corrupt_rows"] for f in file_info.values())
    key = {
        "schema_version": SCHEMA_VERSION,
        "generator": "fleetwatch.simulate",
        "plant": PLANT_NAME,
        "seed": seed,
        "args": {"units": units, "days": days, "period_s": float(period), "seed": seed,
                 "start": start_d.isoformat()},
        "span": {"start": _iso(start_dt), "end": grid.iso(int(n) - 1),
                 "samples_per_unit": int(n)},
        "settings": {"slip_limit": SLIP_LIMIT, "load_ref_nm": LOAD_REF_NM,
                     "gross_slip_limit": GROSS_SLIP_LIMIT, "max_start_ratio": MAX_START_RATIO,
                     "sample_period_s": float(period)},
        "definitions": {
            "limit_crossing_day": "first day (UTC date, evaluated at noon) on which the "
                                  "noise-free steady slip at motor shaft torque load_ref_nm, "
                                  "averaged over the unit's ratio usage, reaches slip_limit",
            "slip_at_ref_by_day": "that noise-free slip, one value per day from start",
            "day_numbers": "days since start (0 = start day)",
            "r_ohm": "armature resistance at 20 degC, ohm (rises 0.393 %/K with winding "
                     "temperature)",
            "k_e": "back-EMF constant referred to the variator input shaft, V*s/rad",
            "recipes": "tuning 'untuned': part of each product's runs use an old recipe "
                       "(ratio_old, the motor slowed to the same output speed and torque); "
                       "old_share of its segments. products steeper than max_start_ratio "
                       "start in ratio_old. true_saving_kwh_per_week: noise-free input "
                       "energy of steady logged running at the ratios used minus at each "
                       "sample's least-power ratio between ratio_old and min(ratio_tuned, "
                       "max_start_ratio), within supply voltage and current limit, healthy "
                       "physics (true_operating_point); weeks = days with any logged sample / 7; "
                       "least_power_ratio: the best single ratio for the product's samples",
        },
        "counts": {"units": units, "faulty": units - by_cond["healthy"],
                   "by_condition": by_cond},
        "units": {r.plan.unit_id: r.truth for r in results},
        "line_gaps": line_gaps,
        "files": file_info,
        "totals": {"files": len(file_info), "rows": rows_total, "duplicate_rows": dup_total,
                   "corrupt_rows": bad_total, "clean_rows": rows_total - dup_total - bad_total},
        "maintenance": {"file": "maintenance.csv", "rows": len(entries)},
    }
    key_path = out / "answer_key.json"
    key_path.write_text(json.dumps(key, indent=1) + "\n", encoding="utf-8")
    files += [maint_path, key_path, out / "mapping.toml", out / "maintenance_mapping.toml"]
    done += 1
    if progress:
        progress(done, total_steps)
    return SimulationResult(out, files, rows_total, key_path, time.perf_counter() - t0)


def write_sample_data(out_dir: str | Path = "sample_data") -> SimulationResult:
    """Regenerate the committed demo fleet (``SAMPLE_ARGS``) into ``out_dir``.

    Leaves other files in the folder (its README.md) alone. Raises like ``simulate_fleet``.
    """
    return simulate_fleet(out_dir, **SAMPLE_ARGS)


def true_operating_point(answer_key: Any, unit_id: str, n_out_rpm: Any, t_out_nm: Any,
                         ratio: Any, temp_c: Any = 20.0) -> dict[str, np.ndarray]:
    """Noise-free steady state of a simulated unit at one duty and commanded ratio.

    For checking the ratio advisor against the simulator's own physics: the true input
    power of running output speed ``n_out_rpm`` (rpm) at output torque ``t_out_nm`` (N*m)
    with commanded ratio ``ratio`` and winding temperature ``temp_c`` (degC); the four
    broadcast like numpy. ``answer_key``: the answer_key.json dict or its path; the unit's
    parameters are drawn again from the key's seed exactly as ``simulate_fleet`` drew them.
    The unit is taken healthy (nominal preload, clean contact, no actuator error).

    Returns arrays: ``p_in_w`` (electrical input power V*I, W), ``v_in`` (V), ``i_in`` (A),
    ``n_in_rpm``, ``t_shaft_nm`` (motor shaft torque), ``v_max`` (highest motor voltage the
    supply gives, V) and ``feasible`` (V <= v_max, I within the controller's current limit,
    contacts below the traction peak). Raises KeyError for a unit not in the key.
    """
    key = answer_key
    if not isinstance(key, dict):
        key = json.loads(Path(key).read_text(encoding="utf-8"))
    index = list(key["units"]).index(unit_id) if unit_id in key["units"] else None
    if index is None:
        raise KeyError(f"unit {unit_id!r} is not in the answer key")
    p = _unit_params(np.random.default_rng(np.random.SeedSequence([int(key["seed"]), 1, index])))
    return _steady_state(p, n_out_rpm, t_out_nm, ratio, temp_c)


def _steady_state(p: dict, n_out_rpm: Any, t_out_nm: Any, ratio: Any,
                  temp_c: Any) -> dict[str, np.ndarray]:
    """Noise-free steady state of a healthy unit with parameters ``p`` (see
    ``true_operating_point``)."""
    n_out, t_out, i_cmd, temp = np.broadcast_arrays(*(np.asarray(a, dtype=float) for a in
                                                      (n_out_rpm, t_out_nm, ratio, temp_c)))
    x = np.clip(ph.cone_position(i_cmd, R_SMALL_M, R_LARGE_M, CONE_LENGTH_M) + p["dx_m"],
                0.0, p["length_m"])
    r_in, r_out = ph.cone_radii(x, p["r_small_m"], p["r_large_m"], p["length_m"])
    i_kin = r_out / r_in
    eta_c = p["eta_c0"] - 0.035 * np.log(i_kin) ** 2
    t_m = t_out / (i_kin * eta_c) + T_DRAG_NM
    s_c = ph.slip_for_traction(t_m / (r_in * p["normal_force_n"]), p["mu_max"],
                               p["slip_at_peak"])
    s_spin = p["spin_k"] * WHEEL_WIDTH_M * 0.5 * (1.0 / r_in + 1.0 / r_out)
    s_tot = ph.series_slip(np.where(np.isfinite(s_c), s_c, 0.0),
                           np.where(np.isfinite(s_c), s_c, 0.0), s_spin)
    n_in = n_out * i_kin / (1.0 - s_tot)
    i_a = t_m / p["k_e"] + p["i0_a"]
    v = ph.motor_voltage_v(i_a, ph.omega_from_rpm(n_in),
                           ph.winding_resistance(p["r_ohm_20c"], temp), p["k_e"])
    v_max = MAX_DUTY * p["supply_v"]
    feasible = (v <= v_max) & (i_a <= p["current_limit_a"]) & np.isfinite(s_c)
    return {"p_in_w": v * i_a, "v_in": v, "i_in": i_a, "n_in_rpm": n_in, "t_shaft_nm": t_m,
            "v_max": np.full(v.shape, v_max), "feasible": feasible}
