"""Guarded ad-hoc SQL: the one function behind `fleetwatch sql` and the dashboard console.

Every query gets a fresh in-memory DuckDB holding only the lake's views (Arrow datasets of
the current snapshot, see lake.py), then the lock-down of stack.md section 2 before the
user's SQL runs: no file access, no extension loading, no replacement scans of Python
variables, memory and thread limits, configuration locked. Only one SELECT (WITH, DESCRIBE,
SHOW, SUMMARIZE, VALUES count as SELECT) or EXPLAIN of one is accepted. A timer interrupts
the query after ``sql_time_limit_s``; at most ``sql_row_cap`` rows come back, with
``truncated`` set when there were more.
"""
from __future__ import annotations

import csv
import io
import json
import math
import os
import re
import sys
import threading
import time
from dataclasses import dataclass
from datetime import date, datetime, timezone
from pathlib import Path
from typing import IO, Any

import duckdb
import polars as pl
import pyarrow as pa

from .errors import QueryError, UsageError
from .lake import Lake

__all__ = ["QueryResult", "run_query", "check_statement", "format_result", "sql_shell",
           "FORMATS", "to_json_rows"]

FORMATS = ("table", "csv", "json", "parquet")

# statement type (DuckDB's extract_statements) -> why it is refused
_REFUSED = {
    "COPY": "COPY would read or write files",
    "EXPORT": "EXPORT would write files",
    "ATTACH": "ATTACH would open another database",
    "DETACH": "DETACH would change the session",
    "LOAD": "INSTALL/LOAD would add extensions",
    "SET": "SET/RESET/USE would change settings, which are locked",
    "PRAGMA": "PRAGMA would change or inspect settings, which are locked",
    "CREATE": "CREATE would change the database",
    "INSERT": "INSERT would change data",
    "UPDATE": "UPDATE would change data",
    "DELETE": "DELETE would change data",
    "DROP": "DROP would change the database",
    "ALTER": "ALTER would change the database",
    "CALL": "CALL runs procedures",
    "TRANSACTION": "transactions are not needed for reading",
    "VACUUM": "VACUUM/ANALYZE would change the database",
    "MULTI": "this statement expands into several statements",
}
_EXPLAIN_PREFIX = re.compile(r"^\s*EXPLAIN\s+(?:ANALY[SZ]E\s+|\([^)]*\)\s*)?", re.I)


@dataclass
class QueryResult:
    """Result of one guarded query: ``rows`` holds at most ``row_cap`` rows."""
    columns: list[str]
    rows: pl.DataFrame
    truncated: bool
    elapsed_s: float
    row_cap: int | None = None

    def to_json_rows(self) -> list[dict]:
        return to_json_rows(self.rows)


def check_statement(con: duckdb.DuckDBPyConnection, sql: str) -> str:
    """Statement type of ``sql`` (SELECT or EXPLAIN) or QueryError saying why it is refused."""
    try:
        stmts = con.extract_statements(sql)
    except duckdb.Error as exc:
        raise QueryError(f"the query does not parse: {_first_line(exc)}",
                         hint="Check the SQL syntax (DuckDB dialect).") from None
    if not stmts:
        raise QueryError("the query is empty", hint="Write one SELECT statement.")
    if len(stmts) > 1:
        raise QueryError(f"only a single statement is allowed here; got {len(stmts)}",
                         hint="Run one SELECT at a time (remove the extra ';' statements).")
    kind = stmts[0].type.name
    if kind == "EXPLAIN":
        inner_sql = _EXPLAIN_PREFIX.sub("", sql, count=1)
        try:
            inner = con.extract_statements(inner_sql)
        except duckdb.Error:
            inner = []
        if len(inner) != 1 or inner[0].type.name != "SELECT":
            what = inner[0].type.name if len(inner) == 1 else ""
            why = _REFUSED.get(what, "the explained statement is not a single SELECT")
            raise QueryError(f"only EXPLAIN of a single SELECT is allowed here; {why}",
                             hint="EXPLAIN a SELECT over the views.")
        return kind
    if kind != "SELECT":
        why = _REFUSED.get(kind, "it is not a query")
        raise QueryError(f"only a single SELECT is allowed here; {kind} refused: {why}",
                         hint="The SQL console is read only: SELECT from the views "
                              "(telemetry, quarantine, batches, health, ...).")
    return kind


def _lock_down(con: duckdb.DuckDBPyConnection, memory_limit: str, threads: int) -> None:
    for stmt in (f"SET memory_limit='{memory_limit}'",
                 f"SET threads={int(threads)}",
                 "SET temp_directory=''",
                 "SET autoinstall_known_extensions=false",
                 "SET autoload_known_extensions=false",
                 "SET allow_community_extensions=false",
                 "SET python_enable_replacements=false",
                 "SET enable_external_access=false",
                 "SET lock_configuration=true"):
        con.execute(stmt)


def _first_line(exc: Exception) -> str:
    return str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__


def _dedupe_names(names: list[str]) -> list[str]:
    seen: dict[str, int] = {}
    out = []
    for n in names:
        if n in seen:
            seen[n] += 1
            n2 = f"{n}_{seen[n]}"
            while n2 in seen:
                seen[n] += 1
                n2 = f"{n}_{seen[n]}"
            seen[n2] = 0
            out.append(n2)
        else:
            seen[n] = 0
            out.append(n)
    return out


def _to_polars(tbl: pa.Table) -> pl.DataFrame:
    tbl = tbl.rename_columns(_dedupe_names(tbl.column_names))
    try:
        df = pl.from_arrow(tbl)
    except Exception:
        cols = []
        for c in tbl.columns:
            try:
                pl.from_arrow(pa.table({"x": c}))
                cols.append(c)
            except Exception:
                cols.append(pa.chunked_array([[None if v is None else str(v)
                                               for v in c.to_pylist()]], pa.string()))
        df = pl.from_arrow(pa.Table.from_arrays(cols, names=tbl.column_names))
    if isinstance(df, pl.Series):
        df = df.to_frame()
    fixes = [pl.col(n).dt.convert_time_zone("UTC") for n, t in df.schema.items()
             if isinstance(t, pl.Datetime) and t.time_zone not in (None, "UTC")]
    return df.with_columns(fixes) if fixes else df


def run_query(sql: str, settings=None, lake: Lake | None = None, row_cap: int | None = None,
              time_limit_s: float | None = None) -> QueryResult:
    """Run one read-only query over the lake's views, sandboxed.

    ``row_cap`` (default sql_row_cap) and ``time_limit_s`` (default sql_time_limit_s) bound
    the work; rows beyond the cap are not fetched and ``truncated`` is set. Raises
    QueryError when the statement is refused (not a single SELECT/EXPLAIN, file access,
    settings), fails, runs out of time or memory.
    """
    if lake is None and settings is None:
        raise UsageError("run_query needs settings or a lake")
    if lake is None:
        lake = Lake.from_settings(settings)
    cap = int(row_cap if row_cap is not None else getattr(settings, "sql_row_cap", 10_000))
    limit_s = float(time_limit_s if time_limit_s is not None
                    else getattr(settings, "sql_time_limit_s", 30.0))
    memory = str(getattr(settings, "sql_memory_limit", "1GB"))
    if cap < 0:
        raise UsageError("row cap must be >= 0")
    if not re.fullmatch(r"\s*\d+(\.\d+)?\s*[KMGT]i?B\s*", memory, re.I):
        raise UsageError(f"sql_memory_limit {memory!r} is not a size such as 1GB or 512MB")
    if not isinstance(sql, str) or not sql.strip():
        raise QueryError("the query is empty", hint="Write one SELECT statement.")

    t0 = time.perf_counter()
    con = lake.connect()
    try:
        views = [r[0] for r in con.execute(
            "SELECT view_name FROM duckdb_views() WHERE NOT internal ORDER BY 1").fetchall()]
        _lock_down(con, memory, min(4, os.cpu_count() or 1))
        kind = check_statement(con, sql)
        timer = threading.Timer(limit_s, con.interrupt) if limit_s > 0 else None
        if timer:
            timer.daemon = True
            timer.start()
        try:
            rel = con.sql(sql)
            if rel is None:
                raise QueryError("the statement returned no rows",
                                 hint="Write a SELECT over the views.")
            if kind == "SELECT":
                bad = [i for i, t in enumerate(rel.types) if str(t).upper().startswith("INTERVAL")]
                if bad:
                    exprs = [f'CAST("{c}" AS VARCHAR) AS "{c}"' if i in bad else f'"{c}"'
                             for i, c in enumerate(rel.columns)]
                    if len(set(rel.columns)) == len(rel.columns):
                        rel = rel.project(", ".join(exprs))
                tbl = rel.limit(cap + 1).to_arrow_table()
            else:
                tbl = rel.to_arrow_table()
        except duckdb.InterruptException:
            raise QueryError(f"query stopped after {limit_s:g} s (sql_time_limit_s)",
                             hint="Filter on unit_id and day, aggregate, or raise "
                                  "sql_time_limit_s.") from None
        except duckdb.PermissionException as exc:
            raise QueryError("file access is disabled in the SQL console "
                             f"({_first_line(exc)})",
                             hint="Query the views instead: " + ", ".join(views) + ".") from None
        except duckdb.OutOfMemoryException:
            raise QueryError(f"the query needs more memory than sql_memory_limit ({memory})",
                             hint="Aggregate or filter more, or raise sql_memory_limit.") from None
        except duckdb.Error as exc:
            msg = _first_line(exc)
            if "configuration has been locked" in str(exc):
                msg = "settings are locked in the SQL console"
            raise QueryError(f"the query failed: {msg}",
                             hint="Views: " + (", ".join(views) or "(none yet: ingest first)")
                                  + ". Use DESCRIBE <view> to see its columns.") from None
        finally:
            if timer:
                timer.cancel()
    finally:
        con.close()
    truncated = kind == "SELECT" and tbl.num_rows > cap
    if truncated:
        tbl = tbl.slice(0, cap)
    df = _to_polars(tbl)
    return QueryResult(columns=list(df.columns), rows=df, truncated=truncated,
                       elapsed_s=time.perf_counter() - t0, row_cap=cap)


# ------------------------------------------------------------------------------- output

def _json_value(v: Any) -> Any:
    if isinstance(v, datetime):
        if v.tzinfo is not None:
            return v.astimezone(timezone.utc).isoformat().replace("+00:00", "Z")
        return v.isoformat()
    if isinstance(v, date):
        return v.isoformat()
    if isinstance(v, float) and not math.isfinite(v):
        return None
    if isinstance(v, (bytes, bytearray)):
        return v.hex()
    if isinstance(v, dict):
        return {str(k): _json_value(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_json_value(x) for x in v]
    if isinstance(v, (int, float, str, bool)) or v is None:
        return v
    return str(v)


def to_json_rows(df: pl.DataFrame) -> list[dict]:
    """Rows as JSON-ready dicts: timestamps ISO 8601 in UTC ('Z'), NaN/inf as null."""
    return [{k: _json_value(v) for k, v in row.items()} for row in df.iter_rows(named=True)]


def format_result(result: QueryResult, fmt: str = "table", out: str | os.PathLike | None = None
                  ) -> str | None:
    """Render a result as table, csv or json text, or write it to ``out``.

    parquet needs ``out``. Returns the text (None when written to a file).
    Raises UsageError for an unknown format or parquet without ``out``.
    """
    if fmt not in FORMATS:
        raise UsageError(f"unknown format '{fmt}'", hint="Use " + ", ".join(FORMATS) + ".")
    if fmt == "parquet":
        if not out:
            raise UsageError("--format parquet needs --out FILE")
        result.rows.write_parquet(out)
        return None
    if fmt == "json":
        text = json.dumps(to_json_rows(result.rows), ensure_ascii=False, indent=None)
    elif fmt == "csv":
        buf = io.StringIO()
        w = csv.writer(buf, lineterminator="\n")
        w.writerow(result.columns)
        for row in to_json_rows(result.rows):
            w.writerow(["" if v is None else v for v in row.values()])
        text = buf.getvalue().rstrip("\n")
    else:
        text = _table_text(result)
    if out:
        Path(out).write_text(text + "\n", encoding="utf-8")
        return None
    return text


def _table_text(result: QueryResult) -> str:
    rows = [[("" if v is None else str(v)) for v in r.values()]
            for r in to_json_rows(result.rows)]
    cols = result.columns
    widths = [min(60, max([len(c)] + [len(r[i]) for r in rows])) for i, c in enumerate(cols)]

    def fmt_row(vals):
        return " | ".join(v[:w].ljust(w) for v, w in zip(vals, widths))

    lines = [fmt_row(cols), "-+-".join("-" * w for w in widths)]
    lines += [fmt_row(r) for r in rows]
    note = f"({result.rows.height} row{'s' if result.rows.height != 1 else ''}"
    if result.truncated:
        note += f", truncated at the row cap of {result.row_cap}"
    note += f", {result.elapsed_s:.2f} s)"
    lines.append(note)
    return "\n".join(lines)


def sql_shell(settings, fmt: str = "table", stdin: IO[str] | None = None,
              stdout: IO[str] | None = None, stderr: IO[str] | None = None) -> int:
    """Interactive prompt: read lines until ';', run each query, '.quit' (or end of input)
    exits. Errors are printed and the prompt continues. Returns the number of failed
    queries."""
    stdin = stdin or sys.stdin
    stdout = stdout or sys.stdout
    stderr = stderr or sys.stderr
    tty = hasattr(stdin, "isatty") and stdin.isatty()
    lake = Lake.from_settings(settings)
    failures = 0
    buf: list[str] = []
    if tty:
        stderr.write("fleetwatch sql: read-only views over the lake. End a query with ';', "
                     "'.quit' exits.\n")
    while True:
        if tty:
            stderr.write("sql> " if not buf else "...> ")
            stderr.flush()
        line = stdin.readline()
        if not line:
            break
        if not buf and line.strip() in (".quit", ".exit", "\\q"):
            break
        buf.append(line)
        text = "".join(buf)
        if not text.strip():
            buf = []
            continue
        if not text.rstrip().endswith(";"):
            continue
        buf = []
        from .errors import FleetwatchError
        try:
            res = run_query(text.strip().rstrip(";"), settings=settings, lake=lake)
            if fmt == "parquet":
                raise UsageError("parquet output is not available at the prompt",
                                 hint="Use fleetwatch sql QUERY --format parquet --out FILE.")
            stdout.write(format_result(res, fmt) + "\n")
            stdout.flush()
        except FleetwatchError as exc:
            failures += 1
            stderr.write(f"Error: {exc.message}\n")
            if exc.hint:
                stderr.write(f"Hint: {exc.hint}\n")
    return failures
