"""Chart builders: valid Vega-Lite, status colours always paired with words, offline SVG."""
from __future__ import annotations

import datetime as dt
import json
import re

import altair as alt
import polars as pl
import pytest

from fleetwatch import charts as ch
from fleetwatch import views as vw
from fleetwatch.schema import STATUS_LEVELS
from fleetwatch.views import IsoWeek
from report_lake import FrameLake, synthetic_tables

# Okabe & Ito, "Color Universal Design (CUD): how to make figures and presentations that
# are friendly to colorblind people" (2008): the eight-colour set the palette builds on.
OKABE_ITO = {"#E69F00", "#56B4E9", "#009E73", "#F0E442", "#0072B2", "#D55E00", "#CC79A7",
             "#000000"}


@pytest.fixture(scope="module")
def lake_week():
    tables, truth = synthetic_tables(units=16)
    return FrameLake(tables), IsoWeek.parse(truth.report_week)


def _spec(chart) -> dict:
    return chart.to_dict()          # validates against the Vega-Lite schema


def _datasets(spec: dict) -> list[dict]:
    return [row for rows in spec.get("datasets", {}).values() for row in rows]


def _walk(spec, key):
    """Every value stored under ``key`` anywhere in a spec."""
    if isinstance(spec, dict):
        for k, v in spec.items():
            if k == key:
                yield v
            yield from _walk(v, key)
    elif isinstance(spec, list):
        for v in spec:
            yield from _walk(v, key)


def test_status_palette_words_symbols_and_colour_source():
    for s in STATUS_LEVELS:
        entry = ch.STATUS_COLOURS[s]
        assert entry["word"] == s and entry["symbol"] and entry["colour"] in OKABE_ITO
    colours = [ch.STATUS_COLOURS[s]["colour"] for s in ch.STATUS_COLOURS]
    symbols = [ch.STATUS_COLOURS[s]["symbol"] for s in ch.STATUS_COLOURS]
    assert len(set(colours)) == len(colours) and len(set(symbols)) == len(symbols)
    assert ch.status_word("alert") == "\u25b2 alert"
    assert ch.status_word(None) == ch.status_word("unknown")


def _wcag_contrast(a: str, b: str) -> float:
    """Contrast ratio of two sRGB colours: relative luminance and (L1 + 0.05) / (L2 + 0.05)
    as defined in WCAG 2.1 (W3C Recommendation, 'contrast ratio' and 'relative
    luminance' in its glossary)."""
    def lum(h):
        r, g, b = (int(h[i:i + 2], 16) / 255 for i in (1, 3, 5))
        f = (lambda c: c / 12.92 if c <= 0.03928 else ((c + 0.055) / 1.055) ** 2.4)
        return 0.2126 * f(r) + 0.7152 * f(g) + 0.0722 * f(b)
    hi, lo = sorted((lum(a), lum(b)), reverse=True)
    return (hi + 0.05) / (lo + 0.05)


def test_status_words_are_drawn_in_a_shade_readable_on_white():
    # WCAG 2.1 success criterion 1.4.3: at least 4.5:1 for text of normal size
    assert round(_wcag_contrast("#000000", "#FFFFFF"), 1) == 21.0   # the formula's end points
    # greys either side of 4.5:1 on white: #767676 passes, #777777 (4.48) does not (from
    # memory, a value often quoted with the criterion)
    assert _wcag_contrast("#767676", "#FFFFFF") >= 4.5
    assert round(_wcag_contrast("#777777", "#FFFFFF"), 2) == 4.48
    for s in ch.STATUS_COLOURS:
        assert _wcag_contrast(ch.status_text_colour(s), "#FFFFFF") >= 4.5, s
    assert _wcag_contrast(ch.status_colour("watch"), "#FFFFFF") < 3     # why the shade
    shades = [ch.status_text_colour(s) for s in ch.STATUS_COLOURS]
    assert len(set(shades)) == len(shades)


def test_status_counts_chart_pairs_colour_with_word(lake_week):
    lake, wk = lake_week
    counts = vw.status_counts(vw.fleet_overview(lake, wk.sunday))
    spec = _spec(ch.status_counts_chart(counts))
    texts = {r["text"] for r in _datasets(spec)}
    assert texts == {"\u25cf normal: 10", "\u25c6 watch: 4", "\u25b2 alert: 2"}
    scales = [c["scale"] for c in _walk(spec, "color") if isinstance(c, dict) and "scale" in c]
    assert scales and scales[0]["range"] == [ch.STATUS_COLOURS[s]["colour"]
                                             for s in ("normal", "watch", "alert")]
    assert scales[0]["domain"] == [ch.status_word(s) for s in ("normal", "watch", "alert")]


def test_unit_slip_chart_has_points_trend_limit_band_and_maintenance(lake_week):
    lake, wk = lake_week
    series = vw.unit_slip_series(lake, "L1-U01", wk.sunday - dt.timedelta(days=90), wk.sunday)
    maint = vw.maintenance_markers(lake, "L1-U01")
    spec = _spec(ch.unit_slip_chart(series, maint))
    marks = [m if isinstance(m, str) else m["type"] for m in _walk(spec, "mark")]
    assert {"circle", "line", "rule", "rect", "text"} <= set(marks)
    rows = _datasets(spec)
    assert any(r.get("y") == pytest.approx(0.05) for r in rows)          # the limit rule
    assert any(r.get("label") == "inspection" for r in rows)            # maintenance
    band = [r for r in rows if "high_open" in r][0]
    assert band["low"] < band["high"]                                   # ISO dates sort
    assert "limit reached between" in " ".join(spec["title"]["subtitle"])
    assert "dashed: forecast" in " ".join(spec["title"]["subtitle"])   # the line legend
    # days are handed to Vega as plain dates on a UTC scale (no local-time shift)
    assert all(re.fullmatch(r"\d{4}-\d{2}-\d{2}", r["day"]) for r in rows if "day" in r)
    assert {"type": "utc"} in list(_walk(spec, "scale"))


def test_creep_and_events_use_shape_or_dash_besides_colour(lake_week):
    lake, wk = lake_week
    creep = _spec(ch.creep_chart(vw.creep_week_vs_reference(lake, "L1-U01", wk)))
    assert list(_walk(creep, "shape")) and list(_walk(creep, "strokeDash"))
    assert "2.56" in creep["title"]["subtitle"] or "x reference" in creep["title"]["subtitle"]
    t0, t1 = wk.bounds_utc()
    ev = _spec(ch.events_timeline_chart(vw.unit_events(lake, start=t0, end=t1),
                                        vw.maintenance_markers(lake, start=t0, end=t1),
                                        t0, t1, by="unit_id"))
    shapes = [s for s in _walk(ev, "shape") if isinstance(s, dict)]
    assert shapes and shapes[0]["scale"]["domain"] == ["gross slip", "stall",
                                                       "sensor flatline"]
    assert any(r.get("label") == "L1-U01: inspection" for r in _datasets(ev))


@pytest.mark.parametrize("name", [
    "dist", "ratio", "power_measured", "power_residual", "temperature", "drift", "drift_fleet",
    "energy", "completeness", "anomaly", "history", "week_events"])
def test_every_builder_gives_a_valid_spec(lake_week, name):
    lake, wk = lake_week
    t0, t1 = wk.bounds_utc()
    build = {
        "dist": lambda: ch.fleet_slip_distribution_chart(vw.fleet_slip_distribution(lake),
                                                         0.05),
        "ratio": lambda: ch.ratio_chart(vw.ratio_series(lake, "L1-U03", max_points=300)),
        "power_measured": lambda: ch.power_chart(vw.power_series(lake, "L1-U01",
                                                                 max_points=300)),
        "power_residual": lambda: ch.power_chart(vw.power_series(lake, "L1-U02",
                                                                 max_points=300)),
        "temperature": lambda: ch.temperature_chart(vw.temperature_series(lake, "L1-U01",
                                                                          max_points=300)),
        "drift": lambda: ch.motor_drift_chart(vw.motor_drift(lake, "L1-U06")),
        "drift_fleet": lambda: ch.motor_drift_fleet_chart(
            vw.motor_drift(lake, start=wk.monday, end=wk.sunday), top=5),
        "energy": lambda: ch.energy_chart(vw.energy_summary(lake, wk.monday, wk.sunday),
                                          top=5),
        "completeness": lambda: ch.completeness_chart(
            vw.data_quality(lake, wk.monday, wk.sunday).completeness, top=5),
        "anomaly": lambda: ch.anomaly_scores_chart(vw.anomaly_scores(lake, "L1-U01"), 0.62),
        "history": lambda: ch.health_history_chart(vw.health_history(lake, "L1-U05")),
        "week_events": lambda: ch.events_timeline_chart(vw.unit_events(lake, start=t0, end=t1),
                                                        None, t0, t1, by="unit_id"),
    }[name]
    chart = build()
    assert isinstance(chart, alt.TopLevelMixin)
    spec = _spec(chart)
    assert _datasets(spec), "chart carries its data inline"
    if name in ("drift_fleet", "energy", "completeness"):
        # says it is truncated (the silent unit has no energy or motor fit that week)
        assert re.search(r"5 of 1[56] units", json.dumps(spec["title"]))


def test_power_chart_switches_to_residual_without_torque(lake_week):
    lake, _ = lake_week
    with_t = json.dumps(_spec(ch.power_chart(vw.power_series(lake, "L1-U01", max_points=50))))
    without = json.dumps(_spec(ch.power_chart(vw.power_series(lake, "L1-U02", max_points=50))))
    assert "efficiency (measured)" in with_t and "power residual" not in with_t
    assert "power residual (%)" in without and "efficiency (measured)" not in without


def test_empty_frames_give_a_no_data_chart():
    empty = pl.DataFrame(schema={"unit_id": pl.String, "week_start": pl.Date,
                                 "r_drift_pct": pl.Float64, "k_e_drift_pct": pl.Float64})
    spec = _spec(ch.motor_drift_chart(empty))
    assert _datasets(spec) == [{"msg": "no data for this period"}]
    spec = _spec(ch.events_timeline_chart(pl.DataFrame(schema={"kind": pl.String}), None))
    assert "no events" in _datasets(spec)[0]["msg"]


def test_to_svg_is_inline_and_offline(lake_week):
    lake, wk = lake_week
    svg = ch.to_svg(ch.status_counts_chart(vw.status_counts(vw.fleet_overview(lake))),
                    title="Units & status")
    assert svg.startswith('<svg role="img" aria-label="Units &amp; status"')
    assert "http" not in svg and "xmlns" not in svg
    assert "\u25b2 alert: 2" in svg                  # the word is drawn, not only the colour
    assert svg.count("<svg") == 1 and svg.rstrip().endswith("</svg>")


def test_fast_data_transformer_gives_altairs_own_values(lake_week):
    """charts registers a quicker data transformer for polars frames; the specs (values and
    dataset names) are the same as with Altair's default one, and the row cap still holds."""
    lake, _ = lake_week
    builders = [
        lambda: ch.ratio_chart(vw.ratio_series(lake, "L1-U03", max_points=300)),
        lambda: ch.power_chart(vw.power_series(lake, "L1-U01", max_points=300)),
        lambda: ch.anomaly_scores_chart(vw.anomaly_scores(lake, "L1-U01"), 0.62),
        lambda: ch.unit_slip_chart(vw.unit_slip_series(lake, "L1-U01")),
    ]
    assert alt.data_transformers.active == "fleetwatch"
    fast = [json.dumps(b().to_dict(validate=False), sort_keys=True) for b in builders]
    with alt.data_transformers.enable("default"):
        slow = [json.dumps(b().to_dict(validate=False), sort_keys=True) for b in builders]
    assert fast == slow
    # a raw temporal column is left to Altair (same text as before), the row cap applies
    raw = pl.DataFrame({"day": [dt.date(2026, 1, 5)], "v": [1.0]})
    assert ch._polars_values(raw)["values"][0]["day"].startswith("2026-01-05")
    with pytest.raises(alt.MaxRowsError):
        ch._polars_values(pl.DataFrame({"v": range(6)}), max_rows=5)


def test_dense_time_series_carry_no_per_point_tooltips(lake_week):
    """Hundreds of points each: a tooltip is an expression per point for the browser."""
    lake, _ = lake_week
    for chart in (ch.ratio_chart(vw.ratio_series(lake, "L1-U03", max_points=300)),
                  ch.temperature_chart(vw.temperature_series(lake, "L1-U01",
                                                             max_points=300))):
        assert not list(_walk(_spec(chart), "tooltip"))
