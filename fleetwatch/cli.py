"""Command layer: parse options, call one library function, print, exit.

Each command is a thin wrapper; the work lives in the library (style.md 1). Expected
failures are ``FleetwatchError``s: one handler in ``main`` prints ``Error: ...`` and
``Hint: ...`` on stderr and exits with the error's code (0 ok, 1 bad input or data,
2 usage, 3 a --fail-on condition met). ``--json`` prints only JSON on stdout.
"""
from __future__ import annotations

import sys
from pathlib import Path
from typing import Any, Optional

import typer

from . import __version__, _json
from .config import CONFIG_FILE, find_project, load_settings, write_default_toml
from .errors import FleetwatchError, UsageError

app = typer.Typer(
    name="fleetwatch",
    help="Condition monitoring for fleets of variable-ratio friction drives: ingest drive "
         "logs, compute slip and efficiency, flag wear and slip, forecast wear limits, report.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
    context_settings={"help_option_names": ["-h", "--help"]},
)


# ---------------------------------------------------------------- shared helpers
def _project(ctx: typer.Context) -> Optional[str]:
    obj = ctx.find_root().obj or {}
    return obj.get("project")


def _settings(ctx: typer.Context, **overrides: Any):
    """Settings for this call: defaults < fleetwatch.toml < env < these CLI overrides."""
    return load_settings(_project(ctx), overrides=overrides)


def _err(msg: str) -> None:
    typer.echo(msg, err=True)


def _print_json(obj: Any) -> None:
    typer.echo(_json.dumps(obj))


def progress_bar(description: str, enabled: bool = True):
    """A progress callback ``(done, total)`` drawing a bar on a terminal's stderr.

    Returns ``(callback, close)``. Off when stderr is not a terminal or ``enabled`` is False,
    so ``--json`` and pipes get nothing extra.
    """
    if not enabled or not sys.stderr.isatty():
        return None, (lambda: None)
    from rich.console import Console
    from rich.progress import BarColumn, Progress, TextColumn, TimeRemainingColumn

    prog = Progress(TextColumn("{task.description}"), BarColumn(),
                    TextColumn("{task.completed}/{task.total}"), TimeRemainingColumn(),
                    console=Console(stderr=True), transient=True)
    task = prog.add_task(description, total=None)
    prog.start()

    def cb(done: int, total: int | None = None) -> None:
        prog.update(task, completed=done, total=total)

    return cb, prog.stop


def _print_version(value: bool) -> None:
    if value:
        typer.echo(__version__)
        raise typer.Exit(0)


@app.callback()
def _root(
    ctx: typer.Context,
    project: Optional[str] = typer.Option(
        None, "--project", "-p", help="Project folder (default: $FLEETWATCH_PROJECT, else the "
        "current folder).", envvar=None),
    version: bool = typer.Option(False, "--version", help="Print the version and exit.",
                                 is_eager=True, callback=_print_version),
) -> None:
    """fleetwatch: advice for maintenance teams; local codes and qualified people decide."""
    ctx.obj = {"project": project}


# ---------------------------------------------------------------- init
@app.command("init")
def init_cmd(
    ctx: typer.Context,
    directory: Optional[Path] = typer.Argument(
        None, help="Folder to create the project in (default: the project folder)."),
) -> None:
    """Create a project folder with a commented fleetwatch.toml holding every default."""
    root = Path(directory).resolve() if directory else find_project(_project(ctx))
    root.mkdir(parents=True, exist_ok=True)
    path = write_default_toml(root / CONFIG_FILE)
    _err(f"Wrote {path}")
    _err(f"Next: fleetwatch --project {root} ingest --mapping MAPPING.toml LOGS...")


# ---------------------------------------------------------------- simulate
@app.command("simulate")
def simulate_cmd(
    out: Path = typer.Option(..., "--out", help="Folder to write the demo fleet into."),
    units: int = typer.Option(24, "--units", min=1, help="Number of drives."),
    days: int = typer.Option(120, "--days", min=1, help="Days of logs."),
    period_s: float = typer.Option(60.0, "--period-s", min=1.0, help="Logging period in s."),
    seed: int = typer.Option(7, "--seed", help="Random seed (same seed, same files)."),
    start: str = typer.Option("2026-06-01", "--start", help="First day (YYYY-MM-DD, UTC)."),
    as_json: bool = typer.Option(False, "--json", help="Print only JSON on stdout."),
) -> None:
    """Write a physics-based demo fleet (CSV logs, maintenance log, answer key)."""
    from .simulate import simulate_fleet

    cb, close = progress_bar("simulating", enabled=not as_json)
    try:
        res = simulate_fleet(out, units=units, days=days, period_s=period_s, seed=seed,
                             start=start, progress=cb)
    finally:
        close()
    info = {"out_dir": str(res.out_dir), "files": [str(f) for f in res.files],
            "rows": res.rows, "answer_key": str(res.answer_key), "elapsed_s": res.elapsed_s}
    if as_json:
        _print_json(info)
    else:
        typer.echo(f"Wrote {len(res.files)} files, {res.rows:,} rows, into {res.out_dir} "
                   f"in {res.elapsed_s:.1f} s")
        typer.echo(f"Answer key: {res.answer_key}")


# ---------------------------------------------------------------- demo
@app.command("demo")
def demo_cmd(
    ctx: typer.Context,
    units: int = typer.Option(24, "--units", min=1, help="Number of demo drives."),
    days: int = typer.Option(120, "--days", min=1, help="Days of demo logs."),
    seed: int = typer.Option(7, "--seed", help="Random seed of the demo fleet."),
    serve: bool = typer.Option(True, "--serve/--no-serve",
                               help="Start the dashboard at the end (when available)."),
) -> None:
    """Build the demo: simulate a fleet into a project folder and run the whole job on it."""
    from .demo import run_demo

    run_demo(_project(ctx), units=units, days=days, seed=seed, serve=serve, echo=typer.echo)


# ---------------------------------------------------------------- dashboard
@app.command("dashboard")
def dashboard_cmd(
    ctx: typer.Context,
    host: Optional[str] = typer.Option(
        None, "--host", help="Address to listen on (default: the dashboard_host setting, "
        "127.0.0.1: this machine only)."),
    port: Optional[int] = typer.Option(
        None, "--port", min=1, max=65535,
        help="Port to listen on (default: the dashboard_port setting, 8501)."),
) -> None:
    """Serve the read-only Streamlit dashboard for the project; prints its address."""
    from .dashboard import serve_dashboard

    settings = _settings(ctx, dashboard_host=host, dashboard_port=port)
    server = serve_dashboard(settings, block=True, echo=typer.echo)
    code = server.process.returncode
    raise typer.Exit(code if code and code > 0 else 0)


# ---------------------------------------------------------------- ingest
@app.command("ingest")
def ingest_cmd(
    ctx: typer.Context,
    paths: list[str] = typer.Argument(..., help="Files, folders (searched recursively) or "
                                      "globs: CSV (.csv, .csv.gz), Parquet, NDJSON."),
    mapping: Optional[Path] = typer.Option(None, "--mapping", "-m",
                                           help="Column mapping file (TOML)."),
    kind: str = typer.Option("telemetry", "--kind", help="telemetry or maintenance."),
    strict: bool = typer.Option(False, "--strict",
                                help="Exit 1 when any row was quarantined."),
    as_json: bool = typer.Option(False, "--json", help="Print only JSON on stdout."),
) -> None:
    """Ingest drive logs (or the maintenance log) into the lake, with row accounting."""
    from .ingest import ingest_files

    settings = _settings(ctx)
    cb, close = progress_bar("ingesting", enabled=not as_json)
    try:
        rep = ingest_files(paths, settings, mapping=mapping, kind=kind, strict=strict,
                           progress=(lambda _path, done, total: cb(done, total)) if cb else None)
    finally:
        close()
    if as_json:
        _print_json(rep.to_dict())
    else:
        typer.echo(f"{'file':<40} {'status':<8} {'read':>9} {'accepted':>9} "
                   f"{'quarant.':>9} {'dupl.':>9}  message")
        for f in rep.files:
            name = Path(f.path).name
            typer.echo(f"{name[-40:]:<40} {f.status:<8} {f.rows_read:>9} {f.accepted:>9} "
                       f"{f.quarantined:>9} {f.duplicates:>9}  {f.message}")
        t = rep.totals
        typer.echo(f"{'total':<40} {'':<8} {t['rows_read']:>9} {t['accepted']:>9} "
                   f"{t['quarantined']:>9} {t['duplicates']:>9}  {t['files_ok']} ok, "
                   f"{t['files_skipped']} skipped, {t['files_refused']} refused")
        for n in rep.notes:
            _err(f"Note: {n}")
        for e in rep.errors:
            _err(f"Error: {e}")
    raise typer.Exit(rep.exit_code)


# ---------------------------------------------------------------- analyze
@app.command("analyze")
def analyze_cmd(
    ctx: typer.Context,
    full: bool = typer.Option(False, "--full", help="Rebuild every derived row (default: only "
                              "the days with new telemetry)."),
    as_json: bool = typer.Option(False, "--json", help="Print only JSON on stdout."),
) -> None:
    """Compute windows, events, unit_days and the fits, then the health models."""
    from .analyze import analyze

    cb, close = progress_bar("analyzing", enabled=not as_json)
    try:
        rep = analyze(_settings(ctx), full=full, progress=cb)
    finally:
        close()
    if as_json:
        _print_json(rep.as_dict())
        return
    if rep.from_day is None:
        typer.echo(f"Nothing to recompute: {rep.reason}.")
    else:
        typer.echo(f"Recomputed {rep.days_recomputed} days of {rep.units} units from "
                   f"{rep.from_day} ({rep.reason}):")
        for name, rows in rep.tables.items():
            typer.echo(f"  {name:<12} {rows:>10} rows")
    typer.echo(f"{rep.models[:1].upper() + rep.models[1:]}. Took {rep.elapsed_s:.1f} s.")


# ---------------------------------------------------------------- sql
@app.command("sql")
def sql_cmd(
    ctx: typer.Context,
    query: Optional[str] = typer.Argument(None, help="One SELECT; omit it for a prompt."),
    fmt: str = typer.Option("table", "--format", "-f", help="table, csv, json or parquet."),
    out: Optional[Path] = typer.Option(None, "--out", "-o", help="Write the result here."),
    row_cap: Optional[int] = typer.Option(None, "--row-cap", min=0,
                                          help="Rows returned at most (sql_row_cap)."),
    time_limit_s: Optional[float] = typer.Option(None, "--time-limit-s", min=0.0,
                                                 help="Time limit in s (sql_time_limit_s)."),
) -> None:
    """Read-only SQL over the lake's views (sandboxed: no files, settings locked)."""
    from .query import FORMATS, format_result, run_query, sql_shell

    if fmt not in FORMATS:
        raise UsageError(f"unknown format '{fmt}'", hint="Use " + ", ".join(FORMATS) + ".")
    settings = _settings(ctx, sql_row_cap=row_cap, sql_time_limit_s=time_limit_s)
    if query is None:
        raise typer.Exit(1 if sql_shell(settings, fmt=fmt) else 0)
    if fmt == "parquet" and out is None:
        raise UsageError("--format parquet needs --out FILE")
    res = run_query(query, settings=settings)
    text = format_result(res, fmt, out)
    if text is not None:
        typer.echo(text)
    else:
        _err(f"Wrote {res.rows.height} rows to {out}")
    if res.truncated and fmt != "table":
        _err(f"Note: only the first {res.row_cap} rows (sql_row_cap); the result was truncated")


# ---------------------------------------------------------------- compact
@app.command("compact")
def compact_cmd(
    ctx: typer.Context,
    retention_hours: Optional[float] = typer.Option(
        None, "--retention-hours", min=0.0,
        help="Remove table versions older than this (default: retention_hours setting)."),
    as_json: bool = typer.Option(False, "--json", help="Print only JSON on stdout."),
) -> None:
    """Compact the lake's small files and vacuum old versions (row counts unchanged)."""
    from .lake import compact_lake

    res = compact_lake(_settings(ctx), retention_hours=retention_hours)
    if as_json:
        _print_json(res)
        return
    for name, r in res.items():
        typer.echo(f"{name:<14} rows {r['rows']:>10}  files {r['files_before']:>5} -> "
                   f"{r['files_after']:<5} removed {r['removed_files']:>5}  version {r['version']}")


# ---------------------------------------------------------------- report
@app.command("report")
def report_cmd(
    ctx: typer.Context,
    week: Optional[str] = typer.Option(
        None, "--week", help="ISO 8601 week YYYY-Www (default: the last complete week in "
        "plant_timezone)."),
    out: Optional[Path] = typer.Option(
        None, "--out", help="Folder that receives YYYY-Www/ (default: reports_dir)."),
    pdf: bool = typer.Option(False, "--pdf", help="Also print report.pdf with headless "
                             "Chromium."),
    as_json: bool = typer.Option(False, "--json", help="Print only JSON on stdout."),
) -> None:
    """Write the weekly wear report: report.html, actions.csv, summary.json (and PDF)."""
    from .report import build_report

    res = build_report(_settings(ctx), week=week, out_dir=out, pdf=pdf)
    if as_json:
        _print_json({"week": res.week, "paths": {k: str(v) for k, v in res.paths.items()},
                     "summary": res.summary})
        return
    c = res.summary["counts"]
    typer.echo(f"Report {res.week}: {c.get('alert', 0)} alert, {c.get('watch', 0)} watch, "
               f"{c.get('normal', 0)} normal; "
               f"{len(res.summary['units_needing_action'])} units need action.")
    for key in ("html", "actions", "summary", "pdf"):
        if key in res.paths:
            typer.echo(f"  {res.paths[key]}")


# ---------------------------------------------------------------- status
@app.command("status")
def status_cmd(
    ctx: typer.Context,
    as_json: bool = typer.Option(False, "--json", help="Print only JSON on stdout: a list of "
                                 "{unit_id, status, since, days_to_limit, reasons}."),
    fail_on: Optional[str] = typer.Option(
        None, "--fail-on", help="Exit 3 when a unit is at or above this level: watch or alert."),
) -> None:
    """Current status of every drive (latest day): status, since, days to limit, reasons."""
    from .status import fail_on_exit_code, fleet_status, render_status_table

    fail_on_exit_code([], fail_on)          # a bad level is a usage error before any work
    rows = fleet_status(_settings(ctx))
    if as_json:
        _print_json(rows)
    else:
        render_status_table(rows)
    raise typer.Exit(fail_on_exit_code(rows, fail_on))


# ---------------------------------------------------------------- evaluate
@app.command("evaluate")
def evaluate_cmd(
    ctx: typer.Context,
    truth: Path = typer.Option(..., "--truth", help="answer_key.json written by "
                               "`fleetwatch simulate`."),
    as_json: bool = typer.Option(False, "--json", help="Print only JSON on stdout."),
) -> None:
    """Score the health statuses against a simulator answer key (detections, lead time,
    false alerts, return to normal after replacement)."""
    from .evaluate import evaluate_detection, format_evaluation

    res = evaluate_detection(_settings(ctx), truth)
    if as_json:
        _print_json(res)
    else:
        typer.echo(format_evaluation(res), nl=False)


# ---------------------------------------------------------------- advise
@app.command("advise")
def advise_cmd(
    ctx: typer.Context,
    as_json: bool = typer.Option(False, "--json", help="Print only JSON on stdout: the fleet's "
                                 "weekly saving with its interval, per-unit savings and the "
                                 "advice rows that change a ratio."),
) -> None:
    """Advise the least-power ratio per unit and duty; store `advice` and `torque_estimates`."""
    from .advisor import advise, format_advice

    res = advise(_settings(ctx), write=True)
    if as_json:
        _print_json(res.summary)
    else:
        typer.echo(format_advice(res))


# ---------------------------------------------------------------- entry point
def main(argv: list[str] | None = None) -> int:
    """Run the CLI; map expected errors to ``Error:``/``Hint:`` lines and exit codes."""
    try:
        app(args=argv, prog_name="fleetwatch", standalone_mode=True)
    except FleetwatchError as exc:
        _err(f"Error: {exc.message}")
        if exc.hint:
            _err(f"Hint: {exc.hint}")
        sys.exit(exc.exit_code)
    except KeyboardInterrupt:
        _err("Error: interrupted")
        sys.exit(130)
    return 0


if __name__ == "__main__":  # pragma: no cover
    main()
