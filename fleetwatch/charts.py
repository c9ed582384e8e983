"""Altair chart builders shared by the weekly report and the dashboard.

Each builder takes the polars frames (or small dataclasses) returned by
:mod:`fleetwatch.views` and returns an Altair chart; it never queries the lake. The report
renders charts to inline SVG with :func:`to_svg` (vl-convert, offline: external data URLs
refused); the dashboard passes the same charts to ``st.altair_chart``.

Colour: one status palette, :data:`STATUS_COLOURS`, built on the Okabe-Ito colour-blind-safe
set (Okabe & Ito, "Color Universal Design", 2008) and always paired with the status word
and a symbol, so no status is told by colour alone. Series colours (:data:`SERIES_COLOURS`)
come from the same set and are always paired with a shape or dash pattern too.

Data: importing this module registers and enables the Altair data transformer
``"fleetwatch"`` (:func:`_polars_values`): the same values and dataset names as Altair's
default, with less work per polars frame.

Time: day columns are drawn on UTC scales (``day`` in the lake is a UTC date); timestamps
are shown in UTC and axes say so.
"""
from __future__ import annotations

import datetime as dt
import re
from typing import Any

import altair as alt
import polars as pl

from .views import CreepComparison, SlipSeries

__all__ = [
    "STATUS_COLOURS", "SERIES_COLOURS", "FONT", "status_word", "status_colour",
    "status_text_colour", "to_svg",
    "status_counts_chart", "fleet_slip_distribution_chart", "unit_slip_chart", "creep_chart",
    "events_timeline_chart", "ratio_chart", "power_chart", "temperature_chart",
    "motor_drift_chart", "motor_drift_fleet_chart", "energy_chart", "completeness_chart",
    "anomaly_scores_chart", "health_history_chart", "empty_chart",
]

#: status -> colour (hex), word and symbol. Okabe-Ito blue / orange / vermillion and a grey.
#: ``text``: a darker shade of the same hue for words written in the status colour (or on
#: it), which needs a contrast of at least 4.5:1 with white (WCAG 2.1, 1.4.3); the orange
#: and the grey reach only 2.3:1 and 3.4:1.
STATUS_COLOURS: dict[str, dict[str, str]] = {
    "normal": {"colour": "#0072B2", "text": "#0072B2", "word": "normal",
               "symbol": "\u25cf"},                                          # ● blue
    "watch": {"colour": "#E69F00", "text": "#8F5F00", "word": "watch",
              "symbol": "\u25c6"},                                           # ◆ orange
    "alert": {"colour": "#D55E00", "text": "#A84A00", "word": "alert",
              "symbol": "\u25b2"},                                           # ▲ vermillion
    "unknown": {"colour": "#8C8C8C", "text": "#666666", "word": "no status",
                "symbol": "\u25cb"},                                         # ○ grey
}

#: Non-status series (periods, measures). Always drawn with a second cue (shape, dash).
SERIES_COLOURS: dict[str, str] = {
    "data": "#4D4D4D", "trend": "#0072B2", "limit": "#000000", "band": "#E69F00",
    "this week": "#CC79A7", "reference": "#56B4E9", "R": "#0072B2", "k_e": "#CC79A7",
    "commanded": "#000000", "actual": "#009E73", "maintenance": "#009E73",
    "commanded range": "#C8C8C8",
    "median": "#0072B2", "p25-p75": "#56B4E9", "p10-p90": "#BFE3F6",
}

FONT = "DejaVu Sans, Liberation Sans, Arial, Helvetica, sans-serif"
WIDTH = 560
_UTC = alt.Scale(type="utc")

_KIND_WORDS = {
    "gross_slip": "gross slip", "stall": "stall", "ratio_change_stopped":
    "ratio change while stopped", "flatline": "sensor flatline", "data_gap": "data gap",
    "clock_jump": "clock jump",
}


def status_word(status: str | None) -> str:
    """'▲ alert' style label: symbol and word for a status."""
    s = STATUS_COLOURS.get(status or "unknown", STATUS_COLOURS["unknown"])
    return f"{s['symbol']} {s['word']}"


def status_colour(status: str | None) -> str:
    return STATUS_COLOURS.get(status or "unknown", STATUS_COLOURS["unknown"])["colour"]


def status_text_colour(status: str | None) -> str:
    """The shade of a status colour for text (and labels with text on them)."""
    return STATUS_COLOURS.get(status or "unknown", STATUS_COLOURS["unknown"])["text"]


def _status_scale(statuses: list[str]) -> alt.Scale:
    return alt.Scale(domain=[status_word(s) for s in statuses],
                     range=[status_colour(s) for s in statuses])


def _series_scale(names: list[str]) -> alt.Scale:
    return alt.Scale(domain=names, range=[SERIES_COLOURS.get(n, "#4D4D4D") for n in names])


def _prep(df: pl.DataFrame) -> pl.DataFrame:
    """Dates as 'YYYY-MM-DD' and instants as UTC ISO text, so Vega reads them as UTC
    whatever the machine's local time zone is."""
    out = []
    for name, t in df.schema.items():
        if t == pl.Date:
            out.append(pl.col(name).dt.strftime("%Y-%m-%d"))
        elif isinstance(t, pl.Datetime):
            col = pl.col(name)
            col = col.dt.convert_time_zone("UTC") if t.time_zone else col
            out.append(col.dt.strftime("%Y-%m-%dT%H:%M:%SZ"))
        elif isinstance(t, pl.Decimal):
            out.append(pl.col(name).cast(pl.Float64))
    return df.with_columns(out) if out else df


def _data(df: pl.DataFrame) -> alt.Data | pl.DataFrame:
    return _prep(df)


def _polars_values(data: Any, max_rows: int | None = 5000) -> Any:
    """Altair's default data transformer (row cap, then the rows as values) without its
    per-frame overhead for the frames these builders pass: a polars frame with no
    temporal column (``_prep`` made them text) becomes ``to_dicts()`` straight away, the
    same values Altair's own path gives (through narwhals: 5-10 ms a frame, and a Unit
    page builds about 17). Anything else goes to Altair's default."""
    if isinstance(data, pl.DataFrame) and not any(t.is_temporal()
                                                  for t in data.schema.values()):
        if max_rows is not None and data.height > max_rows:
            from altair.utils.data import MaxRowsError

            raise MaxRowsError.from_limit_rows(data.height, max_rows)
        return {"values": data.to_dicts()}
    return alt.vegalite.data.default_data_transformer(data, max_rows=max_rows)


alt.data_transformers.register("fleetwatch", _polars_values)
alt.data_transformers.enable("fleetwatch")


def empty_chart(title: str, message: str = "no data for this period",
                width: int = WIDTH, height: int = 60) -> alt.Chart:
    """A small chart that says there is nothing to draw (keeps sections' layout stable)."""
    return (alt.Chart(pl.DataFrame({"msg": [message]}))
            .mark_text(fontSize=13, color="#4D4D4D")
            .encode(text=alt.Text("msg:N"))
            .properties(title=title, width=width, height=height))


def to_svg(chart: alt.TopLevelMixin, title: str | None = None) -> str:
    """Render a chart to an SVG string for inline use in HTML (offline).

    vl-convert draws the chart with external data requests refused; the xmlns/xlink
    namespace declarations are dropped (inline SVG in HTML5 needs none), so the text holds
    no http(s) reference. Adds role="img" and an aria-label from ``title``.
    """
    import vl_convert as vlc

    spec = chart.to_dict(validate=False)  # tests validate; skipping here saves ~0.1 s/chart
    cfg = spec.setdefault("config", {})
    cfg.setdefault("font", FONT)
    cfg.setdefault("view", {"stroke": "#d0d0d0"})
    cfg.setdefault("axis", {"labelFontSize": 11, "titleFontSize": 11})
    cfg.setdefault("title", {"fontSize": 13, "anchor": "start"})
    # fewer tick labels: every text item costs a font measurement in vl-convert
    cfg.setdefault("axisQuantitative", {"tickCount": 5})
    cfg.setdefault("axisTemporal", {"tickCount": 6})
    svg = vlc.vegalite_to_svg(spec, allowed_base_urls=[])
    svg = re.sub(r'\s+xmlns(:\w+)?="[^"]*"', "", svg, count=0)
    label = title or _title_text(spec) or "chart"
    label = label.replace("&", "&amp;").replace('"', "&quot;").replace("<", "&lt;")
    return svg.replace("<svg", f'<svg role="img" aria-label="{label}"', 1)


def _title_text(spec: dict[str, Any]) -> str:
    t = spec.get("title")
    if isinstance(t, dict):
        t = t.get("text")
    if isinstance(t, list):
        t = " ".join(map(str, t))
    return str(t) if t else ""


# ----------------------------------------------------------------------------- fleet
def status_counts_chart(counts: pl.DataFrame, title: str = "Units by status") -> alt.Chart:
    """Horizontal bars of units per status, each bar labelled with symbol, word and count.

    ``counts``: status, count (views.status_counts)."""
    statuses = counts["status"].to_list()
    df = counts.with_columns(
        label=pl.col("status").map_elements(status_word, return_dtype=pl.String))
    df = df.with_columns(text=pl.col("label") + pl.lit(": ") + pl.col("count").cast(pl.String))
    order = [status_word(s) for s in reversed(statuses)]
    base = alt.Chart(_data(df)).encode(
        y=alt.Y("label:N", sort=order, title=None, axis=alt.Axis(labelFontSize=12)),
        x=alt.X("count:Q", title="units", axis=alt.Axis(tickMinStep=1)))
    bars = base.mark_bar().encode(
        color=alt.Color("label:N", scale=_status_scale(statuses), legend=None),
        tooltip=[alt.Tooltip("label:N"), alt.Tooltip("count:Q")])
    text = base.mark_text(align="left", dx=4, fontSize=12).encode(text=alt.Text("text:N"))
    return (bars + text).properties(title=title, width=WIDTH - 120,
                                    height=max(60, 26 * len(statuses)))


def fleet_slip_distribution_chart(dist: pl.DataFrame, limit: float | None = None,
                                  title: str = "Steady slip at load across the fleet, per week"
                                  ) -> alt.LayerChart | alt.Chart:
    """Weekly spread of the units' slip at load: 10-90 % and 25-75 % bands, median line,
    and the wear limit. ``dist``: views.fleet_slip_distribution."""
    if dist.height == 0:
        return empty_chart(title)
    d = _data(dist)
    bands = pl.concat([
        d.select("week_start", lo=pl.col("p10"), hi=pl.col("p90"),
                 band=pl.lit("p10-p90")),
        d.select("week_start", lo=pl.col("p25"), hi=pl.col("p75"),
                 band=pl.lit("p25-p75"))])
    names = ["p10-p90", "p25-p75", "median"]
    x = alt.X("week_start:T", scale=_UTC, title="week (Monday, UTC)",
              axis=alt.Axis(format="%d %b"))
    area = alt.Chart(bands).mark_area(opacity=0.9).encode(
        x=x, y=alt.Y("lo:Q", title="slip at load", axis=alt.Axis(format=".1%")),
        y2=alt.Y2("hi"),
        color=alt.Color("band:N", scale=_series_scale(names),
                        legend=alt.Legend(title="units", orient="top")))
    med = alt.Chart(d.with_columns(band=pl.lit("median"))).mark_line(
        point=True, strokeWidth=2).encode(
        x=x, y=alt.Y("p50:Q"), color=alt.Color("band:N", scale=_series_scale(names)),
        tooltip=[alt.Tooltip("week_start:T", title="week"), alt.Tooltip("units:Q"),
                 alt.Tooltip("p50:Q", format=".2%", title="median"),
                 alt.Tooltip("p90:Q", format=".2%"), alt.Tooltip("max:Q", format=".2%")])
    layers = [area, med]
    if limit is not None:
        layers += _limit_layers(limit, d["week_start"].max())
    return alt.layer(*layers).properties(title=title, width=WIDTH, height=200)


def _limit_layers(limit: float, x_at: str | None, align: str = "right") -> list[alt.Chart]:
    lim = pl.DataFrame({"y": [limit], "label": [f"wear limit {limit:.1%}"], "x": [x_at]})
    rule = alt.Chart(lim).mark_rule(color=SERIES_COLOURS["limit"], strokeDash=[6, 3]).encode(
        y=alt.Y("y:Q"))
    text = alt.Chart(lim).mark_text(align=align, dy=-6, fontSize=11).encode(
        y=alt.Y("y:Q"), x=alt.X("x:T", scale=_UTC), text=alt.Text("label:N"))
    return [rule, text] if x_at else [rule]


# ----------------------------------------------------------------------------- unit evidence
def unit_slip_chart(series: SlipSeries, maintenance: pl.DataFrame | None = None,
                    title: str | None = None) -> alt.LayerChart | alt.Chart:
    """Daily steady slip at load (points), the Theil-Sen trend since the last wear reset
    (solid) and its forecast (dashed), the wear limit (dashed rule), the days-to-limit
    band (shaded, labelled with its dates) and maintenance (vertical rules with labels)."""
    title = title or f"{series.unit_id}: steady slip at load"
    if series.points.height == 0 and series.trend.height == 0:
        return empty_chart(title)
    x = alt.X("day:T", scale=_UTC, title="day (UTC)", axis=alt.Axis(format="%d %b"))
    y_title = "slip at load"
    layers: list[alt.Chart] = []
    band = series.band
    subtitle = None
    if band.height:
        b = band.row(0, named=True)
        hi_word = "open (no upper bound)" if b["high_open"] else f"{b['high']:%d %b %Y}"
        subtitle = f"limit reached between {b['low']:%d %b} and {hi_word}"
        if b["mid"] is not None:
            subtitle += f"; median {b['mid']:%d %b %Y}"
        subtitle += " (shaded)"
        layers.append(alt.Chart(_data(band)).mark_rect(color=SERIES_COLOURS["band"],
                                                       opacity=0.25)
                      .encode(x=alt.X("low:T", scale=_UTC), x2=alt.X2("high"),
                              tooltip=[alt.Tooltip("low:T", title="earliest"),
                                       alt.Tooltip("mid:T", title="median"),
                                       alt.Tooltip("high:T", title="latest")]))
    elif series.note:
        subtitle = series.note
    if series.points.height:
        layers.append(alt.Chart(_data(series.points)).mark_circle(
            size=22, color=SERIES_COLOURS["data"], opacity=0.8, aria=False).encode(
            x=x, y=alt.Y("slip_at_load:Q", title=y_title, axis=alt.Axis(format=".1%")),
            tooltip=[alt.Tooltip("day:T", title="day"),
                     alt.Tooltip("slip_at_load:Q", format=".2%", title="slip at load")]))
    if series.trend.height:
        layers.append(alt.Chart(_data(series.trend)).mark_line(
            color=SERIES_COLOURS["trend"], strokeWidth=2).encode(
            x=x, y=alt.Y("level:Q", title=y_title, axis=alt.Axis(format=".1%")),
            strokeDash=alt.StrokeDash("part:N", scale=alt.Scale(
                domain=["fit", "forecast"], range=[[1, 0], [6, 4]]), legend=None)))
        # the legend is a line of the subtitle (one text item instead of three)
        key = "dots: daily value; solid: trend since the last wear reset; dashed: forecast"
        subtitle = [key, subtitle] if subtitle else key
    starts = [v for v in (series.points["day"].min() if series.points.height else None,
                          series.trend["day"].min() if series.trend.height else None) if v]
    layers += _limit_layers(series.limit, min(starts).isoformat() if starts else None,
                            align="left")
    if maintenance is not None and maintenance.height:
        layers += _maintenance_layers(maintenance, "day")
    return alt.layer(*layers).properties(
        title=alt.TitleParams(title, subtitle=subtitle) if subtitle else title,
        width=WIDTH, height=190)


def _maintenance_layers(maint: pl.DataFrame, field: str = "ts", with_unit: bool = False,
                        x: alt.X | None = None) -> list[alt.Chart]:
    m = maint.with_columns(label=pl.col("action") + pl.when(pl.col("resets_wear"))
                           .then(pl.lit(" (reset)")).otherwise(pl.lit("")))
    if with_unit:
        m = m.with_columns(label=pl.col("unit_id") + pl.lit(": ") + pl.col("label"))
    # stagger labels over three rows so neighbouring entries do not print over each other
    m = m.sort(field if field in m.columns else "ts").with_row_index("_i").with_columns(
        lab_y=10 + 12 * (pl.col("_i") % 3).cast(pl.Float64)).drop("_i")
    if field == "day" and "day" not in m.columns:
        m = m.with_columns(day=pl.col("ts").dt.date())
    m = _data(m)
    enc_x = x if x is not None else alt.X(f"{field}:T", scale=_UTC)
    rule = alt.Chart(m).mark_rule(color=SERIES_COLOURS["maintenance"], strokeWidth=2,
                                  strokeDash=[2, 2]).encode(
        x=enc_x, tooltip=[alt.Tooltip(f"{field}:T"), alt.Tooltip("unit_id:N"),
                               alt.Tooltip("action:N"), alt.Tooltip("note:N")])
    text = alt.Chart(m).mark_text(align="left", angle=0, dx=3, baseline="bottom", fontSize=10,
                                  color=SERIES_COLOURS["maintenance"]).encode(
        x=enc_x, y=alt.Y("lab_y:Q", scale=None), text=alt.Text("label:N"))
    return [rule, text]


def creep_chart(cmp: CreepComparison, title: str | None = None
                ) -> alt.LayerChart | alt.Chart:
    """Steady slip against load: this week's windows against the reference weeks' (colour
    and shape by period), with the fitted s = a + b*load lines (dash by period)."""
    title = title or f"{cmp.unit_id}: creep vs load, {cmp.week} against reference weeks"
    if cmp.points.height == 0 and cmp.lines.height == 0:
        return empty_chart(title)
    periods = ["reference", "this week"]
    colour = alt.Color("period:N", scale=_series_scale(periods),
                       legend=alt.Legend(title=None, orient="top"))
    x = alt.X("load:Q", title="load (N·m)")
    y = alt.Y("slip:Q", title="steady slip", axis=alt.Axis(format=".1%"))
    layers = []
    if cmp.points.height:
        layers.append(alt.Chart(_data(cmp.points)).mark_point(size=18, opacity=0.6,
                                                              aria=False).encode(
            x=x, y=y, color=colour,
            shape=alt.Shape("period:N", scale=alt.Scale(domain=periods,
                                                        range=["circle", "triangle-up"]),
                            legend=alt.Legend(title=None, orient="top"))))
    if cmp.lines.height:
        layers.append(alt.Chart(_data(cmp.lines)).mark_line(strokeWidth=2).encode(
            x=x, y=y, color=colour, detail=alt.Detail("series:N"),
            strokeDash=alt.StrokeDash("period:N", scale=alt.Scale(
                domain=periods, range=[[6, 3], [1, 0]]), legend=None),
            tooltip=[alt.Tooltip("series:N")]))
    ratio = cmp.b_ratio
    sub = (f"compliance b this week = {ratio:.2f} x reference" if ratio is not None
           else "no reference fit to compare")
    # the dash has no legend of its own (colour and shape say the period): independent,
    # so the merged period legend is not asked to be both shown and hidden
    return alt.layer(*layers).resolve_legend(strokeDash="independent").properties(
        title=alt.TitleParams(title, subtitle=sub), width=WIDTH, height=200)


def events_timeline_chart(events: pl.DataFrame, maintenance: pl.DataFrame | None = None,
                          start: dt.datetime | dt.date | None = None,
                          end: dt.datetime | dt.date | None = None, by: str = "kind",
                          title: str = "Events and maintenance") -> alt.LayerChart | alt.Chart:
    """Events on a time axis, one row per ``by`` (kind or unit_id), shape by kind, a line
    for their duration; maintenance as vertical rules labelled with the action."""
    has_m = maintenance is not None and maintenance.height > 0
    if events.height == 0 and not has_m:
        return empty_chart(title, "no events or maintenance in this period")
    layers = []
    x_scale = alt.Scale(type="utc")
    if start is not None and end is not None:
        dom = [_iso(start), _iso(end)]
        x_scale = alt.Scale(type="utc", domain=dom)
    x = alt.X("start_ts:T", scale=x_scale, title="time (UTC)",
              axis=alt.Axis(format="%d %b"))
    if events.height:
        ev = events.with_columns(
            what=pl.col("kind").replace_strict(_KIND_WORDS, default=pl.col("kind")))
        kinds = sorted(ev["what"].unique().to_list())
        rows = ev[by].n_unique() if by in ev.columns else 1
        y = alt.Y(f"{'what' if by == 'kind' else by}:N", title=None)
        e = _data(ev)
        legend = alt.Legend(title="event", orient="top")
        cscale, sscale = _kind_scales(kinds)
        colour = alt.Color("what:N", scale=cscale, legend=legend)
        layers.append(alt.Chart(e).mark_rule(strokeWidth=3, opacity=0.45,
                                             color=SERIES_COLOURS["data"]).encode(
            x=x, x2=alt.X2("end_ts"), y=y))
        layers.append(alt.Chart(e).mark_point(filled=True, size=50, opacity=1).encode(
            x=x, y=y, shape=alt.Shape("what:N", legend=legend, scale=sscale), color=colour,
            tooltip=[alt.Tooltip("unit_id:N"), alt.Tooltip("what:N"),
                     alt.Tooltip("start_ts:T", format="%d %b %H:%M"),
                     alt.Tooltip("description:N"), alt.Tooltip("peak:Q")]))
        height = max(60, 22 * rows)
    else:
        height = 60
    if has_m:
        layers += _maintenance_layers(
            maintenance, "ts", with_unit=by != "kind",
            x=alt.X("ts:T", scale=x_scale, title="time (UTC)", axis=alt.Axis(format="%d %b")))
    return alt.layer(*layers).properties(title=title, width=WIDTH, height=height)


# Fixed cue per event kind (colour and shape), so a kind looks the same in every chart.
_KIND_STYLE = {
    "gross slip": ("#D55E00", "triangle-up"), "stall": ("#CC79A7", "square"),
    "sensor flatline": ("#0072B2", "diamond"), "data gap": ("#8C8C8C", "circle"),
    "ratio change while stopped": ("#E69F00", "cross"), "clock jump": ("#000000",
                                                                      "triangle-down"),
}


def _kind_scales(kinds: list[str]) -> tuple[alt.Scale, alt.Scale]:
    order = [k for k in _KIND_STYLE if k in kinds] + sorted(k for k in kinds
                                                           if k not in _KIND_STYLE)
    style = [_KIND_STYLE.get(k, ("#009E73", "wedge")) for k in order]
    return (alt.Scale(domain=order, range=[c for c, _ in style]),
            alt.Scale(domain=order, range=[sh for _, sh in style]))


def _iso(v: dt.date | dt.datetime) -> str:
    if isinstance(v, dt.datetime):
        if v.tzinfo is not None:
            v = v.astimezone(dt.timezone.utc)
        return v.strftime("%Y-%m-%dT%H:%M:%SZ")
    return v.isoformat()


# ----------------------------------------------------------------------------- unit signals
def _long_lines(df: pl.DataFrame, cols: dict[str, str], x: str, y_title: str, title: str,
                fmt: str | None = None, dashes: dict[str, list[int]] | None = None,
                interpolate: str = "linear", also_in_legend: tuple[str, ...] = ()
                ) -> alt.Chart:
    """One line per column of ``cols`` (column -> series name). ``also_in_legend``: series
    of other layers that share the colour scale and legend (e.g. a band)."""
    long = df.select([x] + list(cols)).unpivot(index=x, variable_name="col", value_name="v") \
        .with_columns(series=pl.col("col").replace_strict(cols)).drop_nulls("v")
    names = list(cols.values())
    enc: dict[str, Any] = dict(
        x=alt.X(f"{x}:T", scale=_UTC, title="time (UTC)"),
        y=alt.Y("v:Q", title=y_title, axis=alt.Axis(format=fmt) if fmt else alt.Axis(),
                scale=alt.Scale(zero=False)),
        color=alt.Color("series:N", scale=_series_scale(names + list(also_in_legend)),
                        legend=alt.Legend(title=None, orient="top")))
    # no per-point tooltips on these dense lines (hundreds of points): each one is an
    # expression the browser evaluates per point when the chart is drawn
    dashes = dashes or {}
    enc["strokeDash"] = alt.StrokeDash("series:N", scale=alt.Scale(
        domain=names, range=[dashes.get(n, [1, 0]) for n in names]), legend=None)
    return alt.Chart(_data(long)).mark_line(strokeWidth=1.5, interpolate=interpolate
                                            ).encode(**enc).properties(
        title=title, width=WIDTH, height=170)


def ratio_chart(df: pl.DataFrame, title: str = "Commanded against actual ratio"
                ) -> alt.VConcatChart | alt.Chart:
    """Commanded (dashed, black) and actual (solid, green) ratio i = n_in/n_out as steps,
    above the tracking error (act - cmd)/cmd in %. Where a point stands for several windows
    that were commanded different ratios, a grey band spans them (the line is their median
    set point). ``df``: views.ratio_series."""
    if df.height == 0:
        return empty_chart(title)
    spread = "ratio_cmd_lo" in df.columns and df.select(
        (pl.col("ratio_cmd_hi") > pl.col("ratio_cmd_lo")).any()).item()
    names = ("commanded", "actual", "commanded range") if spread else ("commanded", "actual")
    top = _long_lines(df, {"ratio_cmd": "commanded", "ratio_act": "actual"}, "ts",
                      "ratio i = n_in / n_out", title,
                      dashes={"commanded": [5, 3], "actual": [1, 0]}, interpolate="step-after",
                      also_in_legend=names[2:])
    if spread:
        rng = df.select("ts", "ratio_cmd_lo", "ratio_cmd_hi").with_columns(
            series=pl.lit("commanded range"))
        band = alt.Chart(_data(rng)).mark_area(interpolate="step-after").encode(
            x=alt.X("ts:T", scale=_UTC, title="time (UTC)"),
            y=alt.Y("ratio_cmd_lo:Q"), y2=alt.Y2("ratio_cmd_hi"),
            color=alt.Color("series:N", scale=_series_scale(list(names)), legend=None))
        top = alt.layer(band, top).properties(title=title, width=WIDTH, height=170)
    err = df.with_columns(err_pct=pl.col("ratio_error") * 100)
    low = alt.Chart(_data(err)).mark_line(color=SERIES_COLOURS["trend"]).encode(
        x=alt.X("ts:T", scale=_UTC, title="time (UTC)"),
        y=alt.Y("err_pct:Q", title="tracking error (%)"))
    zero = alt.Chart(pl.DataFrame({"y": [0.0]})).mark_rule(color="#999").encode(y=alt.Y("y:Q"))
    return alt.vconcat(top, (low + zero).properties(
        title="ratio tracking error (actual - commanded) / commanded", width=WIDTH, height=100))


def power_chart(df: pl.DataFrame, title: str = "Input power") -> alt.VConcatChart | alt.Chart:
    """Input power (W) above measured efficiency where torque is logged, else above the
    input-power residual (%) against the unit's own model. ``df``: views.power_series."""
    if df.height == 0:
        return empty_chart(title)
    x = alt.X("ts:T", scale=_UTC, title="time (UTC)")
    d = _data(df)
    top = alt.Chart(d).mark_line(color=SERIES_COLOURS["data"]).encode(
        x=x, y=alt.Y("p_in_w:Q", title="input power (W)")).properties(
        title=title, width=WIDTH, height=140)
    if df["efficiency"].drop_nulls().len():
        low = alt.Chart(d).mark_line(color=SERIES_COLOURS["trend"]).encode(
            x=x, y=alt.Y("efficiency:Q", title="efficiency (measured)",
                         axis=alt.Axis(format=".0%"), scale=alt.Scale(zero=False)))
        low = low.properties(title="efficiency = T_out·ω_out / P_in", width=WIDTH, height=110)
    else:
        low = alt.Chart(d).mark_line(color=SERIES_COLOURS["trend"]).encode(
            x=x, y=alt.Y("power_resid_pct:Q", title="power residual (%)"))
        zero = alt.Chart(pl.DataFrame({"y": [0.0]})).mark_rule(color="#999").encode(y=alt.Y("y:Q"))
        low = (low + zero).properties(
            title="input-power residual against the unit's reference model (no torque sensor)",
            width=WIDTH, height=110)
    return alt.vconcat(top, low)


def temperature_chart(df: pl.DataFrame, title: str = "Temperature") -> alt.Chart:
    """Mean temperature (degC) over time. ``df``: views.temperature_series."""
    if df.height == 0:
        return empty_chart(title, "this unit logs no temperature")
    return alt.Chart(_data(df)).mark_line(color=SERIES_COLOURS["data"]).encode(
        x=alt.X("ts:T", scale=_UTC, title="time (UTC)"),
        y=alt.Y("temp_c:Q", title="temperature (°C)", scale=alt.Scale(zero=False)),
    ).properties(title=title, width=WIDTH, height=150)


def health_history_chart(df: pl.DataFrame, title: str = "Status by day") -> alt.Chart:
    """One tick per day on the row of its status (the axis carries the words)."""
    if df.height == 0:
        return empty_chart(title)
    statuses = ["normal", "watch", "alert"]
    d = df.with_columns(label=pl.col("status").map_elements(status_word,
                                                            return_dtype=pl.String))
    return alt.Chart(_data(d)).mark_tick(thickness=3, size=14).encode(
        x=alt.X("day:T", scale=_UTC, title="day (UTC)"),
        y=alt.Y("label:N", sort=[status_word(s) for s in reversed(statuses)], title=None),
        color=alt.Color("label:N", scale=_status_scale(statuses), legend=None),
        tooltip=[alt.Tooltip("day:T"), alt.Tooltip("status:N"), alt.Tooltip("reasons:N")],
    ).properties(title=title, width=WIDTH, height=80)


def anomaly_scores_chart(df: pl.DataFrame, threshold: float | None = None,
                         title: str = "Anomaly score (isolation forest)") -> alt.LayerChart:
    """Daily anomaly score on the paper's scale (0.5 = nothing distinct) with the watch
    threshold; reference days drawn hollow. ``df``: views.anomaly_scores."""
    if df.height == 0:
        return empty_chart(title)
    d = _data(df.with_columns(period=pl.when(pl.col("is_reference"))
                              .then(pl.lit("reference")).otherwise(pl.lit("monitored"))))
    x = alt.X("day:T", scale=_UTC, title="day (UTC)")
    multi = df["unit_id"].n_unique() > 1
    line = alt.Chart(d).mark_line(color=SERIES_COLOURS["data"], strokeWidth=1).encode(
        x=x, y=alt.Y("score:Q", title="score", scale=alt.Scale(domain=[0.3, 1.0])),
        detail=alt.Detail("unit_id:N"))
    pts = alt.Chart(d).mark_point(size=20).encode(
        x=x, y=alt.Y("score:Q"),
        shape=alt.Shape("period:N", legend=alt.Legend(title=None, orient="top")),
        color=alt.Color("unit_id:N", legend=alt.Legend(orient="top") if multi else None)
        if multi else alt.ColorValue(SERIES_COLOURS["data"]),
        tooltip=[alt.Tooltip("unit_id:N"), alt.Tooltip("day:T"),
                 alt.Tooltip("score:Q", format=".3f"), alt.Tooltip("top_features:N")])
    layers = [line, pts]
    if threshold is not None:
        t = pl.DataFrame({"y": [threshold], "label": [f"watch threshold {threshold:g}"]})
        layers.append(alt.Chart(t).mark_rule(strokeDash=[6, 3], color="#000").encode(
            y=alt.Y("y:Q")))
    return alt.layer(*layers).properties(title=title, width=WIDTH, height=160)


# ----------------------------------------------------------------------------- motor
def motor_drift_chart(df: pl.DataFrame, title: str = "Motor drift against reference weeks"
                      ) -> alt.Chart:
    """Weekly drift (%) of armature resistance R and back-EMF constant k_e, colour and
    shape by measure; one line per unit. ``df``: views.motor_drift."""
    if df.height == 0:
        return empty_chart(title)
    long = _long_measures(df)
    names = ["R", "k_e"]
    return alt.Chart(_data(long)).mark_line(point=True).encode(
        x=alt.X("week_start:T", scale=_UTC, title="week (Monday, UTC)",
                axis=alt.Axis(format="%d %b")),
        y=alt.Y("drift_pct:Q", title="drift (%)"),
        color=alt.Color("measure:N", scale=_series_scale(names),
                        legend=alt.Legend(title=None, orient="top")),
        shape=alt.Shape("measure:N", scale=alt.Scale(domain=names, range=["circle", "square"]),
                        legend=alt.Legend(title=None, orient="top")),
        detail=alt.Detail("unit_id:N"),
        tooltip=[alt.Tooltip("unit_id:N"), alt.Tooltip("week_start:T"), alt.Tooltip("measure:N"),
                 alt.Tooltip("drift_pct:Q", format="+.1f")],
    ).properties(title=title, width=WIDTH, height=170)


def _long_measures(df: pl.DataFrame) -> pl.DataFrame:
    return pl.concat([
        df.select("unit_id", "week_start", drift_pct=pl.col("r_drift_pct"),
                  measure=pl.lit("R")),
        df.select("unit_id", "week_start", drift_pct=pl.col("k_e_drift_pct"),
                  measure=pl.lit("k_e"))]).drop_nulls("drift_pct")


def motor_drift_fleet_chart(df: pl.DataFrame, top: int = 20,
                            title: str = "Motor drift this week: units with the largest change"
                            ) -> alt.LayerChart | alt.Chart:
    """Dot plot of R and k_e drift (%) per unit for one week, the ``top`` units with the
    largest absolute drift. ``df``: views.motor_drift rows of one week (one row per unit)."""
    if df.height == 0:
        return empty_chart(title)
    ranked = (df.with_columns(worst=pl.max_horizontal(pl.col("r_drift_pct").abs(),
                                                      pl.col("k_e_drift_pct").abs()))
              .sort("worst", descending=True, nulls_last=True).head(top))
    order = ranked["unit_id"].to_list()
    long = _long_measures(ranked)
    names = ["R", "k_e"]
    pts = alt.Chart(_data(long)).mark_point(filled=True, size=60).encode(
        y=alt.Y("unit_id:N", sort=order, title=None),
        x=alt.X("drift_pct:Q", title="drift against reference weeks (%)"),
        color=alt.Color("measure:N", scale=_series_scale(names),
                        legend=alt.Legend(title=None, orient="top")),
        shape=alt.Shape("measure:N", scale=alt.Scale(domain=names, range=["circle", "square"]),
                        legend=alt.Legend(title=None, orient="top")),
        tooltip=[alt.Tooltip("unit_id:N"), alt.Tooltip("measure:N"),
                 alt.Tooltip("drift_pct:Q", format="+.1f")])
    zero = alt.Chart(pl.DataFrame({"x": [0.0]})).mark_rule(color="#999").encode(x=alt.X("x:Q"))
    sub = f"{len(order)} of {df.height} units shown" if df.height > len(order) else None
    return alt.layer(zero, pts).properties(
        title=alt.TitleParams(title, subtitle=sub) if sub else title,
        width=WIDTH - 80, height=max(60, 16 * len(order)))


# ----------------------------------------------------------------------------- energy, data
def energy_chart(df: pl.DataFrame, top: int = 40, title: str = "Input energy per unit"
                 ) -> alt.LayerChart | alt.Chart:
    """Bars of input energy (kWh), largest first, at most ``top`` units, each labelled with
    its kWh and, where measured, efficiency. ``df``: views.energy_summary."""
    if df.height == 0:
        return empty_chart(title)
    d = df.head(top).with_columns(
        label=pl.format("{} kWh", pl.col("energy_in_kwh").round(1))
        + pl.when(pl.col("efficiency_mean").is_not_null())
        .then(pl.format(", eff. {} %", (pl.col("efficiency_mean") * 100).round(1)))
        .otherwise(pl.lit("")))
    order = d["unit_id"].to_list()
    base = alt.Chart(_data(d)).encode(
        y=alt.Y("unit_id:N", sort=order, title=None),
        x=alt.X("energy_in_kwh:Q", title="input energy (kWh)"))
    bars = base.mark_bar(color=SERIES_COLOURS["trend"]).encode(
        tooltip=[alt.Tooltip("unit_id:N"), alt.Tooltip("energy_in_kwh:Q", format=".1f"),
                 alt.Tooltip("efficiency_mean:Q", format=".1%")])
    text = base.mark_text(align="left", dx=3, fontSize=10).encode(text=alt.Text("label:N"))
    sub = f"{len(order)} of {df.height} units (largest first)" if df.height > top else None
    return (bars + text).properties(
        title=alt.TitleParams(title, subtitle=sub) if sub else title,
        width=WIDTH - 160, height=max(60, 15 * len(order)))


def completeness_chart(df: pl.DataFrame, top: int = 40, target: float = 0.9,
                       title: str = "Data completeness per unit (lowest first)"
                       ) -> alt.LayerChart | alt.Chart:
    """Bars of completeness (samples received / expected), lowest first, at most ``top``
    units, with a target rule (default 90 %, common practice, no source) and % labels.
    ``df``: DataQuality.completeness."""
    if df.height == 0:
        return empty_chart(title)
    d = df.sort("completeness", "unit_id").head(top).with_columns(
        label=pl.format("{} %", (pl.col("completeness") * 100).round(1)))
    order = d["unit_id"].to_list()
    base = alt.Chart(_data(d)).encode(
        y=alt.Y("unit_id:N", sort=order, title=None),
        x=alt.X("completeness:Q", title="completeness", axis=alt.Axis(format=".0%"),
                scale=alt.Scale(domain=[0, 1.05])))
    bars = base.mark_bar(color=SERIES_COLOURS["reference"]).encode(
        tooltip=[alt.Tooltip("unit_id:N"), alt.Tooltip("completeness:Q", format=".1%"),
                 alt.Tooltip("days_with_data:Q")])
    text = base.mark_text(align="left", dx=3, fontSize=10).encode(text=alt.Text("label:N"))
    t = pl.DataFrame({"x": [target]})
    rule = alt.Chart(t).mark_rule(strokeDash=[5, 3], color="#000").encode(x=alt.X("x:Q"))
    sub = f"{len(order)} of {df.height} units; dashed line: {target:.0%}"
    return (bars + text + rule).properties(
        title=alt.TitleParams(title, subtitle=sub), width=WIDTH - 160,
        height=max(60, 15 * len(order)))
