"""Per-unit fits behind the derived tables, vectorised over groups (no per-row loops).

- Motor constants per unit and ISO week from the sufficient statistics of
  ``v_in = R*i_in + k_e*omega_in`` (``sql/motor_sums.sql``, per unit-day, summed per week;
  domain.md 1.4), with drift against the unit's reference weeks -> table ``motor_fits``;
  the load estimate of a week uses the latest usable fit of an earlier week
  (``motor_constants_for_load``).
- Creep versus load (slip = a + b*load, Theil-Sen, domain.md 3.6) per unit, ISO week and
  ratio bin -> table ``creep_fits``; the same per unit and day after removing each ratio
  bin's reference offset and compliance -> ``creep_a``, ``creep_b``, ``slip_at_load`` of
  ``unit_days``.
- The normal-behaviour model of input power per unit and maintenance segment
  (domain.md 3.5) -> coefficients the SQL model ``efficiency.sql`` applies.

Load in the creep fits is the *input-side* torque, so ``load_ref_nm`` (a motor shaft
torque) means the same on every unit: the motor-model load k_e*(i_in - i0) as it is, and
measured output torque divided by the commanded ratio (ideal torque transfer
T_out = T_in * i, domain.md 1.2; it neglects the torque loss eta_T, a few per cent).

Reference period of a unit (design.md 5, domain.md 3.5 "retrain the baseline after each
maintenance event that changes the contact"): the first ``reference_days`` after its first
sample, and again after each maintenance row with ``resets_wear``. Motor drift uses only the
first one (a roller change does not touch the motor).
"""
from __future__ import annotations

import datetime as dt
from typing import Any

import numpy as np
import polars as pl
from scipy.stats import norm


__all__ = ["theil_sen_grouped", "solve_motor_sums", "motor_fits_with_drift",
           "motor_week_sums", "motor_constants_for_load", "first_usable_week",
           "unit_segments", "assign_segments", "creep_windows",
           "creep_fits_weekly", "creep_reference_bins", "creep_daily", "power_models",
           "predict_power", "drop_flatlined", "ratio_bin", "MIN_MOTOR_SAMPLES",
           "MIN_CREEP_WINDOWS", "MIN_POWER_WINDOWS", "CREEP_MAX_POINTS", "FAR_FUTURE"]

#: Fewest steady samples behind a weekly motor fit (common practice, no source).
MIN_MOTOR_SAMPLES = 30
#: Fewest steady windows behind a creep fit (common practice, no source).
MIN_CREEP_WINDOWS = 6
#: Fewest steady reference windows behind a power model (common practice, no source).
MIN_POWER_WINDOWS = 20
#: Points per Theil-Sen group; larger groups are subsampled evenly in time (speed).
CREEP_MAX_POINTS = 200
#: Confidence level of the creep slope interval (scipy's default).
CREEP_CONFIDENCE = 0.95
#: Bounds on a ratio bin's compliance relative to the unit's (guards a poor bin fit).
_BIN_SCALE_MIN, _BIN_SCALE_MAX = 0.25, 4.0

FAR_FUTURE = dt.datetime(2200, 1, 1, tzinfo=dt.timezone.utc)
_FAR_PAST = dt.datetime(1970, 1, 1, tzinfo=dt.timezone.utc)
_PAIR_BUDGET = 4_000_000   # slopes held at once by theil_sen_grouped (x 8 bytes, x ~3)


# ---------------------------------------------------------------- Theil-Sen over groups
def _tie_term(sorted_vals: np.ndarray) -> float:
    _, counts = np.unique(sorted_vals[~np.isnan(sorted_vals)], return_counts=True)
    k = counts[counts > 1].astype(float)
    return float((k * (k - 1) * (2 * k + 5)).sum())


def _point_keys(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """A well-mixed 64-bit key per (x, y) point (splitmix64 of the float bits)."""
    with np.errstate(over="ignore"):
        z = x.astype(np.float64).view(np.uint64) ^ (
            y.astype(np.float64).view(np.uint64) * np.uint64(0x9E3779B97F4A7C15))
        z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
        z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
        return z ^ (z >> np.uint64(31))


def theil_sen_grouped(groups: Any, x: Any, y: Any, alpha: float = CREEP_CONFIDENCE,
                      max_points: int | None = CREEP_MAX_POINTS) -> pl.DataFrame:
    """Theil-Sen line y = intercept + slope*x for every group at once.

    Same numbers as ``scipy.stats.theilslopes(y, x, alpha, method='separate')`` run on each
    group (slope = median of pairwise slopes over pairs with distinct x, intercept =
    median(y) - slope*median(x), slope confidence bounds from Sen 1968 eq. 2.6 as scipy
    computes them), but vectorised over padded batches of groups.

    ``groups``: integer group code per point; rows with NaN x or y are dropped. Groups with
    more than ``max_points`` points are thinned to a pseudo-random subset of ``max_points``
    keyed on the points' values (the same group always gives the same subset). Returns one
    row per group present: ``group, n, slope, intercept, low_slope, high_slope`` (NaN slope
    when every x is equal).
    """
    g = np.asarray(groups, dtype=np.int64)
    xv = np.asarray(x, dtype=np.float64)
    yv = np.asarray(y, dtype=np.float64)
    ok = np.isfinite(xv) & np.isfinite(yv)
    g, xv, yv = g[ok], xv[ok], yv[ok]
    empty = pl.DataFrame(schema={"group": pl.Int64, "n": pl.Int64, "slope": pl.Float64,
                                 "intercept": pl.Float64, "low_slope": pl.Float64,
                                 "high_slope": pl.Float64})
    if g.size == 0:
        return empty
    order = np.argsort(g, kind="stable")
    g, xv, yv = g[order], xv[order], yv[order]
    uniq, starts, counts = np.unique(g, return_index=True, return_counts=True)
    if max_points and counts.max() > max_points:
        # a pseudo-random subset per group keyed on each point's own values, so the same
        # group gives the same subset in every call (an even stride could alias with a
        # periodic duty cycle)
        u = _point_keys(xv, yv)
        order = np.lexsort((u, g))
        rank = np.empty(g.size, dtype=np.int64)
        rank[order] = np.arange(g.size) - np.repeat(starts, counts)
        keep = rank < max_points
        g, xv, yv = g[keep], xv[keep], yv[keep]
        uniq, starts, counts = np.unique(g, return_index=True, return_counts=True)
    if not (0.0 < alpha < 1.0):
        raise ValueError("alpha must lie between 0 and 1")
    a = 1.0 - alpha if alpha > 0.5 else alpha
    z = norm.ppf(a / 2.0)

    n_g = uniq.size
    slope = np.full(n_g, np.nan)
    inter = np.full(n_g, np.nan)
    lo = np.full(n_g, np.nan)
    hi = np.full(n_g, np.nan)
    by_size = np.argsort(counts, kind="stable")
    sizes = counts[by_size]
    i = 0
    while i < n_g:
        # a batch holds groups of one size (no padding), as many as the budget allows
        m = int(sizes[i])
        j_end = int(np.searchsorted(sizes, m, side="right"))
        pairs = max(1, m * (m - 1) // 2)
        step = max(1, _PAIR_BUDGET // pairs)
        batch = by_size[i:min(j_end, i + step)]
        i += batch.size
        if m < 2:
            continue
        gb = batch.size
        idx = starts[batch][:, None] + np.arange(m)[None, :]
        X, Y = xv[idx], yv[idx]
        # all pairwise slopes, filled by lag k = j - i in contiguous slices
        s = np.empty((gb, pairs))
        off = 0
        with np.errstate(divide="ignore", invalid="ignore"):
            for k in range(1, m):
                w = m - k
                dx = X[:, k:] - X[:, :w]
                blk = (Y[:, k:] - Y[:, :w]) / dx
                blk[dx == 0] = np.nan
                s[:, off:off + w] = blk
                off += w
        nt = np.isfinite(s).sum(axis=1)
        rows = np.arange(gb)
        xs = np.sort(X, axis=1)
        ys = np.sort(Y, axis=1)
        ties = np.zeros(gb)
        tie_rows = np.flatnonzero(((xs[:, 1:] == xs[:, :-1]).any(axis=1))
                                  | ((ys[:, 1:] == ys[:, :-1]).any(axis=1)))
        for r in tie_rows:                   # rare with measured data
            ties[r] = _tie_term(xs[r]) + _tie_term(ys[r])
        n = float(m)
        sigsq = (n * (n - 1) * (2 * n + 5) - ties) / 18.0
        with np.errstate(invalid="ignore"):
            sigma = np.sqrt(sigsq)           # NaN when ties make it negative (as scipy)
        has = nt > 0
        lo_i = np.clip((nt - 1) // 2, 0, None)
        hi_i = np.clip(nt // 2, 0, None)
        ok_sig = np.isfinite(sigma)
        sig = np.where(ok_sig, sigma, 0.0)
        ru = np.minimum(np.round((nt - z * sig) / 2.0).astype(np.int64), nt - 1)
        rl = np.maximum(np.round((nt + z * sig) / 2.0).astype(np.int64) - 1, 0)
        s.sort(axis=1)                       # NaN last (faster than np.partition here)
        med = np.where(has, 0.5 * (s[rows, lo_i] + s[rows, hi_i]), np.nan)
        # scipy indexes the sorted finite slopes: a negative upper index wraps around, an
        # index past the end (or a NaN sigma) gives no interval
        ru = np.where(ru < 0, ru + nt, ru)
        ok_ci = has & ok_sig & (ru >= 0) & (rl < nt)
        lo_v = np.where(ok_ci, s[rows, np.clip(rl, 0, s.shape[1] - 1)], np.nan)
        hi_v = np.where(ok_ci, s[rows, np.clip(ru, 0, s.shape[1] - 1)], np.nan)
        slope[batch] = med
        inter[batch] = np.where(has, np.median(Y, axis=1) - med * np.median(X, axis=1), np.nan)
        lo[batch] = lo_v
        hi[batch] = hi_v
    return pl.DataFrame({"group": uniq, "n": counts.astype(np.int64), "slope": slope,
                         "intercept": inter, "low_slope": lo, "high_slope": hi})


# ---------------------------------------------------------------- motor constants
def solve_motor_sums(sums: pl.DataFrame) -> pl.DataFrame:
    """R, k_e and residual spread per row of ``motor_sums`` (normal equations, vectorised).

    Solves [[s_ii, s_iw], [s_iw, s_ww]] [R, k_e] = [s_vi, s_vw]; resid_std_v =
    sqrt(SSR/(n-2)). NaN where n < 3 or the two columns are collinear (one operating point:
    the same rank test as ``physics.fit_motor_constants``). Adds r_ohm, k_e, resid_std_v.
    """
    if sums.height == 0:
        return sums.with_columns(r_ohm=pl.lit(None, pl.Float64), k_e=pl.lit(None, pl.Float64),
                                 resid_std_v=pl.lit(None, pl.Float64))
    n = sums["n"].to_numpy().astype(float)
    sii, siw, sww = (sums[c].to_numpy().astype(float) for c in ("s_ii", "s_iw", "s_ww"))
    svi, svw, svv = (sums[c].to_numpy().astype(float) for c in ("s_vi", "s_vw", "s_vv"))
    with np.errstate(divide="ignore", invalid="ignore"):
        det = sii * sww - siw * siw
        r = (svi * sww - svw * siw) / det
        k = (svw * sii - svi * siw) / det
        c = np.abs(siw) / np.sqrt(sii * sww)          # correlation of the scaled columns
        cond_ok = (sii > 0) & (sww > 0) & ((1 - c) > 1e-9 * (1 + c))
        ssr = svv - 2 * r * svi - 2 * k * svw + r * r * sii + 2 * r * k * siw + k * k * sww
        resid = np.sqrt(np.clip(ssr, 0, None) / (n - 2))
    good = (n >= 3) & cond_ok & np.isfinite(r) & np.isfinite(k)
    nan = np.nan
    return sums.with_columns(
        r_ohm=pl.Series(np.where(good, r, nan)),
        k_e=pl.Series(np.where(good, k, nan)),
        resid_std_v=pl.Series(np.where(good, resid, nan)),
    ).with_columns(pl.col("r_ohm", "k_e", "resid_std_v").fill_nan(None))


def motor_fits_with_drift(fits: pl.DataFrame, first_ts: pl.DataFrame,
                          reference_days: int) -> pl.DataFrame:
    """Table ``motor_fits``: weekly fits plus drift in % against the reference weeks.

    ``fits``: unit_id, week_start (date), n, r_ohm, k_e, resid_std_v (all weeks of every unit
    to report). ``first_ts``: unit_id, first_ts (first sample). Reference weeks are the
    weeks that overlap [first_ts, first_ts + reference_days) and hold a fit with at least
    MIN_MOTOR_SAMPLES samples; the reference value is their median. Weeks with fewer
    samples keep their numbers but no drift.
    """
    cols = ["unit_id", "week_start", "r_ohm", "k_e", "resid_std_v", "n", "r_drift_pct",
            "k_e_drift_pct"]
    if fits.height == 0:
        return pl.DataFrame(schema={"unit_id": pl.String, "week_start": pl.Date,
                                    "r_ohm": pl.Float64, "k_e": pl.Float64,
                                    "resid_std_v": pl.Float64, "n": pl.Int64,
                                    "r_drift_pct": pl.Float64, "k_e_drift_pct": pl.Float64})
    f = fits.join(first_ts, on="unit_id", how="left").with_columns(
        ref_end=(pl.col("first_ts") + pl.duration(days=reference_days)).dt.date())
    usable = pl.col("n") >= MIN_MOTOR_SAMPLES
    ref = (f.filter(usable & (pl.col("week_start") < pl.col("ref_end"))
                    & pl.col("r_ohm").is_not_null())
           .group_by("unit_id").agg(r_ref=pl.col("r_ohm").median(),
                                    k_ref=pl.col("k_e").median()))
    out = f.join(ref, on="unit_id", how="left").with_columns(
        r_drift_pct=pl.when(usable).then(100.0 * (pl.col("r_ohm") / pl.col("r_ref") - 1.0)),
        k_e_drift_pct=pl.when(usable).then(100.0 * (pl.col("k_e") / pl.col("k_ref") - 1.0)),
    )
    return out.select(cols).with_columns(pl.col("n").cast(pl.Int64)).sort("unit_id",
                                                                          "week_start")


def motor_week_sums(day_sums: pl.DataFrame) -> pl.DataFrame:
    """Sum the per unit-day rows of ``motor_sums.sql`` into one row per unit and ISO week.

    The least-squares sums are additive, so the weekly fit over the sum of a week's day rows
    equals the fit over all its steady samples. Rows are added in (unit_id, week_start, day)
    order, so the same day rows give the same weekly sums bit for bit whichever run (full or
    incremental) brings them together.
    """
    cols = ["n", "n_temp", "s_ii", "s_iw", "s_ww", "s_vi", "s_vw", "s_vv"]
    if day_sums.height == 0:
        return pl.DataFrame(schema={"unit_id": pl.String, "week_start": pl.Date,
                                    **{c: (pl.Int64 if c.startswith("n") else pl.Float64)
                                       for c in cols}})
    return (day_sums.sort("unit_id", "week_start", "day")
            .group_by("unit_id", "week_start", maintain_order=True)
            .agg([pl.col(c).sum() for c in cols])
            .with_columns(pl.col("n", "n_temp").cast(pl.Int64)))


def motor_constants_for_load(fits: pl.DataFrame, earlier: pl.DataFrame | None,
                             i0_a: float) -> pl.DataFrame:
    """The ``motor_constants`` view the SQL models join: unit_id, week_start, r_ohm, k_e, i0_a.

    The load estimate of a week uses motor constants that do not change when more data of
    that week arrives: the unit's latest usable fit (at least MIN_MOTOR_SAMPLES steady
    samples and a solution) of an EARLIER week, taken from ``earlier`` (unit_id,
    week_start, n, r_ohm, k_e: fits of the weeks before ``fits``, e.g. from the lake) and
    from the earlier weeks of ``fits`` itself. A unit without one (its first weeks) takes
    the week's own fit when usable, else no constants (no motor-model load that week).
    k_e drifts by a few per cent over months at most (domain.md 1.4), so last week's value
    estimates this week's torque as well as this week's own fit does.
    """
    usable = (pl.col("n") >= MIN_MOTOR_SAMPLES) & pl.col("k_e").is_not_null()
    cols = ["unit_id", "week_start", "r_ohm", "k_e"]
    pools = [fits.filter(usable).select(cols)]
    if earlier is not None and earlier.height:
        pools.insert(0, earlier.filter(usable).select(cols).cast(pools[0].schema))
    pool = (pl.concat(pools).unique(["unit_id", "week_start"], keep="last")
            .sort("week_start")
            .rename({"week_start": "_ws", "r_ohm": "_r_prev", "k_e": "_k_prev"}))
    target = fits.select("unit_id", "week_start", "n", "r_ohm", "k_e").sort("week_start")
    j = target.join_asof(pool, left_on="week_start", right_on="_ws", by="unit_id",
                         strategy="backward", allow_exact_matches=False,
                         check_sortedness=False)
    prev = pl.col("_k_prev").is_not_null()
    return j.select(
        "unit_id", "week_start",
        r_ohm=pl.when(prev).then(pl.col("_r_prev")).when(usable).then(pl.col("r_ohm")),
        k_e=pl.when(prev).then(pl.col("_k_prev")).when(usable).then(pl.col("k_e")),
        i0_a=pl.lit(float(i0_a)),
    ).sort("unit_id", "week_start")


def first_usable_week(fits: pl.DataFrame) -> dict[str, dt.date]:
    """Per unit, the first week with a usable motor fit (``motor_constants_for_load``)."""
    if fits.height == 0:
        return {}
    u = (fits.filter((pl.col("n") >= MIN_MOTOR_SAMPLES) & pl.col("k_e").is_not_null())
         .group_by("unit_id").agg(pl.col("week_start").min()))
    return dict(zip(u["unit_id"].to_list(), u["week_start"].to_list()))


# ---------------------------------------------------------------- segments and references
def unit_segments(first_ts: pl.DataFrame, maintenance: pl.DataFrame | None,
                  reference_days: int) -> pl.DataFrame:
    """Maintenance segments per unit with their reference periods.

    ``first_ts``: unit_id, first_ts. ``maintenance``: unit_id, ts, resets_wear (may be None).
    Returns unit_id, seg_start (first segment: 1970-01-01, so every window of the unit falls
    in a segment), seg_end (next reset or FAR_FUTURE), ref_start (first sample or the reset),
    ref_end (= ref_start + reference_days).
    """
    starts = first_ts.select("unit_id", ref_start=pl.col("first_ts"),
                             seg_start=pl.lit(_FAR_PAST, pl.Datetime("us", "UTC")))
    if maintenance is not None and maintenance.height:
        resets = (maintenance.filter(pl.col("resets_wear"))
                  .join(first_ts, on="unit_id", how="inner")
                  .filter(pl.col("ts") > pl.col("first_ts"))
                  .select("unit_id", ref_start=pl.col("ts").dt.cast_time_unit("us"),
                          seg_start=pl.col("ts").dt.cast_time_unit("us")))
        starts = pl.concat([starts.with_columns(pl.col("ref_start").dt.cast_time_unit("us")),
                            resets])
    starts = starts.with_columns(pl.col("ref_start").dt.cast_time_unit("us"))
    return (starts.sort("unit_id", "seg_start")
            .with_columns(seg_end=pl.col("seg_start").shift(-1).over("unit_id")
                          .fill_null(pl.lit(FAR_FUTURE, pl.Datetime("us", "UTC"))),
                          ref_end=pl.col("ref_start") + pl.duration(days=reference_days))
            .select("unit_id", "seg_start", "seg_end", "ref_start", "ref_end"))


def assign_segments(df: pl.DataFrame, segments: pl.DataFrame, ts_col: str) -> pl.DataFrame:
    """Add seg_start, ref_start, ref_end and in_reference to each row of ``df`` by time."""
    d = df.with_columns(pl.col(ts_col).dt.cast_time_unit("us").alias("_t")).sort("_t")
    s = segments.sort("seg_start")
    out = d.join_asof(s.select("unit_id", "seg_start", "ref_start", "ref_end"),
                      left_on="_t", right_on="seg_start", by="unit_id", strategy="backward",
                      check_sortedness=False)
    return out.with_columns(
        in_reference=(pl.col("_t") >= pl.col("ref_start")) & (pl.col("_t") < pl.col("ref_end"))
    ).drop("_t")


def ratio_bin(ratio: pl.Expr, width: float) -> pl.Expr:
    """Lower edge of the ratio bin of ``ratio`` (bins of ``width``, rounded to 1e-6)."""
    return ((ratio / width + 1e-9).floor() * width).round(6)


def creep_windows(windows: pl.DataFrame, settings: Any) -> pl.DataFrame:
    """Steady windows usable for creep: input-side load, ratio bin, no gross slip.

    Input columns: unit_id, window_start, day, steady_samples, slip_mean, load_mean,
    load_source, ratio_cmd_mean. Adds load_in (N*m, input side) and ratio_bin; keeps windows
    with >= 2 steady samples and slip below gross_slip_limit (the creep line describes the
    micro-slip part of the traction curve, domain.md 2.1).
    """
    return (windows
            .filter((pl.col("steady_samples") >= 2) & pl.col("slip_mean").is_not_null()
                    & pl.col("load_mean").is_not_null() & (pl.col("ratio_cmd_mean") > 0)
                    & (pl.col("slip_mean") < settings["gross_slip_limit"]))
            .with_columns(
                load_in=pl.when(pl.col("load_source") == "measured")
                .then(pl.col("load_mean") / pl.col("ratio_cmd_mean"))
                .otherwise(pl.col("load_mean")),
                ratio_bin=ratio_bin(pl.col("ratio_cmd_mean"), settings["ratio_bin_width"]))
            .sort("unit_id", "window_start"))


def drop_flatlined(cw: pl.DataFrame, flat: pl.DataFrame, window_min: float) -> pl.DataFrame:
    """``cw`` without the windows that overlap a flatline of n_in or n_out.

    ``flat``: events rows (unit_id, start_ts, end_ts, signal) of kind flatline. Slip computed
    from a stuck speed sensor is no slip, so such windows must not enter the creep fits.
    """
    flat = flat.filter(pl.col("signal").is_in(["n_in", "n_out"]))
    if flat.height == 0 or cw.height == 0:
        return cw
    width = pl.duration(seconds=int(round(window_min * 60)))
    d = cw.with_row_index("_row").with_columns(
        _t0=pl.col("window_start").dt.cast_time_unit("us"))
    d = d.with_columns(_t1=pl.col("_t0") + width).sort("_t1")
    hit = pl.Series("_row", [], dtype=pl.UInt32)
    for sig in ("n_in", "n_out"):
        f = (flat.filter(pl.col("signal") == sig)
             .select("unit_id", _fs=pl.col("start_ts").dt.convert_time_zone("UTC")
                     .dt.cast_time_unit("us"),
                     _fe=pl.col("end_ts").dt.convert_time_zone("UTC").dt.cast_time_unit("us"))
             .sort("_fs"))
        if f.height == 0:
            continue
        j = d.join_asof(f, left_on="_t1", right_on="_fs", by="unit_id", strategy="backward",
                        check_sortedness=False)
        hit = pl.concat([hit, j.filter((pl.col("_fs") < pl.col("_t1"))
                                       & (pl.col("_fe") >= pl.col("_t0")))["_row"]])
    return (d.filter(~pl.col("_row").is_in(hit.implode()))
            .sort("_row").drop("_row", "_t0", "_t1"))


def _fit_groups(df: pl.DataFrame, keys: list[str], x: str, y: str,
                min_n: int = MIN_CREEP_WINDOWS) -> pl.DataFrame:
    """Theil-Sen y = intercept + slope*x per key group of ``df`` (rows in time order)."""
    if df.height == 0:
        return pl.DataFrame()
    codes = df.select(keys).unique(maintain_order=True).with_row_index("_g")
    keyed = (df.with_row_index("_row").join(codes, on=keys, how="left", nulls_equal=True)
             .sort("_row"))
    res = theil_sen_grouped(keyed["_g"].to_numpy(), keyed[x].to_numpy(), keyed[y].to_numpy())
    return (res.with_columns(pl.col("group").cast(pl.UInt32))
            .join(codes, left_on="group", right_on="_g")
            .filter((pl.col("n") >= min_n) & pl.col("slope").is_not_null()
                    & pl.col("slope").is_not_nan())
            .drop("group"))


def creep_fits_weekly(cw: pl.DataFrame, segments: pl.DataFrame) -> pl.DataFrame:
    """Table ``creep_fits``: slip = a + b*load per unit, ISO week and ratio bin.

    ``cw`` from ``creep_windows``. A week that holds a wear reset uses only the windows after
    it (the new contact). is_reference: the week overlaps its segment's reference period.
    """
    schema = {"unit_id": pl.String, "week_start": pl.Date, "ratio_bin": pl.Float64,
              "a": pl.Float64, "b": pl.Float64, "b_low": pl.Float64, "b_high": pl.Float64,
              "n": pl.Int64, "is_reference": pl.Boolean}
    if cw.height == 0:
        return pl.DataFrame(schema=schema)
    w = assign_segments(cw, segments, "window_start").with_columns(
        week_start=pl.col("day").dt.truncate("1w"))
    w = w.filter(pl.col("seg_start") == pl.col("seg_start").max().over("unit_id", "week_start"))
    fit = _fit_groups(w.sort("unit_id", "window_start"),
                      ["unit_id", "week_start", "ratio_bin"], "load_in", "slip_mean")
    if fit.height == 0:
        return pl.DataFrame(schema=schema)
    seg = (w.group_by("unit_id", "week_start")
           .agg(pl.col("ref_start").first(), pl.col("ref_end").first()))
    out = fit.join(seg, on=["unit_id", "week_start"], how="left").with_columns(
        is_reference=(pl.col("week_start").cast(pl.Datetime("us", "UTC"))
                      < pl.col("ref_end"))
        & ((pl.col("week_start").cast(pl.Datetime("us", "UTC")) + pl.duration(days=7))
           > pl.col("ref_start")))
    return out.select(
        "unit_id", "week_start", "ratio_bin", a=pl.col("intercept"), b=pl.col("slope"),
        b_low=pl.col("low_slope"), b_high=pl.col("high_slope"), n=pl.col("n"),
        is_reference=pl.col("is_reference").fill_null(False),
    ).cast(schema).sort("unit_id", "week_start", "ratio_bin")


def creep_reference_bins(ref_cw: pl.DataFrame, segments: pl.DataFrame) -> pl.DataFrame:
    """Per unit, segment and ratio bin: the reference creep line and its normalisation.

    ``ref_cw``: creep windows (``creep_windows``) of any time; only those inside a segment's
    reference period are used. Returns unit_id, seg_start, ratio_bin, a_bin, b_bin, n,
    offset (a_bin - a_unit) and scale (b_bin / b_unit, clipped to [0.25, 4]), where a_unit and
    b_unit are the window-weighted means over the segment's bins (weights = the unit's time
    at each ratio, as the wear limit is defined over ratio usage).
    """
    schema = {"unit_id": pl.String, "seg_start": pl.Datetime("us", "UTC"),
              "ratio_bin": pl.Float64, "a_bin": pl.Float64, "b_bin": pl.Float64,
              "n": pl.Int64, "offset": pl.Float64, "scale": pl.Float64}
    if ref_cw.height == 0:
        return pl.DataFrame(schema=schema)
    w = assign_segments(ref_cw, segments, "window_start").filter(pl.col("in_reference"))
    fit = _fit_groups(w.sort("unit_id", "window_start"), ["unit_id", "seg_start", "ratio_bin"],
                      "load_in", "slip_mean")
    if fit.height == 0:
        return pl.DataFrame(schema=schema)
    fit = fit.with_columns(wt=pl.col("n").cast(pl.Float64))
    unit = fit.group_by("unit_id", "seg_start").agg(
        a_unit=(pl.col("intercept") * pl.col("wt")).sum() / pl.col("wt").sum(),
        b_unit=(pl.col("slope") * pl.col("wt")).sum() / pl.col("wt").sum())
    out = fit.join(unit, on=["unit_id", "seg_start"]).with_columns(
        offset=pl.col("intercept") - pl.col("a_unit"),
        scale=pl.when((pl.col("slope") > 0) & (pl.col("b_unit") > 0))
        .then((pl.col("slope") / pl.col("b_unit")).clip(_BIN_SCALE_MIN, _BIN_SCALE_MAX))
        .otherwise(1.0))
    return out.select("unit_id", "seg_start", "ratio_bin", a_bin=pl.col("intercept"),
                      b_bin=pl.col("slope"), n="n", offset="offset", scale="scale"
                      ).cast(schema)


def creep_daily(cw: pl.DataFrame, segments: pl.DataFrame, ref_bins: pl.DataFrame,
                load_ref_nm: float) -> pl.DataFrame:
    """Daily creep features of ``unit_days``: creep_a, creep_b, slip_at_load.

    Each steady window is first put on the unit's reference geometry: its slip loses its
    ratio bin's reference offset and its load is scaled by the bin's relative compliance
    (``creep_reference_bins``; bins without a reference fit keep offset 0 and scale 1), so
    the spin-driven ratio dependence (domain.md 2.4) does not masquerade as a change. Then
    one Theil-Sen line per unit and day: slip_norm = creep_a + creep_b*load_eff, and
    slip_at_load = creep_a + creep_b*load_ref_nm.
    """
    schema = {"unit_id": pl.String, "day": pl.Date, "creep_a": pl.Float64,
              "creep_b": pl.Float64, "slip_at_load": pl.Float64}
    if cw.height == 0:
        return pl.DataFrame(schema=schema)
    w = assign_segments(cw, segments, "window_start")
    if ref_bins.height:
        w = w.join(ref_bins.select("unit_id", "seg_start", "ratio_bin", "offset", "scale"),
                   on=["unit_id", "seg_start", "ratio_bin"], how="left")
    else:
        w = w.with_columns(offset=pl.lit(None, pl.Float64), scale=pl.lit(None, pl.Float64))
    w = w.with_columns(
        slip_norm=pl.col("slip_mean") - pl.col("offset").fill_null(0.0),
        load_eff=pl.col("load_in") * pl.col("scale").fill_null(1.0))
    fit = _fit_groups(w.sort("unit_id", "window_start"), ["unit_id", "day"], "load_eff",
                      "slip_norm")
    if fit.height == 0:
        return pl.DataFrame(schema=schema)
    return fit.select(
        "unit_id", "day", creep_a=pl.col("intercept"), creep_b=pl.col("slope"),
        slip_at_load=pl.col("intercept") + pl.col("slope") * float(load_ref_nm),
    ).cast(schema).sort("unit_id", "day")


# ---------------------------------------------------------------- input-power model
_POWER_FEATURES = ("p_kin", "l2", "w_kin", "load_in")


def _power_design(df: pl.DataFrame) -> pl.DataFrame:
    """Feature columns of the power model (same formulas as sql/efficiency.sql)."""
    return df.with_columns(
        load_in=pl.when(pl.col("load_source") == "measured")
        .then(pl.col("load_mean") / pl.col("ratio_cmd_mean")).otherwise(pl.col("load_mean")),
        w_kin=pl.col("n_out_mean") * pl.col("ratio_cmd_mean") * np.pi / 30.0,
    ).with_columns(p_kin=pl.col("load_in") * pl.col("w_kin"),
                   l2=pl.col("load_in") * pl.col("load_in"))


def power_models(ref_windows: pl.DataFrame, segments: pl.DataFrame) -> pl.DataFrame:
    """Coefficients of p_in = c0 + c1*P_kin + c2*L^2 + c3*w_kin + c4*L per unit and segment.

    ``ref_windows``: windows (any time; only steady ones in a reference period are used)
    with unit_id, window_start, steady_samples, p_in_mean, load_mean, load_source,
    ratio_cmd_mean, n_out_mean. Least squares on standardised columns (minimum-norm
    solution when columns are collinear, e.g. a unit that always runs at one load).
    Returns unit_id, valid_from, valid_to (the segment), c0..c4, n, resid_std_w.
    """
    schema = {"unit_id": pl.String, "valid_from": pl.Datetime("us", "UTC"),
              "valid_to": pl.Datetime("us", "UTC"), "c0": pl.Float64, "c1": pl.Float64,
              "c2": pl.Float64, "c3": pl.Float64, "c4": pl.Float64, "n": pl.Int64,
              "resid_std_w": pl.Float64}
    if ref_windows.height == 0:
        return pl.DataFrame(schema=schema)
    d = _power_design(ref_windows.filter((pl.col("steady_samples") >= 2)
                                         & pl.col("p_in_mean").is_not_null()))
    d = assign_segments(d, segments, "window_start").filter(pl.col("in_reference"))
    d = d.drop_nulls(["p_in_mean", *_POWER_FEATURES]).filter(
        pl.all_horizontal([pl.col(c).is_finite() for c in ("p_in_mean", *_POWER_FEATURES)]))
    if d.height == 0:
        return pl.DataFrame(schema=schema)
    d = d.sort("unit_id", "seg_start", "window_start").with_columns(
        _g=pl.struct("unit_id", "seg_start").rank("dense").cast(pl.Int64) - 1)
    seg_end = segments.select("unit_id", "seg_start", "seg_end")
    g = d["_g"].to_numpy()
    X = np.column_stack([d[c].to_numpy() for c in _POWER_FEATURES])
    y = d["p_in_mean"].to_numpy()
    bounds = np.flatnonzero(np.diff(g)) + 1
    starts = np.r_[0, bounds]
    ends = np.r_[bounds, g.size]
    rows = []
    # one small least-squares solve per unit segment (a few hundred per fleet)
    for a, b in zip(starts, ends):
        n = b - a
        if n < MIN_POWER_WINDOWS:
            continue
        Xs, ys = X[a:b], y[a:b]
        mu, sd = Xs.mean(axis=0), Xs.std(axis=0)
        sd = np.where(sd > 0, sd, 1.0)
        Z = np.column_stack([np.ones(n), (Xs - mu) / sd])
        coef, *_ = np.linalg.lstsq(Z, ys, rcond=1e-8)
        beta = coef[1:] / sd
        c0 = coef[0] - float((beta * mu).sum())
        resid = ys - (c0 + Xs @ beta)
        rows.append((d["unit_id"][int(a)], d["seg_start"][int(a)], c0, *beta.tolist(), n,
                     float(resid.std(ddof=min(5, n - 1)))))
    if not rows:
        return pl.DataFrame(schema=schema)
    out = pl.DataFrame(rows, schema=["unit_id", "seg_start", "c0", "c1", "c2", "c3", "c4",
                                     "n", "resid_std_w"], orient="row")
    out = out.with_columns(pl.col("seg_start").dt.cast_time_unit("us")).join(
        seg_end, on=["unit_id", "seg_start"], how="left")
    return out.select("unit_id", valid_from=pl.col("seg_start"), valid_to=pl.col("seg_end"),
                      c0="c0", c1="c1", c2="c2", c3="c3", c4="c4", n="n",
                      resid_std_w="resid_std_w").cast(schema)


def predict_power(windows: pl.DataFrame, models: pl.DataFrame) -> np.ndarray:
    """p_in_pred (W) for ``windows`` with ``models`` (the Python twin of efficiency.sql)."""
    d = _power_design(windows).with_columns(_t=pl.col("window_start").dt.cast_time_unit("us"))
    m = models.sort("valid_from")
    j = d.sort("_t").join_asof(m, left_on="_t", right_on="valid_from", by="unit_id",
                               check_sortedness=False)
    j = j.with_columns(pl.when(pl.col("_t") < pl.col("valid_to")).then(
        pl.col("c0") + pl.col("c1") * pl.col("p_kin") + pl.col("c2") * pl.col("l2")
        + pl.col("c3") * pl.col("w_kin") + pl.col("c4") * pl.col("load_in")).alias("p_pred"))
    return j["p_pred"].to_numpy()
