"""Health status per unit and day (normal, watch, alert) with reasons, evidence and causes.

Each day, several *channels* look at the evidence and give a raw level (0 none, 1 watch,
2 alert, or "no evidence" on a day without steady running, fit or events); a channel's
state follows its raw levels with persistence (design.md 5; the on-/off-delay idea of
ANSI/ISA-18.2-2016 as summarised in domain.md 3.4; k-of-n and m clean days are common
practice, no source):

* a trend-, level- or score-based state is raised when at least ``persist_k`` of the unit's
  last ``persist_n`` days with evidence reach it; an event-based alert (gross slip, repeated
  stalls) and a sensor flatline rise at once;
* a raised state clears (or steps down) only after ``clear_m`` days with evidence below it;
  days without evidence (a weekend off) neither raise nor clear;
* a wear reset (maintenance with ``resets_wear``) clears the slip, anomaly, actuator and
  gross-slip channels on the day of the action (they describe the old contact); the
  reference and the trends restart after it. Stall and sensor states are kept.

Robust reference (``_base.py``): per unit and segment, median and floored 1.4826*MAD of each
indicator over the first ``reference_days``; z = (x - median) / scale. The unit's status is
the highest channel state. Channels and their raw rules:

``slip`` (slip at rated load and compliance creep b, from unit_days and ``trends``):
  alert: median days to the slip limit below ``alert_horizon_days`` (0 when at or above it).
  watch: today's value above the reference median by at least max(``level_z`` robust
  sigmas, ``level_margin`` x (limit - reference)) - the margin mirrors vibration practice
  of an ALERT level above the machine's own baseline by about 25 % of the zone boundary
  (ISO 20816-1, domain.md 3.4, from memory); creep b uses the limit implied by the slip
  limit (trend.py). Or: a significant upward trend (lower slope bound above zero) with the
  fitted level and the latest days above the reference by max(``level_z`` sigmas,
  ``rising_margin`` x (limit - reference)). Or: median days to limit of either below
  ``watch_horizon_days``.
  A departure of slip at rated load of at least twice that margin, either way, on a day with
  at least half its data is raised at once: no day-to-day noise reaches it (the on-delay
  is there against chatter near a limit); falling that far means the output turns faster
  than commanded (actuator or speed sensor, not wear).
  A forecast counts only while the median of the last ``persist_n`` values is not below
  the fitted level by more than ``level_z`` sigmas (the data must confirm the line; a step
  that cleared leaves a rising line behind). Cause: wear, or contamination / actuator for a
  step (below).
``anomaly``: isolation-forest score at or above ``watch_score`` outside the reference period,
  backed by a well-conditioned departure of at least ``anomaly_min_z`` (|z| of slip at rated
  load, power residual or efficiency, or creep b rising): an offset a up with a compliance b
  down and slip at rated load unchanged is an ill-conditioned daily fit, not a fault. The
  forest saturates beyond the reference hull (about 0.56 for one feature and 0.63 for two
  with 4-5 features), so this channel catches multi-feature departures; strong
  single-indicator departures are caught by the slip and actuator channels -> watch.
``actuator``: creep a departs from the reference by max(``actuator_z`` sigmas,
  ``actuator_offset_fraction`` x slip_limit), more than the compliance change at rated load
  (|d a| >= |d b| x load_ref), and slip at rated load moves the same way by at least half
  that: a ratio/position error shifts the whole creep line, load-independently (domain.md
  2.6-2.7, derived) -> watch.
``gross_slip``: at least ``gross_slip_events_per_day`` in a day -> alert at once; any gross
  slip on k of n days -> watch. Cause sensor when a flatline is near, else the cause of a
  raised slip/anomaly/actuator state, else contamination.
``stall``: at least ``stall_repeat`` stalls in a day -> alert at once; stalls on k of n days
  -> watch. Cause stall.
``sensor``: a sensor flatline -> watch at once (slip figures cannot be trusted until the
  sensor is checked). Cause sensor.

Causes of the slip and anomaly channels, from the evidence of each day with a hit: a
flatline in the last ``persist_n`` days -> sensor; else the feature with the largest z in
its damaging direction (slip, creep b and power up, efficiency down, creep a either way);
power residual or efficiency -> motor; a slip feature -> actuator when the offset part
dominates (as above), else contamination, each only for a *step*: the feature left a normal
state (median of its previous 3 values below z = 2) with a rise of at least max(``step_z``,
half its current z); a creep -> wear (domain.md 2.7 "step, may recover" vs "slow trend").
Less than half a day of data (completeness < 0.5) adds cause data to an anomaly.
"""
from __future__ import annotations

import datetime as dt
import statistics
from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np
import polars as pl

from ..errors import ModelError
from ._base import FleetModel, as_frame, assign_segments, reference_stats, robust_z
from .anomaly import DEFAULT_FEATURES

__all__ = ["HealthRules", "HEALTH_COLUMNS", "LEVELS"]

LEVELS = ("normal", "watch", "alert")
HEALTH_COLUMNS = ["unit_id", "day", "status", "since", "days_to_limit", "reasons", "causes"]
_WEAR_INDICATORS = ("slip_at_load", "creep_b")
_STEP_LOOKBACK = 3
_SLIP_FEATURES = ("slip_at_load", "creep_a", "creep_b")
_Z_NORMAL = 2.0     # |robust z| below this counts as 'at the reference'
#: Direction in which a feature moves when the drive gets worse (domain.md 2.6-2.7):
#: +1 rising is bad, -1 falling is bad, 0 both (a ratio/position offset can go either way).
_ADVERSE = {"slip_at_load": 1, "creep_b": 1, "creep_a": 0, "power_resid_pct": 1,
            "efficiency": -1}


@dataclass
class _Channel:
    """Persistence state of one channel of one unit."""

    name: str
    immediate: tuple[int, ...] = ()      # levels raised at once by a single raw day
    resets: bool = False                  # cleared by a wear reset
    state: int = 0
    hist: list[int] = field(default_factory=list)
    clean: int = 0
    since: dt.date | None = None
    causes: tuple[str, ...] = ()
    last_hit: dt.date | None = None

    def update(self, raw: int | None, day: dt.date, k: int, n: int, m: int,
               at_once: bool = False) -> bool:
        """Feed today's raw level; returns True when the state rose today.

        ``raw`` None: no evidence today (drive not running, no data): the day counts neither
        towards raising nor towards clearing. ``at_once``: today's raw level is raised
        without waiting for k of n days (a departure no day-to-day noise can reach).
        """
        if raw is None:
            return False
        self.hist = (self.hist + [raw])[-n:]
        cand = 0
        for lvl in (2, 1):
            if ((lvl in self.immediate or at_once) and raw >= lvl) \
                    or sum(h >= lvl for h in self.hist) >= k:
                cand = lvl
                break
        if raw > 0:
            self.last_hit = day
        if cand > self.state:
            self.state, self.clean, self.since = cand, 0, day
            return True
        if self.state > 0:
            self.clean = self.clean + 1 if raw < self.state else 0
            if self.clean >= m:
                self.state, self.clean = cand, 0
                if cand == 0:
                    self.since, self.causes = None, ()
        return False

    def reset(self) -> None:
        self.state, self.hist, self.clean, self.since, self.causes = 0, [], 0, None, ()


def _pct(x: float | None, digits: int = 1) -> str:
    return "n/a" if x is None or not np.isfinite(x) else f"{100 * x:.{digits}f} %"


def _num(x: float | None, digits: int = 4) -> str:
    return "n/a" if x is None or not np.isfinite(x) else f"{x:.{digits}g}"


def _days(x: float | None) -> str:
    if x is None or not np.isfinite(x):
        return "open"
    return f"{x:.0f}"


def _f(v: Any) -> float | None:
    if v is None:
        return None
    try:
        f = float(v)
    except (TypeError, ValueError):
        return None
    return f if np.isfinite(f) else None


class HealthRules(FleetModel):
    """Status rules with persistence over unit_days, trends, scores and maintenance.

    Parameters mirror the ``health`` settings (defaults identical); see the module
    docstring for the rules. Learned: ``reference_`` (per unit and segment: robust median
    and scale of the wear indicators and anomaly features).
    """

    def __init__(self, slip_limit: float = 0.05, alert_horizon_days: float = 14.0,
                 watch_horizon_days: float = 45.0, watch_score: float = 0.62,
                 persist_k: int = 2, persist_n: int = 3, clear_m: int = 3,
                 gross_slip_events_per_day: float = 3.0, stall_repeat: int = 2,
                 reference_days: int = 14, load_ref_nm: float = 1.0,
                 level_margin: float = 0.25, rising_margin: float = 0.10, level_z: float = 3.0,
                 actuator_z: float = 4.0,
                 actuator_offset_fraction: float = 0.1, step_z: float = 4.0,
                 anomaly_min_z: float = 3.0, features: Sequence[str] = DEFAULT_FEATURES):
        self.slip_limit = slip_limit
        self.alert_horizon_days = alert_horizon_days
        self.watch_horizon_days = watch_horizon_days
        self.watch_score = watch_score
        self.persist_k = persist_k
        self.persist_n = persist_n
        self.clear_m = clear_m
        self.gross_slip_events_per_day = gross_slip_events_per_day
        self.stall_repeat = stall_repeat
        self.reference_days = reference_days
        self.load_ref_nm = load_ref_nm
        self.level_margin = level_margin
        self.rising_margin = rising_margin
        self.level_z = level_z
        self.actuator_z = actuator_z
        self.actuator_offset_fraction = actuator_offset_fraction
        self.step_z = step_z
        self.anomaly_min_z = anomaly_min_z
        self.features = features

    def _feats(self) -> list[str]:
        return sorted(set(self.features) | {"slip_at_load", "creep_a", "creep_b"})

    def fit(self, unit_days, maintenance=None, y=None) -> "HealthRules":
        """Learn each unit's robust reference per maintenance segment."""
        if not 1 <= int(self.persist_k) <= int(self.persist_n):
            raise ModelError(f"persist_k ({self.persist_k}) must lie between 1 and persist_n "
                             f"({self.persist_n})", hint="Fix persist_k / persist_n.")
        if int(self.clear_m) < 1:
            raise ModelError("clear_m must be at least 1", hint="Set clear_m >= 1.")
        seg = assign_segments(as_frame(unit_days, "unit_days"), maintenance,
                              int(self.reference_days))
        self.reference_ = reference_stats(seg, self._feats())
        return self

    # ------------------------------------------------------------------ inputs
    def _prepare(self, unit_days, trends, scores, maintenance) -> pl.DataFrame:
        feats = self._feats()
        seg = assign_segments(as_frame(unit_days, "unit_days"), maintenance,
                              int(self.reference_days))
        ref = self.reference_
        new_keys = (seg.select("unit_id", "segment_start").unique()
                    .join(ref.select("unit_id", "segment_start"),
                          on=["unit_id", "segment_start"], how="anti"))
        if new_keys.height:
            extra = reference_stats(seg.join(new_keys, on=["unit_id", "segment_start"]), feats)
            ref = pl.concat([ref, extra.select(ref.columns)], how="vertical_relaxed")
        df = robust_z(seg, ref, feats)
        for c in ("gross_slip_events", "stall_events", "flatline_events", "gap_events"):
            if c not in df.columns:
                df = df.with_columns(pl.lit(0, dtype=pl.Int64).alias(c))
        if "completeness" not in df.columns:
            df = df.with_columns(pl.lit(None, dtype=pl.Float64).alias("completeness"))
        # trends: one column set per wear indicator
        tr = as_frame(trends, "trends") if trends is not None else None
        for ind in _WEAR_INDICATORS:
            cols = {"slope_per_day": "slope", "slope_low": "slope_low", "level_now": "level",
                    "limit": "limit", "days_to_limit": "dtl", "days_to_limit_low": "dtl_low",
                    "days_to_limit_high": "dtl_high", "since": "since", "note": "note",
                    "n_days": "n"}
            if tr is not None and tr.height and "indicator" in tr.columns:
                t = (tr.filter(pl.col("indicator") == ind)
                     .select([pl.col("unit_id").cast(pl.Utf8),
                              pl.col("as_of").cast(pl.Date).alias("day")]
                             + [pl.col(k).alias(f"{ind}__t_{v}") for k, v in cols.items()
                                if k in tr.columns]))
                df = df.join(t, on=["unit_id", "day"], how="left")
            for k, v in cols.items():
                name = f"{ind}__t_{v}"
                if name not in df.columns:
                    dtype = (pl.Date if v == "since" else pl.Utf8 if v == "note"
                             else pl.Float64)
                    df = df.with_columns(pl.lit(None, dtype=dtype).alias(name))
        sc = as_frame(scores, "scores") if scores is not None else None
        if sc is not None and sc.height:
            df = df.join(sc.select(pl.col("unit_id").cast(pl.Utf8), pl.col("day").cast(pl.Date),
                                   "score", "top_features"),
                         on=["unit_id", "day"], how="left")
        else:
            df = df.with_columns(pl.lit(None, dtype=pl.Float64).alias("score"),
                                 pl.lit(None, dtype=pl.Utf8).alias("top_features"))
        return df.sort("unit_id", "day")

    def _raw_flags(self, df: pl.DataFrame) -> pl.DataFrame:
        lim = float(self.slip_limit)
        exprs = []
        wear_watch = pl.lit(False)
        wear_alert = pl.lit(False)
        quiet = ~pl.col("is_reference") & ~pl.col("reset_day")
        limits = {"slip_at_load": pl.lit(lim),
                  "creep_b": (lim - pl.col("creep_a__med")) / float(self.load_ref_nm)}
        for ind in _WEAR_INDICATORS:
            p = f"{ind}__t_"
            x = pl.col(ind).cast(pl.Float64).fill_nan(None)
            ref_med, ref_scale = pl.col(f"{ind}__med"), pl.col(f"{ind}__scale")
            margin = pl.max_horizontal(float(self.level_z) * ref_scale,
                                       float(self.level_margin) * (limits[ind] - ref_med))
            # today's value well above the unit's own reference (like the ISO 20816-1
            # alert level set above the machine's own baseline, domain.md 3.4)
            elevated = (quiet & ((x - ref_med) >= margin)).fill_null(False)
            if ind == "slip_at_load":
                # twice the margin away in one day, either way, on a day with at least half
                # its data: no day-to-day noise reaches that, so it is raised at once
                # (the on-delay exists against chatter near a limit, ISA-18.2 via
                # domain.md 3.4). Only slip at rated load: it is the well-conditioned
                # point of the daily creep fit; a and b alone are not.
                full_day = (pl.col("completeness").fill_null(1.0) >= 0.5)
                severe = (quiet & full_day & ((x - ref_med).abs() >= 2 * margin)).fill_null(False)
                exprs.append(severe.alias("_now_slip"))
                wear_watch = wear_watch | severe
            # a forecast counts only while the latest days confirm the fitted line: their
            # median is not below its level now by more than level_z robust sigmas (a step
            # that cleared, e.g. contamination, leaves a rising line the data contradict).
            # Not tied to the reference, which early wear may already have raised.
            recent = x.rolling_median(int(self.persist_n), min_samples=1).over(
                "unit_id", "segment_start", order_by="day")
            confirmed = ((recent - pl.col(p + "level"))
                         >= -float(self.level_z) * ref_scale).fill_null(False)
            near = ((pl.col(p + "dtl") < float(self.watch_horizon_days)) & confirmed
                    ).fill_null(False)
            rising = ((pl.col(p + "slope_low") > 0) & confirmed).fill_null(False)
            # a significant upward trend (lower slope bound above zero) whose fitted level
            # and latest days stand above the reference by max(level_z sigmas,
            # rising_margin x (limit - reference)): two pieces of evidence, so a smaller
            # share of the wear budget than the level-only margin
            r_margin = pl.max_horizontal(float(self.level_z) * ref_scale,
                                         float(self.rising_margin) * (limits[ind] - ref_med))
            trend_up = (quiet & rising & ((pl.col(p + "level") - ref_med) >= r_margin)
                        & ((recent - ref_med) >= r_margin)).fill_null(False)
            exprs.append(trend_up.alias(f"{ind}__trend_up"))
            exprs += [rising.alias(f"{ind}__rising"), elevated.alias(f"{ind}__elevated"),
                      margin.alias(f"{ind}__margin"), near.alias(f"{ind}__near")]
            wear_watch = wear_watch | elevated | near | trend_up
            if ind == "slip_at_load":
                wear_alert = ((pl.col(p + "dtl") < float(self.alert_horizon_days)) & confirmed
                              ).fill_null(False)
        wear_alert = wear_alert & ~pl.col("reset_day")
        wear_watch = wear_watch & ~pl.col("reset_day")
        d_a = (pl.col("creep_a") - pl.col("creep_a__med"))
        d_b_load = (pl.col("creep_b") - pl.col("creep_b__med")) * float(self.load_ref_nm)
        act_thr = pl.max_horizontal(float(self.actuator_z) * pl.col("creep_a__scale"),
                                    pl.lit(float(self.actuator_offset_fraction) * lim))
        d_s = pl.col("slip_at_load") - pl.col("slip_at_load__med")
        # an offset error shifts the whole creep line: slip at rated load moves with it, in
        # the same direction. A day whose fitted a and b move against each other while slip
        # at rated load stays put is an ill-conditioned fit (narrow load range), not a fault.
        actuator = (quiet & (d_a.abs() >= act_thr)
                    & (d_a.abs() >= d_b_load.abs().fill_null(0.0))
                    & (d_s.abs() >= 0.5 * act_thr) & ((d_a * d_s) > 0)).fill_null(False)
        # The score must be backed by a well-conditioned departure: slip at rated load (either
        # way), compliance rising, input-power residual or efficiency. The fitted offset a
        # alone, or the compliance falling, are what an ill-conditioned daily fit produces.
        gate = [pl.col(f"z_{f}").abs() for f in ("slip_at_load", "power_resid_pct", "efficiency")
                if f"z_{f}" in df.columns]
        if "z_creep_b" in df.columns:
            gate.append(pl.col("z_creep_b"))
        zmax = pl.max_horizontal(gate or [pl.lit(None, dtype=pl.Float64)])
        anomaly = (quiet & (pl.col("score") >= float(self.watch_score))
                   & (zmax.fill_null(0.0) >= float(self.anomaly_min_z))).fill_null(False)
        gs = pl.col("gross_slip_events").fill_null(0)
        st = pl.col("stall_events").fill_null(0)
        # Days without evidence (no steady running, no fit, no events) neither raise nor
        # clear a state: a weekend off does not count as three clean days.
        fl = pl.col("flatline_events").fill_null(0)
        ran = pl.col("steady_samples").fill_null(0) > 0 if "steady_samples" in df.columns \
            else pl.lit(True)
        any_event = (gs + st + fl) > 0
        has_slip = pl.col("slip_at_load").is_not_null() | pl.col("creep_b").is_not_null()
        has_feat = pl.any_horizontal([pl.col(f).is_not_null() for f in self.features
                                      if f in df.columns] or [pl.lit(False)])
        evid = lambda cond, expr: pl.when(cond).then(expr).otherwise(None)  # noqa: E731
        return df.with_columns(exprs).with_columns(
            evid(has_slip | wear_alert | wear_watch,
                 pl.when(wear_alert).then(2).when(wear_watch).then(1).otherwise(0))
            .alias("_raw_slip"),
            evid(has_feat, anomaly.cast(pl.Int8)).alias("_raw_anomaly"),
            evid(has_slip, actuator.cast(pl.Int8)).alias("_raw_actuator"),
            evid(ran | any_event, pl.when(gs >= float(self.gross_slip_events_per_day)).then(2)
                 .when(gs >= 1).then(1).otherwise(0)).alias("_raw_gross_slip"),
            evid(ran | any_event, pl.when(st >= int(self.stall_repeat)).then(2)
                 .when(st >= 1).then(1).otherwise(0)).alias("_raw_stall"),
            evid(ran | any_event, (fl >= 1).cast(pl.Int8)).alias("_raw_sensor"),
            d_a.alias("_d_a"), d_b_load.alias("_d_b_load"),
        )

    # ------------------------------------------------------------------ rules
    def predict(self, unit_days, trends=None, scores=None, maintenance=None,
                events=None) -> pl.DataFrame:
        """The ``health`` table: unit_id, day, status, since, days_to_limit, reasons, causes.

        ``trends`` is the trends table (trend.py), ``scores`` the scores table (anomaly.py),
        ``events`` (optional) names the signal of a flatline in the reasons.
        """
        return self.predict_resumable(unit_days, trends, scores, maintenance, events)[0]

    def predict_resumable(self, unit_days, trends=None, scores=None, maintenance=None,
                          events=None, since: dt.date | None = None,
                          resume: dict | None = None, snapshot_days: Sequence[dt.date] = ()
                          ) -> tuple[pl.DataFrame, dict]:
        """``predict`` that can start part way and hand back its state for a later start.

        The rules run day by day per unit, so the status of a day depends on every day
        before it. ``snapshot_days``: for each of these days, the state of every unit just
        before its first row on or after that day is returned (JSON-ready), keyed by the
        day's ISO date and the unit. ``since`` with ``resume`` (one such snapshot, for the
        day ``since``): only the rows on or after ``since`` are run, from that state; they
        equal those of a whole run when the rows before ``since`` are those the snapshot
        was taken on (the caller checks). ``trends`` and ``scores`` then need only the rows
        from ``since``. Raises ModelError when a unit with rows before ``since`` has no
        state in ``resume``.
        """
        self._check_fitted()
        df = self._raw_flags(self._prepare(unit_days, trends, scores, maintenance))
        df = self._with_jumps(df)
        flat_signals = _flatline_signals(events)
        k, n, m = int(self.persist_k), int(self.persist_n), int(self.clear_m)
        out_rows: list[tuple] = []
        zfeats = [f for f in _ADVERSE if f"z_{f}" in df.columns]
        snap_days = sorted(set(snapshot_days))
        snapshots: dict[str, dict] = {d.isoformat(): {} for d in snap_days}
        if since is not None:
            before = set(df.filter(pl.col("day") < since)["unit_id"].unique().to_list())
            missing = before - set(resume or {})
            if missing:
                raise ModelError(f"no saved health state for {len(missing)} unit(s) before "
                                 f"{since}", hint="Run the health models over all days.")
            df = df.filter(pl.col("day") >= since)
        for (uid,), g in df.group_by(["unit_id"], maintain_order=True):
            st = _unpack_state((resume or {}).get(uid), zfeats) if since is not None \
                else _initial_state(zfeats)
            chans = st["chans"]
            run_jump, prev_adv, quiet_days = st["run_jump"], st["prev_adv"], st["quiet_days"]
            flat_hist = st["flat_hist"]             # _raw_sensor of the previous n-1 rows
            prev_status, run_since = st["prev_status"], st["run_since"]
            pending = list(snap_days)

            def snap(day_iso: str) -> None:
                snapshots[day_iso][uid] = _pack_state(chans, run_jump, prev_adv, quiet_days,
                                                      flat_hist, prev_status, run_since)

            for r in g.iter_rows(named=True):
                day = r["day"]
                while pending and pending[0] <= day:
                    snap(pending.pop(0).isoformat())
                if r["reset_day"]:
                    for c in chans.values():
                        if c.resets:
                            c.reset()
                recent_flat = bool(r["_raw_sensor"]) or any(flat_hist)
                flat_hist = (flat_hist + [r["_raw_sensor"]])[-(n - 1):] if n > 1 else []
                # largest rise of each feature out of a normal state since it was last normal:
                # tells a step (contamination, actuator) from a creep (wear). The rise is
                # counted against the median of the previous _STEP_LOOKBACK observations and
                # only when they were at the reference: a creep that already left it is no
                # step, even when a weekend without data makes its next value jump.
                if r["reset_day"]:
                    for f in zfeats:
                        prev_adv[f].clear()
                for f in zfeats:
                    adv = _f(r.get(f"_adv_{f}"))
                    if adv is None:
                        continue
                    before_f = prev_adv[f]
                    base = statistics.median(before_f) if len(before_f) >= 2 else None
                    jump = adv - base if base is not None and base < _Z_NORMAL else 0.0
                    prev_adv[f] = (before_f + [adv])[-_STEP_LOOKBACK:]
                    if adv < _Z_NORMAL:
                        quiet_days[f] += 1
                        if quiet_days[f] >= 2:
                            run_jump[f] = 0.0
                    else:
                        quiet_days[f] = 0
                        run_jump[f] = max(run_jump[f], jump)
                for name, c in chans.items():
                    raw = r[f"_raw_{name}"]
                    raw = None if raw is None else int(raw)
                    c.update(raw, day, k, n, m, at_once=bool(r.get(f"_now_{name}")))
                    if not c.state:
                        c.causes = ()
                    elif raw or not c.causes:
                        c.causes = self._causes(name, r, run_jump, zfeats, recent_flat, chans,
                                                c.causes)
                level = max(c.state for c in chans.values())
                status = LEVELS[level]
                if status != prev_status:
                    run_since, prev_status = day, status
                reasons, causes = self._reasons(r, chans, flat_signals.get((uid, day)), status)
                out_rows.append((uid, day, status, run_since, _f(r["slip_at_load__t_dtl"]),
                                 reasons, causes))
            for d in pending:
                snap(d.isoformat())
        # units with no rows from ``since`` on keep their state for the next start
        if since is not None:
            for d in snapshots:
                for uid, stt in (resume or {}).items():
                    snapshots[d].setdefault(uid, stt)
        out = pl.DataFrame(out_rows, schema={"unit_id": pl.Utf8, "day": pl.Date,
                                             "status": pl.Utf8, "since": pl.Date,
                                             "days_to_limit": pl.Float64, "reasons": pl.Utf8,
                                             "causes": pl.Utf8}, orient="row")
        return out.select(HEALTH_COLUMNS).sort("unit_id", "day"), snapshots

    def _with_jumps(self, df: pl.DataFrame) -> pl.DataFrame:
        """``_adv_<f>``: robust z signed towards damage (|z| where both ways are)."""
        exprs = []
        for f, sign in _ADVERSE.items():
            if f"z_{f}" not in df.columns:
                continue
            z = pl.col(f"z_{f}")
            exprs.append((z.abs() if sign == 0 else z * sign).alias(f"_adv_{f}"))
        return df.with_columns(exprs)

    def _causes(self, name: str, r: dict, run_jump: dict, zfeats: list[str],
                recent_flat: bool, chans: dict, prev: tuple[str, ...] = ()) -> tuple[str, ...]:
        """Likely causes of a raised channel from today's evidence (module docstring)."""
        if name in ("actuator", "stall", "sensor"):
            return (name,)
        if recent_flat:
            return ("sensor",)
        if name == "gross_slip":
            for other in ("slip", "anomaly", "actuator"):
                if chans[other].state and chans[other].causes:
                    return chans[other].causes
            return ("contamination",)
        pool = [f for f in zfeats if name == "anomaly" or f in _SLIP_FEATURES]
        best, best_z = None, -np.inf
        for f in pool:
            v = _f(r.get(f"_adv_{f}"))
            if v is not None and v > best_z:
                best, best_z = f, v
        causes: list[str] = []
        if best is None or best_z < _Z_NORMAL:
            if prev:                 # evidence faded today: keep what raised the channel
                return prev
            causes.append("wear" if name == "slip" else "data")
        elif best in ("power_resid_pct", "efficiency"):
            causes.append("motor")
        else:
            # slip features: split the change of slip at rated load into offset and
            # compliance parts (domain.md 2.7: an actuator error is load-independent)
            step = run_jump.get(best, 0.0) >= max(float(self.step_z), 0.5 * best_z)
            d_a, d_b = abs(_f(r.get("_d_a")) or 0.0), abs(_f(r.get("_d_b_load")) or 0.0)
            if d_a >= d_b and d_a >= float(self.actuator_offset_fraction) * float(self.slip_limit):
                causes.append("actuator" if step else "wear")
            else:
                causes.append("contamination" if step else "wear")
        if name == "anomaly" and (_f(r.get("completeness")) or 1.0) < 0.5 \
                and "data" not in causes:
            causes.append("data")
        return tuple(causes)

    # ------------------------------------------------------------------ wording
    def _reasons(self, r: dict, chans: dict, flat_signal: str | None,
                 status: str) -> tuple[str, str | None]:
        day = r["day"]
        parts: list[str] = []
        causes: list[str] = []
        for name in ("slip", "gross_slip", "stall", "sensor", "actuator", "anomaly"):
            c = chans[name]
            if not c.state:
                continue
            parts.append(getattr(self, f"_why_{name}")(r, c, day, flat_signal))
            causes += [x for x in c.causes if x not in causes]
        if not parts:
            parts.append(self._why_normal(r))
            return " | ".join(parts), None
        return " | ".join(parts), ", ".join(causes)

    def _why_normal(self, r: dict) -> str:
        day = r["day"]
        if r["reset_day"]:
            return (f"wear reset: '{r.get('reset_action') or 'maintenance'}' on {day}; trends and "
                    f"reference restart [maintenance {day}]")
        if r["is_reference"]:
            return (f"building this unit's reference: day {int(r['seg_day']) + 1} of "
                    f"{int(self.reference_days)} since {r['segment_start']} "
                    f"[unit_days {r['segment_start']}..{day}]")
        today = _f(r.get("slip_at_load"))
        ref = _f(r.get("slip_at_load__med"))
        if today is None:
            return f"no persistent finding; no steady running on {day} [unit_days {day}]"
        return (f"no persistent finding; steady slip at rated load {_pct(today, 2)} "
                f"(reference {_pct(ref, 2)}, limit {_pct(float(self.slip_limit), 1)}) "
                f"[unit_days {day}]")

    def _why_slip(self, r: dict, c: _Channel, day, _flat) -> str:
        msgs = []
        for ind, label in (("slip_at_load", "steady slip at rated load"),
                           ("creep_b", "compliance (creep b)")):
            p = f"{ind}__t_"
            x, ref = _f(r.get(ind)), _f(r.get(f"{ind}__med"))
            lvl, slope, limit = _f(r[p + "level"]), _f(r[p + "slope"]), _f(r[p + "limit"])
            dtl, margin = _f(r[p + "dtl"]), _f(r.get(f"{ind}__margin"))
            elevated, near = bool(r.get(f"{ind}__elevated")), bool(r.get(f"{ind}__near"))
            trend_up = bool(r.get(f"{ind}__trend_up"))
            if ind == "slip_at_load" and r.get("_now_slip") and x is not None \
                    and ref is not None and x < ref:
                msgs.append(f"steady slip at rated load {_pct(x, 2)}, below this unit's "
                            f"reference {_pct(ref, 2)} by more than {_pct(2 * (margin or 0), 2)}:"
                            f" the output turns faster than commanded - ratio actuator or speed "
                            f"sensor, not wear [unit_days {day}]")
                continue
            if not (elevated or near or trend_up or (ind == "slip_at_load" and dtl is not None
                                                     and r.get(f"{ind}__rising"))):
                continue
            if ind == "slip_at_load":
                fmt = lambda v: _pct(v, 2)  # noqa: E731
                rate = None if slope is None else f"{100 * slope:+.3f} %/day"
            else:
                fmt = lambda v: f"{_num(v, 3)} /(N*m)"  # noqa: E731
                rate = None if slope is None else f"{slope:+.2g} /(N*m)/day"
            since = r[p + "since"] or r["segment_start"]
            text = f"{label} {fmt(x if x is not None else lvl)}"
            if r.get(f"{ind}__rising") and rate:
                text += f" rising {rate} since {since}"
                if trend_up and not elevated and ref is not None:
                    gap = lvl - ref if lvl is not None else None
                    text += f", {fmt(gap)} above this unit's reference {fmt(ref)}"
            if elevated and ref is not None and margin is not None:
                text += (f", above this unit's reference {fmt(ref)} by more than {fmt(margin)}"
                         f" since {c.since}")
            if dtl == 0:
                text += f"; at or above the limit {fmt(limit)}"
            elif dtl is not None:
                text += (f"; limit {fmt(limit)} in ~{dtl:.0f} d ({_days(_f(r[p + 'dtl_low']))}-"
                         f"{_days(_f(r[p + 'dtl_high']))} d)")
            msgs.append(f"{text} [trends, unit_days {since}..{day}]")
        if not msgs:
            msgs.append(f"slip raised since {c.since}, last on {c.last_hit}; clears after "
                        f"{int(self.clear_m)} clean days [trends, unit_days {c.since}..{day}]")
        return " | ".join(msgs)

    def _why_anomaly(self, r: dict, c: _Channel, day, _flat) -> str:
        s = _f(r.get("score"))
        if not r.get("_raw_anomaly"):
            return (f"unusual days for this unit since {c.since}, last on {c.last_hit}; clears "
                    f"after {int(self.clear_m)} clean days [scores, unit_days {c.since}..{day}]")
        return (f"unusual days for this unit since {c.since}: anomaly score {s:.2f} (watch from "
                f"{float(self.watch_score):.2f}), driven by {r.get('top_features') or 'n/a'} "
                f"[scores, unit_days {c.since}..{day}]")

    def _why_actuator(self, r: dict, c: _Channel, day, _flat) -> str:
        a, a_ref = _f(r.get("creep_a")), _f(r.get("creep_a__med"))
        if a is None:  # no usable fit today (no steady running): say when it was last seen
            return (f"load-independent slip offset (creep a) raised since {c.since}, last on "
                    f"{c.last_hit}, reference {_pct(a_ref, 2)}: ratio actuator or wheel "
                    f"position error; clears after {int(self.clear_m)} clean days "
                    f"[unit_days {c.since}..{day}]")
        return (f"load-independent slip offset (creep a) {_pct(a, 2)} against reference "
                f"{_pct(a_ref, 2)} while the compliance changed less: ratio actuator or wheel "
                f"position error [unit_days {c.since}..{day}]")

    def _why_gross_slip(self, r: dict, c: _Channel, day, _flat) -> str:
        nn = int(r.get("gross_slip_events") or 0)
        if nn:
            return (f"{nn} gross-slip event(s) on {day} (alert at "
                    f"{float(self.gross_slip_events_per_day):g}/day) [events, unit_days {day}]")
        return (f"gross slip last seen {c.last_hit}; clears after {int(self.clear_m)} clean days "
                f"[events, unit_days {c.since}..{day}]")

    def _why_stall(self, r: dict, c: _Channel, day, _flat) -> str:
        nn = int(r.get("stall_events") or 0)
        if nn:
            return (f"{nn} stall(s) on {day} (alert at {int(self.stall_repeat)}/day): motor "
                    f"stalls, e.g. starting in a steep ratio [events, unit_days {day}]")
        return (f"stall last seen {c.last_hit}; clears after {int(self.clear_m)} clean days "
                f"[events, unit_days {c.since}..{day}]")

    def _why_sensor(self, r: dict, c: _Channel, day, flat_signal) -> str:
        sig = f" ({flat_signal})" if flat_signal else ""
        return (f"sensor flatline{sig} last seen {c.last_hit}: readings stuck, slip figures "
                f"unreliable until the sensor is checked [events, unit_days {c.since}..{day}]")


def _flatline_signals(events) -> dict:
    """(unit_id, day) -> 'n_out, temp' from the events table (flatline rows)."""
    if events is None:
        return {}
    ev = as_frame(events, "events")
    if ev.height == 0 or not {"unit_id", "kind", "day"} <= set(ev.columns) \
            or "signal" not in ev.columns:
        return {}
    g = (ev.filter(pl.col("kind") == "flatline")
         .group_by(pl.col("unit_id").cast(pl.Utf8), pl.col("day").cast(pl.Date))
         .agg(pl.col("signal").drop_nulls().unique().sort().str.join(", ")))
    return {(u, d): s for u, d, s in g.iter_rows() if s}


# ---------------------------------------------------------------- saved rule state
_CHANNELS = (("slip", (), True), ("anomaly", (), True), ("actuator", (), True),
             ("gross_slip", (2,), True), ("stall", (2,), False), ("sensor", (1,), False))


def _initial_state(zfeats: list[str]) -> dict:
    return {"chans": {name: _Channel(name, immediate=imm, resets=res)
                      for name, imm, res in _CHANNELS},
            "run_jump": {f: 0.0 for f in zfeats}, "prev_adv": {f: [] for f in zfeats},
            "quiet_days": {f: 0 for f in zfeats}, "flat_hist": [], "prev_status": None,
            "run_since": None}


def _iso(d: dt.date | None) -> str | None:
    return None if d is None else d.isoformat()


def _date(s: str | None) -> dt.date | None:
    return None if s is None else dt.date.fromisoformat(s)


def _pack_state(chans: dict, run_jump: dict, prev_adv: dict, quiet_days: dict,
                flat_hist: list, prev_status: str | None, run_since: dt.date | None) -> dict:
    """One unit's rule state as JSON-ready values (floats round-trip exactly in JSON)."""
    return {"chans": {name: {"state": c.state, "hist": list(c.hist), "clean": c.clean,
                             "since": _iso(c.since), "causes": list(c.causes),
                             "last_hit": _iso(c.last_hit)} for name, c in chans.items()},
            "run_jump": dict(run_jump), "prev_adv": {f: list(v) for f, v in prev_adv.items()},
            "quiet_days": dict(quiet_days), "flat_hist": list(flat_hist),
            "prev_status": prev_status, "run_since": _iso(run_since)}


def _unpack_state(packed: dict | None, zfeats: list[str]) -> dict:
    st = _initial_state(zfeats)
    if packed is None:
        return st
    for name, c in st["chans"].items():
        p = packed["chans"][name]
        c.state, c.hist, c.clean = int(p["state"]), list(p["hist"]), int(p["clean"])
        c.since, c.last_hit = _date(p["since"]), _date(p["last_hit"])
        c.causes = tuple(p["causes"])
    for f in zfeats:
        st["run_jump"][f] = float(packed["run_jump"].get(f, 0.0))
        st["prev_adv"][f] = [float(v) for v in packed["prev_adv"].get(f, [])]
        st["quiet_days"][f] = int(packed["quiet_days"].get(f, 0))
    st["flat_hist"] = list(packed["flat_hist"])
    st["prev_status"] = packed["prev_status"]
    st["run_since"] = _date(packed["run_since"])
    return st
