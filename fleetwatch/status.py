"""Current status of every unit: the library side of ``fleetwatch status``.

``fleet_status(source)`` returns one dict per unit for its latest day in ``health``, with
exactly the keys ``unit_id, status, since, days_to_limit, reasons`` (``since`` as an ISO
date, ``days_to_limit`` null when no crossing is predicted), alert first, then watch, then
normal. ``fail_on_exit_code`` gives the exit code of ``--fail-on``; ``format_status_table``
draws the table for a terminal (the status word always printed, its colour only added).
"""
from __future__ import annotations

import datetime as dt
import io
from typing import Any, Iterable

import polars as pl

from .errors import EXIT_FAIL_ON, EXIT_OK, LakeError, UsageError
from .schema import STATUS_LEVELS

__all__ = ["fleet_status", "fail_on_exit_code", "format_status_table", "STATUS_KEYS",
           "render_status_table"]

STATUS_KEYS = ("unit_id", "status", "since", "days_to_limit", "reasons")
_RANK = {s: i for i, s in enumerate(STATUS_LEVELS)}
# Same hues as the dashboard (fleetwatch.dashboard.STATUS_COLOURS), never shown alone.
_COLOURS = {"normal": "#2d5f8b", "watch": "#e2a72e", "alert": "#b03a6f"}
_GLYPHS = {"normal": "○", "watch": "◐", "alert": "●"}


def _health_frame(source: Any) -> pl.DataFrame:
    """The health table from a DataFrame, a Lake (``read``) or Settings (``lake_path``)."""
    if isinstance(source, pl.DataFrame):
        return source
    if isinstance(source, pl.LazyFrame):
        return source.collect()
    lake = source
    if not hasattr(source, "read"):
        if not hasattr(source, "lake_path"):
            raise UsageError(f"fleet_status: cannot read health from {type(source).__name__}",
                             hint="Pass Settings, a Lake or the health table.")
        from .lake import Lake
        lake = Lake(source.lake_path)
    if hasattr(lake, "has_table") and not lake.has_table("health"):
        raise LakeError(f"no health table in the lake at {getattr(lake, 'path', '?')}",
                        hint="Ingest logs and run `fleetwatch analyze` first.")
    try:
        df = lake.read("health")
    except Exception as exc:
        raise LakeError(f"no health table in the lake ({exc})",
                        hint="Run `fleetwatch analyze` first.") from None
    return df.collect() if isinstance(df, pl.LazyFrame) else df


def fleet_status(source: Any) -> list[dict]:
    """Latest status of each unit: dicts with keys ``STATUS_KEYS``, worst first.

    ``source``: Settings, a Lake, or the health table itself. Raises LakeError when the
    lake has no health table (analyze has not run).
    """
    h = _health_frame(source)
    if h.height == 0:
        return []
    latest = (h.sort("unit_id", "day").group_by("unit_id", maintain_order=True).last()
              .with_columns(pl.col("status").replace_strict(_RANK, default=-1)
                            .alias("_rank")))
    latest = latest.sort(["_rank", "days_to_limit", "unit_id"], descending=[True, False, False],
                         nulls_last=True)
    rows = []
    for r in latest.iter_rows(named=True):
        since = r["since"]
        dtl = r["days_to_limit"]
        rows.append({
            "unit_id": r["unit_id"],
            "status": r["status"],
            "since": since.isoformat() if isinstance(since, dt.date) else since,
            "days_to_limit": None if dtl is None else round(float(dtl), 1),
            "reasons": r["reasons"],
        })
    return rows


def fail_on_exit_code(rows: Iterable[dict], fail_on: str | None) -> int:
    """3 when a unit is at or above ``fail_on`` ('watch' or 'alert'), else 0.

    Raises UsageError for any other level.
    """
    if fail_on is None:
        return EXIT_OK
    if fail_on not in ("watch", "alert"):
        raise UsageError(f"--fail-on must be 'watch' or 'alert', got '{fail_on}'",
                         hint="Use --fail-on watch or --fail-on alert.")
    need = _RANK[fail_on]
    return EXIT_FAIL_ON if any(_RANK.get(r["status"], -1) >= need for r in rows) else EXIT_OK


def render_status_table(rows: list[dict], console=None) -> None:
    """Print the status table with rich: the status word, a glyph, and its colour."""
    from rich.console import Console
    from rich.table import Table
    from rich.text import Text

    console = console or Console()
    t = Table(title="Fleet status (latest day)", show_lines=False, expand=False)
    for col, kw in (("unit", {}), ("status", {}), ("since", {}),
                    ("days to limit", {"justify": "right"}), ("reasons", {"overflow": "fold"})):
        t.add_column(col, **kw)
    for r in rows:
        st = r["status"]
        word = Text(f"{_GLYPHS.get(st, '?')} {st}", style=f"bold {_COLOURS.get(st, '')}".strip())
        dtl = "-" if r["days_to_limit"] is None else f"{r['days_to_limit']:.0f}"
        # Text, not markup: reasons carry their evidence in [brackets]
        t.add_row(Text(str(r["unit_id"])), word, Text(str(r["since"] or "-")), Text(dtl),
                  Text(r["reasons"] or ""))
    console.print(t)
    counts = {s: sum(1 for r in rows if r["status"] == s) for s in STATUS_LEVELS}
    console.print(f"{len(rows)} units: " + ", ".join(f"{counts[s]} {s}" for s in
                                                     reversed(STATUS_LEVELS)))


def format_status_table(rows: list[dict], width: int = 160, color: bool = False) -> str:
    """The status table as text (for the demo and logs)."""
    from rich.console import Console

    buf = io.StringIO()
    console = Console(file=buf, width=width, force_terminal=color, color_system=None
                      if not color else "auto", highlight=False)
    render_status_table(rows, console)
    return buf.getvalue()
