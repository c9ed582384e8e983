"""The SQL models in ``fleetwatch/sql/``: load, check and run them.

Each ``.sql`` file is one model: plain DuckDB SQL an engineer can paste into a shell, with
parameters written as DuckDB named parameters (``$window_min``). The file opens with a
header comment block::

    -- name: windows
    -- Free text: what the model computes and why (any number of lines).
    -- reads: samples, motor_constants
    -- param: window_min  min  Length of the aggregation interval.
    -- param: from_ts  UTC  runtime: start of the recompute range (inclusive).
    -- column: unit_id  -  Drive.

``reads`` names the views the body reads (base tables, other models, or views that
``analyze`` registers from Python); the loader orders the models by it. A ``param`` is
either a setting of ``fleetwatch.config.SETTINGS`` (its unit must match the registry) or a
*runtime* parameter that the caller supplies (its help starts with ``runtime:``).

``load_models()`` checks every file when it loads and raises ``SqlModelError`` pointing at
``file:line`` when a ``$name`` is used but not declared, declared but not used, unknown to
the settings registry, declared with the wrong unit, or when the body does not parse.
"""
from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path
from typing import Any, Iterable, Mapping

from .config import SETTINGS
from .errors import ModelError

__all__ = ["SqlModel", "SqlParam", "SqlColumn", "SqlModelError", "SQL_DIR", "load_models",
           "model", "model_params", "run_model", "samples_frame", "run_samples"]

SQL_DIR = Path(__file__).with_name("sql")

_HEADER_KEYS = ("name", "reads", "param", "column")
_KEY_RE = re.compile(r"^--\s*(name|reads|param|column)\s*:\s*(.*)$")
_PARAM_USE_RE = re.compile(r"\$([A-Za-z_][A-Za-z0-9_]*)")


class SqlModelError(ModelError):
    """A SQL model file is malformed or inconsistent (message starts with ``file:line``)."""


@dataclass(frozen=True)
class SqlParam:
    name: str
    unit: str
    help: str
    line: int
    runtime: bool


@dataclass(frozen=True)
class SqlColumn:
    name: str
    unit: str
    help: str


@dataclass(frozen=True)
class SqlModel:
    """One model file: ``sql`` is the whole file text (header comments included)."""

    name: str
    description: str
    reads: tuple[str, ...]
    params: tuple[SqlParam, ...]
    columns: tuple[SqlColumn, ...]
    sql: str
    path: Path
    body_line: int = field(default=1)

    @property
    def param_names(self) -> list[str]:
        return [p.name for p in self.params]

    @property
    def setting_params(self) -> list[str]:
        return [p.name for p in self.params if not p.runtime]

    @property
    def runtime_params(self) -> list[str]:
        return [p.name for p in self.params if p.runtime]

    def where(self, line: int) -> str:
        return f"{self.path}:{line}"


def _err(path: Path, line: int, msg: str, hint: str | None = None) -> SqlModelError:
    return SqlModelError(f"{path}:{line}: {msg}", hint=hint or
                         "Fix the header comment block of the .sql file (see "
                         "fleetwatch/sqlmodels.py for its format).")


def _strip_comments_and_strings(line: str, in_block: bool) -> tuple[str, bool]:
    """The code of one SQL line with comments and string literals blanked out."""
    out, i, n = [], 0, len(line)
    while i < n:
        if in_block:
            j = line.find("*/", i)
            if j < 0:
                return "".join(out), True
            i, in_block = j + 2, False
            continue
        c = line[i]
        if line.startswith("--", i):
            break
        if line.startswith("/*", i):
            in_block, i = True, i + 2
            continue
        if c in ("'", '"'):
            j = i + 1
            while j < n:
                if line[j] == c:
                    if j + 1 < n and line[j + 1] == c:  # doubled quote inside the literal
                        j += 2
                        continue
                    break
                j += 1
            out.append(" " * (j + 1 - i))
            i = j + 1
            continue
        out.append(c)
        i += 1
    return "".join(out), in_block


def _parse_file(path: Path) -> SqlModel:
    text = path.read_text(encoding="utf-8")
    lines = text.splitlines()
    name = None
    desc: list[str] = []
    reads: list[str] = []
    params: list[SqlParam] = []
    columns: list[SqlColumn] = []
    body_line = len(lines) + 1
    settings = {s.name: s for s in SETTINGS}
    for no, raw in enumerate(lines, start=1):
        s = raw.strip()
        if not s.startswith("--"):
            if s == "":
                continue
            body_line = no
            break
        m = _KEY_RE.match(s)
        if not m:
            txt = s[2:].strip()
            if txt:
                desc.append(txt)
            continue
        key, val = m.group(1), m.group(2).strip()
        if key == "name":
            name = val
            if name != path.stem:
                raise _err(path, no, f"model name '{name}' differs from the file name "
                           f"'{path.stem}'", hint="Rename one so they match.")
        elif key == "reads":
            reads += [r.strip() for r in val.split(",") if r.strip()]
        elif key == "param":
            parts = val.split(None, 2)
            if len(parts) < 3:
                raise _err(path, no, f"param line needs 'name unit help', got '{val}'")
            pname, unit, help_ = parts
            runtime = help_.lower().startswith("runtime:")
            if not runtime:
                st = settings.get(pname)
                if st is None:
                    raise _err(path, no, f"parameter ${pname} is not a setting of the "
                               "registry (fleetwatch/config.py SETTINGS)",
                               hint="Use a setting's exact name, add the setting to the "
                               "registry, or mark a caller-supplied value with "
                               "'runtime:' at the start of its help.")
                if st.unit != unit:
                    raise _err(path, no, f"parameter ${pname} declared in '{unit}' but the "
                               f"setting is in '{st.unit}'",
                               hint=f"Declare it as '-- param: {pname}  {st.unit}  ...'.")
            if any(p.name == pname for p in params):
                raise _err(path, no, f"parameter ${pname} declared twice")
            params.append(SqlParam(pname, unit, help_, no, runtime))
        elif key == "column":
            parts = val.split(None, 2)
            if len(parts) < 3:
                raise _err(path, no, f"column line needs 'name unit help', got '{val}'")
            columns.append(SqlColumn(*parts))
    if name is None:
        raise _err(path, 1, "header has no '-- name: <model>' line")
    if not desc:
        raise _err(path, 1, "header has no description (free comment lines saying what the "
                   "model computes and why)")
    if body_line > len(lines):
        raise _err(path, len(lines) or 1, "file has a header but no SQL body")

    # Parameters used in the body, with the first line of use (comments/strings ignored).
    used: dict[str, int] = {}
    in_block = False
    for no in range(body_line, len(lines) + 1):
        code, in_block = _strip_comments_and_strings(lines[no - 1], in_block)
        for m in _PARAM_USE_RE.finditer(code):
            used.setdefault(m.group(1), no)
    declared = {p.name: p for p in params}
    for pname, no in used.items():
        if pname not in declared:
            raise _err(path, no, f"parameter ${pname} is used but not declared in the header",
                       hint=f"Add '-- param: {pname}  <unit>  <help>' to the header.")
    for p in params:
        if p.name not in used:
            raise _err(path, p.line, f"parameter ${p.name} is declared but never used in "
                       "the body", hint="Remove the param line or use the parameter.")
    return SqlModel(name=name, description=" ".join(desc), reads=tuple(reads),
                    params=tuple(params), columns=tuple(columns), sql=text, path=path,
                    body_line=body_line)


def _check_parses(m: SqlModel) -> None:
    import duckdb

    con = duckdb.connect()
    try:
        stmts = con.extract_statements(m.sql)
    except duckdb.ParserException as exc:
        msg = str(exc)
        line = m.body_line
        hit = re.search(r"LINE (\d+):", msg)
        if hit:
            line = int(hit.group(1))
        first = msg.splitlines()[0] if msg else "parse error"
        raise _err(m.path, line, f"SQL does not parse: {first}",
                   hint="Run the file in a DuckDB shell to see the whole message.") from None
    finally:
        con.close()
    if len(stmts) != 1:
        raise _err(m.path, m.body_line, f"a model holds exactly one statement, found "
                   f"{len(stmts)}")
    names = set(stmts[0].named_parameters)
    if names != set(m.param_names):  # the regex scan and DuckDB's parser must agree
        raise _err(m.path, m.body_line, f"DuckDB sees parameters {sorted(names)} but the "
                   f"header declares {sorted(m.param_names)}")


def _order(models: list[SqlModel]) -> list[SqlModel]:
    """Topological order by ``reads`` (ties keep file-name order)."""
    by_name = {m.name: m for m in models}
    done: list[SqlModel] = []
    state: dict[str, int] = {}

    def visit(m: SqlModel, chain: tuple[str, ...]) -> None:
        if state.get(m.name) == 2:
            return
        if state.get(m.name) == 1:
            raise _err(m.path, 1, "models read each other in a cycle: "
                       + " -> ".join(chain + (m.name,)))
        state[m.name] = 1
        for r in m.reads:
            if r in by_name:
                visit(by_name[r], chain + (m.name,))
        state[m.name] = 2
        done.append(m)

    for m in sorted(models, key=lambda x: x.name):
        visit(m, ())
    return done


def load_models(sql_dir: str | Path | None = None, check_parse: bool = True) -> list[SqlModel]:
    """All models of ``sql_dir`` (default: the package's ``sql/``), checked and ordered.

    Models come in dependency order (a model after every model it reads). Raises
    ``SqlModelError`` with ``file:line`` on the first problem found.
    """
    if sql_dir is None:
        return list(_load_default(check_parse))
    return _load(Path(sql_dir), check_parse)


@lru_cache(maxsize=2)
def _load_default(check_parse: bool) -> tuple[SqlModel, ...]:
    return tuple(_load(SQL_DIR, check_parse))


def _load(sql_dir: Path, check_parse: bool) -> list[SqlModel]:
    files = sorted(sql_dir.glob("*.sql"))
    if not files:
        raise SqlModelError(f"{sql_dir}: no .sql model files", hint="Reinstall fleetwatch.")
    models = [_parse_file(f) for f in files]
    if check_parse:
        for m in models:
            _check_parses(m)
    return _order(models)


def model(name: str, sql_dir: str | Path | None = None) -> SqlModel:
    """One model by name (KeyError lists the known names)."""
    models = {m.name: m for m in load_models(sql_dir)}
    try:
        return models[name]
    except KeyError:
        raise KeyError(f"unknown SQL model '{name}'; known: {', '.join(models)}") from None


def model_params(m: SqlModel, settings: Any, runtime: Mapping[str, Any] | None = None
                 ) -> dict[str, Any]:
    """The parameter values of ``m``: settings from ``settings``, the rest from ``runtime``.

    ``settings`` is a ``fleetwatch.config.Settings`` (or any mapping of setting names).
    Raises ``SqlModelError`` naming the file and line of a parameter with no value.
    """
    runtime = dict(runtime or {})
    values: dict[str, Any] = {}
    for p in m.params:
        if p.runtime:
            if p.name not in runtime:
                raise _err(m.path, p.line, f"runtime parameter ${p.name} has no value",
                           hint="Pass it in run_model(..., runtime={...}).")
            values[p.name] = runtime[p.name]
        else:
            values[p.name] = runtime[p.name] if p.name in runtime else settings[p.name]
    return values


def run_model(con: Any, m: SqlModel, settings: Any, runtime: Mapping[str, Any] | None = None,
              into: str | None = None, replace: bool = True) -> None:
    """Materialise model ``m`` on DuckDB connection ``con`` as table ``into`` (default: the
    model's name). ``replace=False`` appends to an existing table instead.

    Parameters come from ``settings`` and ``runtime`` (see ``model_params``). DuckDB errors
    are re-raised as ``SqlModelError`` naming the model's file.
    """
    import duckdb

    target = into or m.name
    params = model_params(m, settings, runtime)
    body = m.sql.rstrip().rstrip(";")
    if replace:
        stmt = f"CREATE OR REPLACE TABLE {target} AS {body}"
    else:
        stmt = f"INSERT INTO {target} BY NAME SELECT * FROM (\n{body}\n)"
    try:
        con.execute(stmt, params)
    except duckdb.Error as exc:
        raise SqlModelError(f"{m.path}:{m.body_line}: model '{m.name}' failed: "
                            f"{str(exc).splitlines()[0]}",
                            hint="Run the file in a DuckDB shell with the same parameters "
                            "to see the whole message.") from exc


def describe_models(models: Iterable[SqlModel] | None = None) -> list[dict[str, Any]]:
    """Name, description, params and output columns of each model (for docs and tests)."""
    return [{"name": m.name, "description": m.description, "reads": list(m.reads),
             "params": [(p.name, p.unit, p.help) for p in m.params],
             "columns": [(c.name, c.unit, c.help) for c in m.columns],
             "path": str(m.path)} for m in (models or load_models())]


# ---------------------------------------------------------------- samples without window functions
def _samples_scope() -> str:
    """The ``scope`` CTE of samples.sql (the chunk's telemetry plus each unit's last sample
    of the 31 days before it; same parameters), read from the file so the two paths cannot
    drift, with ``epoch(ts) AS _ep`` added."""
    sql = model("samples").sql
    start = sql.index("WITH scope AS (") + len("WITH scope AS (")
    end = sql.index("\n),\nlagged AS (", start)
    return f"SELECT *, epoch(ts) AS _ep FROM ({sql[start:end]}\n)"


def samples_frame(con: Any, settings: Any, runtime: Mapping[str, Any] | None = None):
    """The rows of samples.sql computed with polars instead of DuckDB window functions.

    samples.sql stays the reference (tests check that both agree row for row); this path
    exists because the two window passes of the SQL (lags and row_number, then the settle
    clock's last_value) sort every column of the chunk by (unit_id, ts) twice and were about
    two thirds of analyze's SQL CPU. Here DuckDB only reads the scope (same query as the
    file's ``scope`` CTE); polars sorts it once and derives the lags with shifts masked at
    unit boundaries, and the settle clock and gap segment with forward fills (a unit's first
    row always resets the clock and starts gap segment 0, so no fill crosses units).
    SQL null semantics are kept: Kleene AND/OR, ``=`` null when either side is null,
    ``IS DISTINCT FROM`` for ratio_cmd. Returns a polars DataFrame with the columns of
    samples.sql in its order.
    """
    import polars as pl

    parts = list(samples_slices(con, settings, runtime))
    return parts[0] if len(parts) == 1 else pl.concat(parts, rechunk=False)


def samples_slices(con: Any, settings: Any, runtime: Mapping[str, Any] | None = None):
    """samples_frame's rows as a sequence of frames, each holding whole units (about
    SAMPLES_SLICE_ROWS rows): every step looks only at rows of the same unit, so only one
    slice's intermediate columns are alive at a time (analyze's peak memory was this step).
    A generator: the caller can convert and drop each slice before the next is built."""
    import polars as pl

    p = model_params(model("samples"), settings, runtime)
    floor = float(p["steady_n_in_min_rpm"])
    settle = float(p["steady_settle_s"])
    gap = float(p["gap_min_s"])
    scope = _read_scope(con, {k: p[k] for k in ("from_ts", "to_ts", "context_s")})
    # day (from the partition) is null on the prior rows only
    scope = _sort_unit_ts(scope)
    cuts = _unit_slices(scope["unit_id"]) or [(0, 0)]
    for a, b in cuts:
        yield _samples_slice(scope.slice(a, b - a), floor, settle, gap, p["from_ts"],
                             p["to_ts"])


def _read_scope(con: Any, params: dict):
    """The rows of samples.sql's ``scope`` CTE (plus ``_ep``) as a polars frame.

    The CTE's prior rows (each unit's last sample of the 31 days before the scope) cost
    a scan of 32 days of telemetry, most of the scope's time for a short range (an
    incremental day) and about 0.8 s of CPU per chunk. The last sample almost always lies
    in the day before, so that day is read first (the same query, looking back 1 day
    instead of 31); a unit's latest sample of the 31 days is its latest of the last day
    when it has one there. Only units with rows in the scope and no prior row yet (or
    one whose n_in or ratio_cmd is null: arg_max skips nulls) are then looked up over the
    31 days. Units without rows in the scope may miss a prior
    row: it would be dropped with the other prior rows and changes nothing else.
    """
    import polars as pl

    sql = _samples_scope()
    near = sql.replace("::DATE - 31", "::DATE - 1")
    if near.count("::DATE - 1") != 1:
        raise SqlModelError(f"{model('samples').path}: the scope's 31-day look-back "
                            "('::DATE - 31') must appear once; the polars path reads it")
    # epoch() comes from DuckDB: its double rounding differs from polars' in the last bit
    # (no rechunk: the sort after this copies the rows into one piece anyway)
    scope = pl.from_arrow(con.sql(near, params=params).to_arrow_table(), rechunk=False)
    c = pl.col
    # arg_max skips null values: a prior row whose n_in or ratio_cmd is null may take an
    # older value from the 31 days (ingest rejects such rows, but the reference allows them)
    units = scope.group_by("unit_id").agg(
        in_scope=(~c("is_prior")).any(),
        settled=(c("is_prior") & c("n_in").is_not_null()
                 & c("ratio_cmd").is_not_null()).any())
    need = units.filter(c("in_scope") & ~c("settled")).select("unit_id")
    if need.height:
        con.register("_prior_units", need.to_arrow())
        try:
            far = con.sql(f"SELECT * FROM ({sql}) WHERE is_prior "
                          "AND unit_id IN (SELECT unit_id FROM _prior_units)",
                          params=params).to_arrow_table()
        finally:
            con.unregister("_prior_units")
        scope = scope.filter(~(c("is_prior") & c("unit_id").is_in(need["unit_id"].implode())))
        if far.num_rows:
            scope = pl.concat([scope, pl.from_arrow(far, rechunk=False)], rechunk=False)
    return scope


#: Rows per slice of whole units in samples_frame (a unit longer than this is one slice).
SAMPLES_SLICE_ROWS = 1_000_000


def _unit_slices(unit_id) -> list[tuple[int, int]]:
    """Row ranges [a, b) of about SAMPLES_SLICE_ROWS rows of a frame whose rows are grouped
    by unit, cut only where the unit changes."""
    import numpy as np

    n = len(unit_id)
    if n == 0:
        return []
    starts = np.flatnonzero((unit_id != unit_id.shift(1)).fill_null(True).to_numpy())
    out, a = [], 0
    for s in starts[1:]:
        if s - a >= SAMPLES_SLICE_ROWS:
            out.append((a, int(s)))
            a = int(s)
    out.append((a, n))
    return out


def _samples_slice(scope, floor: float, settle: float, gap: float, from_ts, to_ts):
    """samples_frame's rows for ``scope``: rows of whole units, each unit's in ts order."""
    import polars as pl

    c = pl.col
    first = (c("unit_id") != c("unit_id").shift(1)).fill_null(True)
    idx = pl.int_range(pl.len(), dtype=pl.Int64)
    df = scope.lazy().with_columns(_first=first, _idx=idx)
    df = df.with_columns(
        seq=(c("_idx") - pl.when(c("_first")).then(c("_idx")).forward_fill() + 1))

    def lag(name: str, n: int = 1) -> pl.Expr:
        return pl.when(c("seq") > n).then(c(name).shift(n))

    df = df.with_columns(
        prev_ts=lag("ts"), prev_n_in=lag("n_in"), prev_ratio_cmd=lag("ratio_cmd"),
        prev4_ts=lag("ts", 4),
        same_n_in=c("n_in") == lag("n_in"), same_n_out=c("n_out") == lag("n_out"),
        same_i_in=c("i_in") == lag("i_in"), same_v_in=c("v_in") == lag("v_in"),
        same_temp=c("temp") == lag("temp"))
    df = df.with_columns(
        dt_prev_s=c("_ep") - pl.when(~c("_first")).then(c("_ep").shift(1)),
        running=c("n_in") > floor)
    df = df.with_columns(
        settle_reset=(c("prev_ts").is_null()
                      | c("ratio_cmd").ne_missing(c("prev_ratio_cmd"))
                      | ~c("running")
                      | (c("dt_prev_s") > gap)))
    df = df.with_columns(
        _reset_ep=pl.when(c("settle_reset")).then(c("_ep")).forward_fill(),
        gap_seg=pl.when(c("dt_prev_s") > gap).then(c("seq"))
        .when(c("_first")).then(pl.lit(0, pl.Int64)).forward_fill())
    pi = math.pi
    out = df.filter(~c("is_prior")).select(
        "unit_id", "ts", "day", "seq",
        "v_in", "i_in", "p_in", "n_in", "n_out", "ratio_cmd", "t_out", "temp",
        omega_in=c("n_in") * pi / 30.0,
        omega_out=c("n_out") * pi / 30.0,
        slip=pl.when(c("n_in") > 0).then(1.0 - c("ratio_cmd") * c("n_out") / c("n_in")),
        ratio_act=pl.when(c("n_out") > 0).then(c("n_in") / c("n_out")),
        p_out_w=c("t_out") * c("n_out") * pi / 30.0,
        running="running",
        steady=(c("running") & ~c("settle_reset")
                & (c("_ep") - c("_reset_ep") >= settle)).fill_null(False),
        prev_ts="prev_ts", prev_n_in="prev_n_in", prev_ratio_cmd="prev_ratio_cmd",
        dt_prev_s="dt_prev_s", prev4_ts="prev4_ts",
        same_n_in="same_n_in", same_n_out="same_n_out", same_i_in="same_i_in",
        same_v_in="same_v_in", same_temp="same_temp", gap_seg="gap_seg",
        in_range=(c("ts") >= from_ts) & (c("ts") < to_ts))
    return out.collect()


def _sort_unit_ts(df):
    """``df`` with each unit's rows together in ts order (the units in any order): one
    argsort of an Int64 key (dense unit rank, then microseconds since the frame's first ts)
    when it fits in 62 bits, about 2.5x cheaper than polars' sort on (String, Datetime)."""
    import polars as pl

    if df.height < 2:
        return df
    us = df["ts"].dt.epoch("us")
    lo, hi = us.min(), us.max()
    rank = df["unit_id"].cast(pl.Categorical).to_physical().rank("dense").cast(pl.Int64)
    shift = max(1, int(hi - lo).bit_length())
    if int(rank.max()).bit_length() + shift > 62 or us.null_count():
        return df.sort("unit_id", "ts")
    key = rank * (1 << shift) + (us - lo)
    return df[key.arg_sort()]


def run_samples(con: Any, settings: Any, runtime: Mapping[str, Any] | None = None,
                into: str = "samples"):
    """Register the rows of ``samples_frame`` on ``con`` as view ``into`` (what analyze runs
    instead of samples.sql; unregister it when done). Returns the frame (keep a reference
    while the view is used)."""
    import duckdb

    import pyarrow as pa

    parts = []
    try:
        # each slice goes to Arrow as soon as it is built: polars aligns a frame's chunks
        # (a copy) when converting, and one slice's copy is far smaller than the chunk's
        for part in samples_slices(con, settings, runtime):
            parts.append(part.to_arrow())
            del part
    except duckdb.Error as exc:
        m = model("samples")
        raise SqlModelError(f"{m.path}:{m.body_line}: model 'samples' (polars path) failed: "
                            f"{str(exc).splitlines()[0]}") from exc
    tbl = pa.concat_tables(parts)
    con.register(into, tbl)
    return tbl
