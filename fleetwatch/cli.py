"""Command layer: parse options, call one library function, print, exit.

Each command is a thin wrapper; the work lives in the library (style.md 1). Expected
failures are ``FleetwatchError``s: one handler in ``main`` prints ``Error: ...`` and
``Hint: ...`` on stderr and exits with the error's code (0 ok, 1 bad input or data,
2 usage, 3 a --fail-on condition met). ``--json`` prints only JSON on stdout.
"""
from __future__ import annotations

import json
import sys
from pathlib import Path
from typing import Any, Optional

import typer

from . import __version__
from .config import CONFIG_FILE, find_project, load_settings, write_default_toml
from .errors import EXIT_USAGE, FleetwatchError, UsageError

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
    typer.echo(json.dumps(obj, indent=2, default=_json_default))


def _json_default(o: Any) -> Any:
    import datetime as _dt
    if isinstance(o, _dt.datetime):
        if o.tzinfo is not None:
            o = o.astimezone(_dt.timezone.utc)
            return o.isoformat().replace("+00:00", "Z")
        return o.isoformat()
    if isinstance(o, (_dt.date,)):
        return o.isoformat()
    if isinstance(o, Path):
        return str(o)
    if hasattr(o, "item"):
        return o.item()
    raise TypeError(f"not JSON serialisable: {type(o).__name__}")


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
