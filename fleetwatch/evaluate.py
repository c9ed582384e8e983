"""Score the health statuses against a simulator answer key (``fleetwatch evaluate``).

Definitions (domain.md 4; common practice, no source). A unit is *flagged* on a day whose
status is watch or alert; statuses are already persistence-filtered by the health rules, so
the first flagged day is the first day of a persistent watch/alert.

* detected: flagged on some day from ``fault_start`` until the replacement (if any) or the
  end of the data; ``time_to_detect_days`` = first such day - fault_start;
* ``lead_time_days`` = limit_crossing_day - that first flagged day (wear units whose
  crossing lies in the data and not after a replacement); ``alert_lead_time_days`` the same
  for the first alert;
* false flags: runs of watch/alert that start on a healthy unit, or on a faulty unit before
  its fault starts; the rate is per 100 unit-months (unit-month = 365.2425/12 = 30.436875
  days, the mean Gregorian month; day counts from Python ``datetime.date`` subtraction).
  ``false_alerts_*`` count only runs that reach alert;
* replaced units: days from the replacement to the first normal day on or after it, and
  whether the unit then stays normal for the next 7 days of data;
* cause_ok: the expected cause (wear, contamination, actuator, stall, sensor) appears in
  ``causes`` on some flagged day of the first week after detection (reported, no target).

Targets (README; measured on 3 seeds of the default fleet): >= 90 % of progressive-wear units
flagged >= 14 days before the limit crossing; contamination, actuator and sensor faults
flagged within 2 days of their start; <= 1 false flag per 100 unit-months on healthy units;
replaced units back to normal within 3 days.
"""
from __future__ import annotations

import datetime as dt
import io
import json
from pathlib import Path
from typing import Any, Mapping

import polars as pl

from .errors import InputError

__all__ = ["evaluate_detection", "format_evaluation", "load_answer_key", "TARGETS",
           "EXPECTED_CAUSE", "UNIT_MONTH_DAYS"]

UNIT_MONTH_DAYS = 365.2425 / 12.0
WEAR_CONDITIONS = ("wear", "wear_replaced")
FAST_CONDITIONS = ("contamination", "actuator", "sensor_flatline")
EXPECTED_CAUSE = {"wear": "wear", "wear_replaced": "wear", "contamination": "contamination",
                  "actuator": "actuator", "stall": "stall", "sensor_flatline": "sensor"}
TARGETS = {
    "wear_lead_fraction": (">=", 0.90, "share of progressive-wear units flagged >= 14 d "
                                       "before the limit crossing"),
    "fast_detect_fraction": (">=", 1.0, "share of contamination/actuator/sensor faults "
                                        "flagged within 2 d of start"),
    "false_flags_per_100_unit_months": ("<=", 1.0, "watch/alert runs on healthy units per "
                                                   "100 unit-months"),
    "replaced_normal_fraction": (">=", 1.0, "share of replaced units back to normal within "
                                            "3 d"),
}
WEAR_LEAD_DAYS = 14
FAST_DETECT_DAYS = 2
REPLACED_NORMAL_DAYS = 3


def load_answer_key(truth: str | Path | Mapping) -> dict:
    """The answer key as a dict (from a path to answer_key.json or a dict)."""
    if isinstance(truth, Mapping):
        return dict(truth)
    path = Path(truth)
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise InputError(f"answer key {path} not found",
                         hint="Pass the answer_key.json written by `fleetwatch simulate`.") \
            from None
    except json.JSONDecodeError as exc:
        raise InputError(f"{path}: not valid JSON (line {exc.lineno}, column {exc.colno})",
                         hint="Pass the answer_key.json written by `fleetwatch simulate`.") \
            from None


def _date(v: Any) -> dt.date | None:
    if v is None or v == "":
        return None
    if isinstance(v, dt.datetime):
        return v.date()
    if isinstance(v, dt.date):
        return v
    return dt.date.fromisoformat(str(v)[:10])


def _runs(days: list[dt.date], flagged: list[bool], levels: list[str]) -> list[dict]:
    """Contiguous runs of flagged days: start, end, whether they reached alert."""
    runs, cur = [], None
    for d, f, lv in zip(days, flagged, levels):
        if f:
            if cur is None:
                cur = {"start": d, "end": d, "alert": lv == "alert"}
                runs.append(cur)
            else:
                cur["end"] = d
                cur["alert"] = cur["alert"] or lv == "alert"
        else:
            cur = None
    return runs


def _health(source: Any) -> pl.DataFrame:
    from .status import _health_frame
    return _health_frame(source)


def evaluate_detection(source: Any, truth: str | Path | Mapping) -> dict:
    """Per-unit detection results, fleet summary and targets (see module docstring).

    ``source``: Settings, a Lake, or the health table. ``truth``: answer_key.json (path or
    dict). Raises InputError on an unreadable key, LakeError without a health table.
    """
    key = load_answer_key(truth)
    units_truth = key.get("units", key)
    if not isinstance(units_truth, Mapping) or not units_truth:
        raise InputError("answer key has no 'units' entries",
                         hint="Pass the answer_key.json written by `fleetwatch simulate`.")
    h = _health(source).sort("unit_id", "day")
    by_unit = {u: g for (u,), g in h.group_by(["unit_id"], maintain_order=True)}
    results = []
    healthy_days = healthy_runs = healthy_alert_runs = 0
    pre_days = pre_runs = pre_alert_runs = 0
    for uid, t in units_truth.items():
        cond = t.get("condition", "healthy")
        g = by_unit.get(str(uid))
        row: dict[str, Any] = {"unit_id": str(uid), "condition": cond}
        if g is None or g.height == 0:
            row.update(detected=False, note="no health rows")
            results.append(row)
            continue
        days = g["day"].to_list()
        levels = g["status"].to_list()
        causes = g["causes"].to_list() if "causes" in g.columns else [None] * len(days)
        flagged = [lv in ("watch", "alert") for lv in levels]
        runs = _runs(days, flagged, levels)
        first_day, last_day = days[0], days[-1]
        n_days = (last_day - first_day).days + 1
        start = _date(t.get("fault_start")) if cond != "healthy" else None
        repl = _date(t.get("replacement_day"))
        cross = _date(t.get("limit_crossing_day"))
        if cond == "healthy" or start is None:
            healthy_days += n_days
            healthy_runs += len(runs)
            healthy_alert_runs += sum(r["alert"] for r in runs)
            row.update(false_flags=len(runs), false_alerts=sum(r["alert"] for r in runs),
                       days=n_days)
            results.append(row)
            continue
        pre = [r for r in runs if r["start"] < start]
        pre_n = max(0, (min(start, last_day + dt.timedelta(days=1)) - first_day).days)
        pre_days += pre_n
        pre_runs += len(pre)
        pre_alert_runs += sum(r["alert"] for r in pre)
        end = repl - dt.timedelta(days=1) if repl else last_day
        window = [(d, lv, c) for d, lv, c in zip(days, levels, causes) if start <= d <= end]
        hits = [(d, lv, c) for d, lv, c in window if lv in ("watch", "alert")]
        alerts = [d for d, lv, _ in hits if lv == "alert"]
        first_flag = hits[0][0] if hits else None
        row.update(fault_start=start.isoformat(), detected=bool(hits),
                   first_flag=first_flag.isoformat() if first_flag else None,
                   time_to_detect_days=(first_flag - start).days if first_flag else None,
                   first_alert=alerts[0].isoformat() if alerts else None,
                   false_flags_before_onset=len(pre))
        if cross is not None and cross <= last_day and (repl is None or cross <= repl):
            row["limit_crossing_day"] = cross.isoformat()
            row["lead_time_days"] = (cross - first_flag).days if first_flag else None
            row["alert_lead_time_days"] = (cross - alerts[0]).days if alerts else None
        exp = EXPECTED_CAUSE.get(cond)
        if exp and first_flag:
            week = [c for d, lv, c in hits if (d - first_flag).days < 7 and c]
            row["causes_at_detection"] = hits[0][2]
            row["cause_ok"] = any(exp in (c or "").split(", ") for c in week)
        if repl is not None:
            after = [(d, lv) for d, lv in zip(days, levels) if d >= repl]
            back = next((d for d, lv in after if lv == "normal"), None)
            row["replacement_day"] = repl.isoformat()
            row["days_to_normal"] = (back - repl).days if back else None
            if back:
                nxt = [lv for d, lv in after if back <= d < back + dt.timedelta(days=8)]
                row["stays_normal_7d"] = all(lv == "normal" for lv in nxt)
        results.append(row)

    summary, targets = _summarise(results, healthy_days, healthy_runs, healthy_alert_runs,
                                  pre_days, pre_runs, pre_alert_runs)
    return {"units": results, "summary": summary, "targets": targets,
            "definitions": {"unit_month_days": UNIT_MONTH_DAYS,
                            "wear_lead_days": WEAR_LEAD_DAYS,
                            "fast_detect_days": FAST_DETECT_DAYS,
                            "replaced_normal_days": REPLACED_NORMAL_DAYS}}


def _rate(n: int, days: int) -> float | None:
    return None if days <= 0 else round(100.0 * n / (days / UNIT_MONTH_DAYS), 3)


def _summarise(results, healthy_days, healthy_runs, healthy_alert_runs, pre_days, pre_runs,
               pre_alert_runs):
    faulty = [r for r in results if r["condition"] != "healthy"]
    wear_lead = [r for r in faulty if r["condition"] in WEAR_CONDITIONS
                 and "limit_crossing_day" in r]
    wear_ok = [r for r in wear_lead if (r.get("lead_time_days") or -1) >= WEAR_LEAD_DAYS]
    fast = [r for r in faulty if r["condition"] in FAST_CONDITIONS]
    fast_ok = [r for r in fast if r.get("time_to_detect_days") is not None
               and r["time_to_detect_days"] <= FAST_DETECT_DAYS]
    repl = [r for r in faulty if "replacement_day" in r]
    repl_ok = [r for r in repl if r.get("days_to_normal") is not None
               and r["days_to_normal"] <= REPLACED_NORMAL_DAYS]
    ttd = [r["time_to_detect_days"] for r in faulty if r.get("time_to_detect_days") is not None]
    summary = {
        "units": len(results),
        "faulty_units": len(faulty),
        "detected": sum(bool(r.get("detected")) for r in faulty),
        "missed": [r["unit_id"] for r in faulty if not r.get("detected")],
        "mean_time_to_detect_days": round(sum(ttd) / len(ttd), 2) if ttd else None,
        "wear_units_with_crossing": len(wear_lead),
        "wear_lead_fraction": round(len(wear_ok) / len(wear_lead), 3) if wear_lead else None,
        "fast_faults": len(fast),
        "fast_detect_fraction": round(len(fast_ok) / len(fast), 3) if fast else None,
        "healthy_unit_months": round(healthy_days / UNIT_MONTH_DAYS, 2),
        "false_flags_per_100_unit_months": _rate(healthy_runs, healthy_days),
        "false_alerts_per_100_unit_months": _rate(healthy_alert_runs, healthy_days),
        "pre_onset_unit_months": round(pre_days / UNIT_MONTH_DAYS, 2),
        "pre_onset_false_flags_per_100_unit_months": _rate(pre_runs, pre_days),
        "pre_onset_false_alerts_per_100_unit_months": _rate(pre_alert_runs, pre_days),
        "replaced_units": len(repl),
        "replaced_normal_fraction": round(len(repl_ok) / len(repl), 3) if repl else None,
        "cause_ok_fraction": (round(sum(bool(r.get("cause_ok")) for r in faulty if "cause_ok" in r)
                                    / max(1, sum("cause_ok" in r for r in faulty)), 3)
                              if any("cause_ok" in r for r in faulty) else None),
    }
    targets = {}
    for name, (op, goal, text) in TARGETS.items():
        v = summary.get(name)
        met = None if v is None else (v >= goal if op == ">=" else v <= goal)
        targets[name] = {"value": v, "target": f"{op} {goal:g}", "met": met, "what": text}
    return summary, targets


def format_evaluation(result: dict, width: int = 160) -> str:
    """Per-unit table, summary and targets as text (rich, no colour needed)."""
    from rich.console import Console
    from rich.markup import escape
    from rich.table import Table
    from rich.text import Text

    buf = io.StringIO()
    con = Console(file=buf, width=width, highlight=False)
    t = Table(title="Detection against the answer key")
    for c in ("unit", "condition", "fault start", "first flag", "to detect (d)", "lead (d)",
              "false before", "causes at detection", "replaced -> normal (d)"):
        t.add_column(c)
    for r in result["units"]:
        if r["condition"] == "healthy":
            continue
        det = r.get("first_flag") or "MISSED"
        cells = [r["unit_id"], r["condition"], str(r.get("fault_start") or "-"), det,
                 _s(r.get("time_to_detect_days")), _s(r.get("lead_time_days")),
                 _s(r.get("false_flags_before_onset")), str(r.get("causes_at_detection") or "-"),
                 _s(r.get("days_to_normal"))]
        t.add_row(*[Text(c) for c in cells])
    con.print(t)
    s = result["summary"]
    con.print(Text(f"faulty {s['faulty_units']}, detected {s['detected']}, missed "
              f"{', '.join(s['missed']) or 'none'}; healthy {s['healthy_unit_months']} "
              f"unit-months: {s['false_flags_per_100_unit_months']} false flags and "
              f"{s['false_alerts_per_100_unit_months']} false alerts per 100 unit-months"))
    for name, tg in result["targets"].items():
        mark = "n/a" if tg["met"] is None else ("met" if tg["met"] else "NOT MET")
        con.print(escape(f"  {mark:7s} {name} = {tg['value']} (target {tg['target']}): "
                         f"{tg['what']}"))
    return buf.getvalue()


def _s(v: Any) -> str:
    return "-" if v is None else str(v)
