"""The table store: a folder of Delta tables, read through DuckDB.

Layout::

    <lake>/<table>/            one Delta table per name (telemetry partitioned by day)
    <lake>/_fleetwatch/writer.lock        the single-writer lock (JSON: pid, host, purpose, since)
    <lake>/_fleetwatch/pending/<batch_id> an ingest batch that has started and not yet committed

Consistency (design.md section 4 and 6). An ingest batch writes its rows in several Delta
commits (one per chunk, to bound memory) and its ``batches`` ledger row last. Readers must
never see part of a batch, so a reader takes its snapshot in this order: the ledger, then
the data tables, then the list of pending batches and the ledger version again. When no
batch is pending and the ledger did not move, the snapshot is exactly a committed state and
is used as is. Otherwise rows whose ``batch_id`` carries the ingest prefix and is not in the
ledger snapshot are filtered out. A batch killed half way leaves its pending marker behind;
the next writer deletes its rows (``recover``) before doing anything else.

deltalake panics in forked children: use subprocesses or the ``spawn`` start method.
"""
from __future__ import annotations

import json
import math
import os
import re
import socket
import threading
import time
import warnings
from contextlib import contextmanager
from datetime import datetime, timezone
from pathlib import Path
from typing import TYPE_CHECKING, Any, Iterator

import polars as pl
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.fs as pafs

if TYPE_CHECKING:  # imported where used: an ingest needs neither (about 0.5 s of start-up)
    import duckdb
    import pyarrow.dataset as pds

from .errors import LakeError, LockHeldError
from .schema import TABLES

__all__ = ["Lake", "StaleLockWarning", "compact_lake", "arrow_schema", "polars_schema",
           "INGEST_BATCH_PREFIX", "GATED_TABLES"]

INGEST_BATCH_PREFIX = "ingest-"
GATED_TABLES = ("telemetry", "quarantine", "maintenance")
_META_DIR = "_fleetwatch"
# Parquet codec of the files we write. LZ4_RAW took about 20 % less CPU than delta-rs's
# default (Snappy) for telemetry chunks, with files no larger (measured, 500 k rows); DuckDB,
# pyarrow, polars and Spark 3.4+ read it.
_COMPRESSION = "LZ4_RAW"
_NAME_RE = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")

_ARROW_TYPES = {
    "VARCHAR": pa.large_string(),
    "DOUBLE": pa.float64(),
    "BIGINT": pa.int64(),
    "BOOLEAN": pa.bool_(),
    "DATE": pa.date32(),
    "TIMESTAMPTZ": pa.timestamp("us", tz="UTC"),
}
_POLARS_TYPES = {
    "VARCHAR": pl.String,
    "DOUBLE": pl.Float64,
    "BIGINT": pl.Int64,
    "BOOLEAN": pl.Boolean,
    "DATE": pl.Date,
    "TIMESTAMPTZ": pl.Datetime("us", "UTC"),
}


class StaleLockWarning(UserWarning):
    """A writer lock left by a dead process was taken over."""


def arrow_schema(name: str) -> pa.Schema:
    """The Arrow schema of a known table (schema.py column order and types)."""
    t = TABLES[name]
    return pa.schema([pa.field(c.name, _ARROW_TYPES[c.type], nullable=True) for c in t.columns])


def polars_schema(name: str) -> dict[str, Any]:
    """The polars schema of a known table: {column: dtype} in contract order."""
    return {c.name: _POLARS_TYPES[c.type] for c in TABLES[name].columns}


# --------------------------------------------------------------------------- lock helpers

def _proc_start(pid: int) -> str | None:
    """Start time of a process in clock ticks (Linux), to tell a reused pid apart."""
    try:
        with open(f"/proc/{pid}/stat", "rb") as fh:
            data = fh.read().decode("ascii", "replace")
        return data[data.rindex(")") + 2:].split()[19]
    except (OSError, ValueError, IndexError):
        return None


def _pid_alive(pid: int, start: str | None) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    if start is not None:
        now = _proc_start(pid)
        if now is not None and now != start:
            return False  # the pid was reused by another process
    return True


_HELD: dict[str, int] = {}  # lock path -> nesting depth held by this process


class Lake:
    """A folder of Delta tables (see the module docstring for layout and consistency)."""

    def __init__(self, path: str | os.PathLike, lock_timeout_s: float = 0.0):
        self.path = Path(path).expanduser().absolute()
        self.lock_timeout_s = float(lock_timeout_s)
        self._mine = threading.local()               # see _kept_table
        self._lock_term = 0                          # changes when the lock is taken or let go

    @classmethod
    def from_settings(cls, settings) -> "Lake":
        return cls(settings.lake_path, lock_timeout_s=getattr(settings, "lock_timeout_s", 0.0))

    def __repr__(self) -> str:
        return f"Lake({str(self.path)!r})"

    # ------------------------------------------------------------------ paths and listing

    def _table_path(self, name: str) -> Path:
        if not _NAME_RE.match(name or ""):
            raise LakeError(f"invalid table name {name!r}",
                            hint="Table names are letters, digits and underscores.")
        return self.path / name

    @property
    def _meta(self) -> Path:
        return self.path / _META_DIR

    def table_names(self) -> list[str]:
        """Tables that exist, known tables first (schema.py order), then others by name."""
        if not self.path.is_dir():
            return []
        found = {p.name for p in self.path.iterdir()
                 if p.is_dir() and (p / "_delta_log").is_dir() and _NAME_RE.match(p.name)}
        known = [n for n in TABLES if n in found]
        return known + sorted(found - set(known))

    def has_table(self, name: str) -> bool:
        return (self._table_path(name) / "_delta_log").is_dir()

    def _delta(self, name: str):
        from deltalake import DeltaTable
        if not self.has_table(name):
            return None
        try:
            return DeltaTable(str(self._table_path(name)))
        except Exception as exc:  # deltalake raises its own hierarchy
            raise LakeError(f"cannot open table '{name}' in {self.path}: {exc}",
                            hint="The table folder may be damaged; check its _delta_log.") from exc

    def version(self, name: str) -> int | None:
        """Current Delta version of ``name``; None when the table does not exist."""
        dt = self._delta(name)
        return None if dt is None else dt.version()

    def versions(self) -> dict[str, int]:
        """Every table's version: a cheap cache key for readers such as the dashboard."""
        out = {}
        for n in self.table_names():
            v = self.version(n)
            if v is not None:
                out[n] = v
        return out

    # ------------------------------------------------------------------ reading

    def rows_per_partition(self, name: str, column: str = "day") -> dict[Any, int] | None:
        """Rows per value of partition ``column`` of ``name``, from the Delta log's file
        statistics (no data read). Counts every committed file, the rows of a pending
        ingest batch included: call it under the writer lock after :meth:`recover`. None
        when the table is missing, not partitioned by ``column`` or its log lacks counts."""
        try:
            dt = self._delta(name)
            if dt is None:
                return None
            adds = pa.table(dt.get_add_actions(flatten=True))
            key = f"partition.{column}"
            if key not in adds.column_names or adds["num_records"].null_count \
                    or adds[key].null_count:
                return None
            df = pl.from_arrow(adds.select([key, "num_records"]))
            df = df.group_by(key).agg(pl.col("num_records").sum())
            return {d: int(n) for d, n in df.iter_rows() if n}
        except Exception:  # noqa: BLE001 - any surprise in the log: the caller counts rows
            return None

    def snapshot_files(self, name: str, version: int) -> tuple[list[str], list[str]] | None:
        """(file URIs, partition columns) of ``name`` at ``version``, for readers that scan
        the Parquet files themselves; None unless that reads exactly the table's rows: the
        table exists with at least one file, is outside the ingest batch gate and needs
        Delta reader protocol 1 (no deletion vectors, no column mapping). Partition values
        are in the hive-style paths (``col=value/``), not in the files."""
        from deltalake import DeltaTable
        if name in GATED_TABLES or not self.has_table(name):
            return None
        table = DeltaTable(str(self._table_path(name)), version=version)
        proto = table.protocol()
        files = table.file_uris()
        if proto.min_reader_version > 1 or proto.reader_features or not files:
            return None
        return files, list(table.metadata().partition_columns)

    def _raw_dataset(self, dt, name: str, file_pruning_predicate: str | None = None
                     ) -> pds.Dataset:
        # A native local filesystem: deltalake's default Python filesystem handler can hang
        # or crash the interpreter at exit after a partially consumed scan (measured).
        fs = pafs.SubTreeFileSystem(str(self._table_path(name)), pafs.LocalFileSystem())
        if file_pruning_predicate:
            return dt.to_pyarrow_dataset(filesystem=fs,
                                         file_pruning_predicate=file_pruning_predicate)
        return dt.to_pyarrow_dataset(filesystem=fs)

    def raw_dataset(self, name: str, file_pruning_predicate: str | None = None
                    ) -> pds.Dataset | None:
        """The latest snapshot with no batch gate (for the writer, under the lock).

        ``file_pruning_predicate`` (Delta SQL on partition values and per-file min/max
        statistics, e.g. ``"ts >= '2024-01-01T00:00:00Z'"``) keeps only the files that may
        hold matching rows; rows still need filtering.
        """
        dt = self._delta(name)
        return None if dt is None else self._raw_dataset(dt, name, file_pruning_predicate)

    def latest_dataset(self, name: str, file_pruning_predicate: str | None = None
                       ) -> pds.Dataset | None:
        """``raw_dataset`` for lookups repeated by the writer (ingest, chunk after chunk),
        on the table this thread keeps open (``_kept_table``)."""
        dt = self._kept_table(name)
        return None if dt is None else self._raw_dataset(dt, name, file_pruning_predicate)

    def _kept_table(self, name: str):
        """The Delta table of ``name`` kept open by this thread while this object holds
        the writer lock, brought up to date (only the commits since are read); a freshly
        opened one when the lock is not held (others may change the tables); None when the
        table does not exist. Opening a table replays its log (up to a hundred commits
        since the last checkpoint): about 25 ms on a lake with a long log, for every chunk
        ingest looks up and appends. A table object is not shared between threads (each
        writer thread keeps its own), and the kept tables are dropped when the lock is
        taken or released."""
        if not _HELD.get(str(self._meta / "writer.lock")):
            return self._delta(name)
        mine = self._mine
        if getattr(mine, "term", None) != self._lock_term:
            mine.tables, mine.term = {}, self._lock_term
        dt = mine.tables.get(name)
        if dt is None:
            dt = self._delta(name)
            if dt is not None:
                mine.tables[name] = dt
            return dt
        try:
            dt.update_incremental()
        except Exception:  # deltalake raises its own hierarchy: reopen (LakeError if damaged)
            mine.tables.pop(name, None)
            return self._kept_table(name)
        return dt

    def pending_batches(self) -> list[str]:
        d = self._meta / "pending"
        if not d.is_dir():
            return []
        return sorted(p.name for p in d.iterdir() if not p.name.startswith("."))

    def _snapshot(self, names: list[str]) -> dict[str, pds.Dataset]:
        """Consistent datasets for ``names`` (see module docstring)."""
        out: dict[str, pds.Dataset] = {}
        ledger = self._delta("batches")
        v1 = ledger.version() if ledger is not None else None
        committed: list[str] = []
        ledger_ds = None
        if ledger is not None:
            ledger_ds = self._raw_dataset(ledger, "batches")
            committed = ledger_ds.to_table(columns=["batch_id"]).column(0).to_pylist()
        for n in names:
            if n == "batches":
                if ledger_ds is not None:
                    out[n] = ledger_ds
                continue
            dt = self._delta(n)
            if dt is not None:
                out[n] = self._raw_dataset(dt, n)
        gated = [n for n in out if n in GATED_TABLES and "batch_id" in out[n].schema.names]
        if gated:
            pending = self.pending_batches()
            v2 = self.version("batches")
            if pending or v2 != v1:
                bid = pc.field("batch_id")
                keep = (bid.is_null() | ~pc.starts_with(bid, pattern=INGEST_BATCH_PREFIX)
                        | bid.isin(pa.array(committed, pa.string())))
                for n in gated:
                    out[n] = out[n].filter(keep)
        return out

    def dataset(self, name: str) -> pds.Dataset:
        """Pyarrow dataset of the current committed snapshot of ``name``.

        Raises LakeError when the table does not exist.
        """
        ds = self._snapshot([name]).get(name)
        if ds is None:
            raise LakeError(f"table '{name}' does not exist in {self.path}",
                            hint="Run `fleetwatch ingest` (base tables) or `fleetwatch analyze` "
                                 "(derived tables) first.")
        return ds

    def connect(self, tables: list[str] | None = None) -> duckdb.DuckDBPyConnection:
        """In-memory DuckDB with one view per existing table (snapshot taken now).

        The session time zone is UTC, so ``ts::DATE`` is the UTC date.
        """
        import duckdb
        names = self.table_names() if tables is None else [t for t in tables if self.has_table(t)]
        datasets = self._snapshot(names)
        con = duckdb.connect(":memory:")
        con.execute("SET TimeZone='UTC'")
        for n in names:
            if n in datasets:
                con.register(n, datasets[n])
        return con

    def read(self, name: str, columns: list[str] | None = None,
             filter_sql: str | None = None) -> pl.DataFrame:
        """Rows of ``name`` as a polars frame (timestamps in UTC).

        Missing table: an empty frame with the schema.py columns. ``filter_sql`` is a DuckDB
        boolean expression (e.g. ``"unit_id = 'U01' AND day >= DATE '2024-01-01'"``).
        """
        known = polars_schema(name) if name in TABLES else None
        if not self.has_table(name):
            if known is None:
                return pl.DataFrame()
            sch = {c: known[c] for c in (columns or known)}
            return pl.DataFrame(schema=sch)
        import duckdb
        con = self.connect([name])
        try:
            cols = ", ".join(_qi(c) for c in columns) if columns else "*"
            sql = f"SELECT {cols} FROM {_qi(name)}"
            if filter_sql:
                sql += f" WHERE {filter_sql}"
            try:
                tbl = con.sql(sql).to_arrow_table()
            except duckdb.Error as exc:
                raise LakeError(f"cannot read table '{name}': {exc}",
                                hint="Check the column names and the filter expression.") from exc
        finally:
            con.close()
        df = pl.from_arrow(tbl)
        return _utc_frame(df)

    # ------------------------------------------------------------------ writing

    def _prepare(self, name: str, data, in_key_order: bool = False) -> pa.Table:
        """``data`` as an Arrow table with the contract's columns and types, sorted by the
        table's key (``in_key_order``: the caller guarantees it already is; not checked)."""
        if isinstance(data, pl.DataFrame):
            tbl = data.to_arrow()
        elif isinstance(data, pa.Table):
            tbl = data
        elif isinstance(data, pa.RecordBatch):
            tbl = pa.Table.from_batches([data])
        else:
            try:
                tbl = pl.DataFrame(data).to_arrow()
            except Exception as exc:
                raise LakeError(f"cannot write {type(data).__name__} to table '{name}'",
                                hint="Pass a polars DataFrame or a pyarrow Table.") from exc
        if name not in TABLES:
            return tbl
        contract = TABLES[name]
        schema = arrow_schema(name)
        present = set(tbl.column_names)
        extra = [c for c in tbl.column_names if c not in schema.names]
        if extra:
            raise LakeError(f"table '{name}': columns not in its contract: {', '.join(extra)}",
                            hint="Drop them, or add them to fleetwatch/schema.py first.")
        if name == "telemetry" and "day" not in present and "ts" in present:
            ts = tbl.column("ts").cast(_ARROW_TYPES["TIMESTAMPTZ"], safe=False)
            tbl = tbl.append_column("day", pc.cast(ts, pa.date32()))
            present.add("day")
        missing = [c.name for c in contract.columns if c.required and c.name not in present]
        if missing:
            raise LakeError(f"table '{name}': required columns missing: {', '.join(missing)}",
                            hint="See fleetwatch/schema.py for the table's contract.")
        arrays = []
        for f in schema:
            if f.name in present:
                col = tbl.column(f.name)
                try:
                    col = _cast_column(col, f.type)
                except (pa.ArrowInvalid, pa.ArrowNotImplementedError, pa.ArrowTypeError) as exc:
                    raise LakeError(f"table '{name}': column '{f.name}' of type {col.type} "
                                    f"cannot be stored as {f.type}: {exc}",
                                    hint="Fix the column's type before writing.") from exc
            else:
                col = pa.nulls(tbl.num_rows, f.type)
            arrays.append(col)
        out = pa.Table.from_arrays(arrays, schema=schema)
        key = [k for k in contract.key if k in schema.names]
        if key and out.num_rows > 1:
            if not in_key_order:
                return _sort_by_key(out, key)
            if any(c.num_chunks > 1 for c in out.columns):
                return out.combine_chunks()     # one contiguous batch, as a sort gives
        return out

    def _partition(self, name: str, partition_by) -> list[str] | None:
        if partition_by is None and name in TABLES:
            partition_by = list(TABLES[name].partition_by) or None
        if isinstance(partition_by, str):
            partition_by = [partition_by]
        return list(partition_by) if partition_by else None

    def _write(self, name: str, tbl: pa.Table, mode: str, partition_by, predicate=None,
               schema_mode=None) -> int:
        from deltalake import WriterProperties, write_deltalake
        path = self._table_path(name)
        self.path.mkdir(parents=True, exist_ok=True)
        # an append by path opened the table twice (to write, then for the new version)
        kept = self._kept_table(name) if mode == "append" else None
        try:
            write_deltalake(str(path) if kept is None else kept, tbl, mode=mode,
                            partition_by=partition_by, predicate=predicate,
                            schema_mode=schema_mode,
                            writer_properties=WriterProperties(compression=_COMPRESSION))
        except Exception as exc:
            getattr(self._mine, "tables", {}).pop(name, None)
            raise LakeError(f"writing table '{name}' in {self.path} failed: {exc}",
                            hint="Check free disk space and permissions; if the table's schema "
                                 "changed, rebuild the table (analyze rewrites derived tables)."
                            ) from exc
        return self.version(name) if kept is None else kept.version()

    def append(self, name: str, data, partition_by=None, in_key_order: bool = False) -> int:
        """Atomic Delta append; returns the new version (the current one for 0 rows).

        Known tables are cast to the schema.py contract (order, types, optional columns
        filled with null) and sorted by their key (``in_key_order``: the caller guarantees
        the rows already are, e.g. ingest, which sorts them itself; not checked);
        telemetry gets ``day`` from ``ts`` when absent. The caller holds the writer lock
        (``with lake.writer(...)``).
        """
        tbl = self._prepare(name, data, in_key_order)
        if tbl.num_rows == 0 and self.has_table(name):
            return self.version(name)
        return self._write(name, tbl, "append", self._partition(name, partition_by))

    def overwrite(self, name: str, data, partition_by=None) -> int:
        """Atomically replace the whole table (readers see old or new, never a mix)."""
        tbl = self._prepare(name, data)
        return self._write(name, tbl, "overwrite", self._partition(name, partition_by),
                           schema_mode="overwrite")

    def replace_where(self, name: str, data, predicate: str, partition_by=None) -> int:
        """Atomically replace the rows matching ``predicate`` (a Delta SQL predicate such as
        ``"unit_id = 'U01' AND day >= '2024-01-08'"``) with ``data``; every row of ``data``
        must match the predicate. Creates the table when missing.
        """
        tbl = self._prepare(name, data)
        part = self._partition(name, partition_by)
        if not self.has_table(name):
            return self._write(name, tbl, "append", part)
        return self._write(name, tbl, "overwrite", part, predicate=predicate)

    def delete_where(self, name: str, predicate: str) -> int | None:
        """Delete the rows matching ``predicate``; returns the new version (None: no table)."""
        dt = self._delta(name)
        if dt is None:
            return None
        try:
            dt.delete(predicate)
        except Exception as exc:
            raise LakeError(f"deleting from table '{name}' failed: {exc}") from exc
        return self.version(name)

    # ------------------------------------------------------------------ batches

    def begin_batch(self, batch_id: str) -> None:
        """Mark ``batch_id`` pending (durably) before its first row is written."""
        d = self._meta / "pending"
        d.mkdir(parents=True, exist_ok=True)
        p = d / batch_id
        with open(p, "w") as fh:
            fh.write(json.dumps({"pid": os.getpid(), "since": _now_iso()}))
            fh.flush()
            os.fsync(fh.fileno())
        _fsync_dir(d)

    def end_batch(self, batch_id: str) -> None:
        """Clear the pending mark once the batch's ledger row is committed."""
        p = self._meta / "pending" / batch_id
        try:
            p.unlink()
        except FileNotFoundError:
            pass

    def rollback_batch(self, batch_id: str) -> None:
        """Delete every row written by ``batch_id`` from the gated tables."""
        lit = batch_id.replace("'", "''")
        for n in GATED_TABLES:
            if self.has_table(n):
                self.delete_where(n, f"batch_id = '{lit}'")

    def committed_batch_ids(self) -> set[str]:
        ds = self.raw_dataset("batches")
        if ds is None:
            return set()
        return set(ds.to_table(columns=["batch_id"]).column(0).to_pylist())

    def recover(self) -> list[str]:
        """Undo batches left pending by a killed writer; returns their ids. Needs the lock."""
        pending = self.pending_batches()
        if not pending:
            return []
        committed = self.committed_batch_ids()
        undone = []
        for b in pending:
            if b not in committed:
                self.rollback_batch(b)
                undone.append(b)
            self.end_batch(b)
        return undone

    # ------------------------------------------------------------------ lock

    @contextmanager
    def writer(self, purpose: str) -> Iterator["Lake"]:
        """Hold the lake's single-writer lock for a whole job.

        Raises LockHeldError naming the holder (pid, host, purpose, since). A lock left by a
        dead process on this host is taken over with a StaleLockWarning. Re-entrant within
        one process. Waits up to ``lock_timeout_s`` for a live holder.
        """
        self._meta.mkdir(parents=True, exist_ok=True)
        lock = self._meta / "writer.lock"
        key = str(lock)
        if _HELD.get(key):
            _HELD[key] += 1
            try:
                yield self
            finally:
                _HELD[key] -= 1
            return
        token = self._acquire(lock, purpose)
        _HELD[key] = 1
        self._lock_term += 1        # drops kept tables: another writer may have changed them
        try:
            yield self
        finally:
            _HELD.pop(key, None)
            self._lock_term += 1
            try:
                held = json.loads(lock.read_text())
                if held.get("token") == token:
                    lock.unlink()
            except (OSError, ValueError):
                pass

    def lock_holder(self) -> dict | None:
        """The current lock file's content, or None when the lake is not locked."""
        try:
            return json.loads((self._meta / "writer.lock").read_text())
        except FileNotFoundError:
            return None
        except (OSError, ValueError):
            return {}

    def _acquire(self, lock: Path, purpose: str) -> str:
        host = socket.gethostname()
        token = f"{host}:{os.getpid()}:{time.time_ns()}"
        me = {"pid": os.getpid(), "host": host, "purpose": purpose, "since": _now_iso(),
              "start": _proc_start(os.getpid()), "token": token}
        deadline = time.monotonic() + max(self.lock_timeout_s, 0.0)
        while True:
            try:
                fd = os.open(lock, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
            except FileExistsError:
                holder = self.lock_holder()
                if holder is None:
                    continue  # released between our attempts
                if self._is_stale(holder):
                    self._break_stale(lock, holder)
                    continue
                if time.monotonic() >= deadline:
                    raise LockHeldError(
                        f"the lake {self.path} is being written by another fleetwatch process: "
                        f"pid {holder.get('pid', '?')} on host {holder.get('host', '?')}, "
                        f"purpose '{holder.get('purpose', '?')}', since "
                        f"{holder.get('since', '?')}",
                        hint="Wait for it to finish (or raise lock_timeout_s). If that process "
                             f"is gone on another host, delete {lock}.")
                time.sleep(0.2)
                continue
            with os.fdopen(fd, "w") as fh:
                fh.write(json.dumps(me))
                fh.flush()
                os.fsync(fh.fileno())
            return token

    @staticmethod
    def _is_stale(holder: dict) -> bool:
        if not holder:
            return False  # being written right now, or unreadable: do not guess
        if holder.get("host") != socket.gethostname():
            return False
        try:
            pid = int(holder.get("pid"))
        except (TypeError, ValueError):
            return False
        return not _pid_alive(pid, holder.get("start"))

    def _break_stale(self, lock: Path, holder: dict) -> None:
        # Rename first: of several processes breaking the same stale lock, only one succeeds.
        grave = lock.with_name(f"writer.lock.stale-{os.getpid()}-{time.time_ns()}")
        try:
            os.rename(lock, grave)
        except FileNotFoundError:
            return
        try:
            again = json.loads(grave.read_text())
        except (OSError, ValueError):
            again = {}
        if again.get("token") != holder.get("token"):
            # Someone else replaced the lock in between: put theirs back if we can.
            try:
                os.link(grave, lock)
            except FileExistsError:
                pass
            grave.unlink(missing_ok=True)
            return
        grave.unlink(missing_ok=True)
        warnings.warn(
            f"took over the lake's writer lock left by pid {holder.get('pid')} on "
            f"{holder.get('host')} (purpose '{holder.get('purpose')}', since "
            f"{holder.get('since')}): that process is gone", StaleLockWarning, stacklevel=4)

    # ------------------------------------------------------------------ maintenance

    def compact(self, retention_hours: float) -> dict:
        """Compact small files and vacuum versions older than ``retention_hours``, per table.

        Row counts never change (checked; LakeError otherwise). Returns
        {table: {rows, files_before, files_after, removed_files, version}}. Needs the lock.
        """
        retention = max(0, int(math.floor(float(retention_hours))))
        out: dict[str, dict] = {}
        for n in self.table_names():
            dt = self._delta(n)
            before_rows = self._raw_dataset(dt, n).count_rows()
            files_before = len(dt.file_uris())
            try:
                dt.optimize.compact()
                dt = self._delta(n)
                removed = dt.vacuum(retention_hours=retention, dry_run=False,
                                    enforce_retention_duration=False)
            except Exception as exc:
                raise LakeError(f"compacting table '{n}' failed: {exc}") from exc
            dt = self._delta(n)
            after_rows = self._raw_dataset(dt, n).count_rows()
            if after_rows != before_rows:
                raise LakeError(f"compacting table '{n}' changed its row count "
                                f"({before_rows} -> {after_rows})",
                                hint="Restore the previous version with Delta time travel.")
            out[n] = {"rows": after_rows, "files_before": files_before,
                      "files_after": len(dt.file_uris()), "removed_files": len(removed),
                      "version": dt.version()}
        return out

    # ------------------------------------------------------------------ streamed writes
    # (appended by the analyze work: large derived tables go from DuckDB to Delta without
    # a whole Arrow copy in Python)

    def write_stream(self, name: str, batches, predicate: str | None = None,
                     partition_by=None, target_file_size: int | None = None,
                     max_row_group_size: int | None = None) -> int:
        """Atomically replace table ``name`` (or, with ``predicate``, its rows matching the
        Delta SQL predicate) with the rows of ``batches``, one Delta commit, holding about
        one batch at a time in memory instead of the whole table.

        ``batches``: a ``pyarrow.RecordBatchReader`` (e.g. DuckDB's
        ``rel.to_arrow_reader(batch_size)``) with exactly the contract's columns of
        ``name`` in order; each batch is cast to the contract types (strings to
        large_string, timestamps to UTC microseconds). Unlike ``overwrite`` nothing is
        sorted: the caller delivers the rows in the order it wants them stored.
        ``target_file_size`` (bytes) and ``max_row_group_size`` (rows) override delta-rs's
        defaults (100 MB files, 1 M-row groups): rows stored in time order in files of about
        a month let a later ``predicate`` on recent days rewrite only the last files.
        Creates the table when missing. Returns the new version. The caller holds the
        writer lock.
        """
        from deltalake import WriterProperties, write_deltalake
        if name not in TABLES:
            raise LakeError(f"write_stream: '{name}' has no contract in schema.py")
        schema = arrow_schema(name)
        if list(batches.schema.names) != list(schema.names):
            raise LakeError(f"table '{name}': streamed columns {batches.schema.names} are not "
                            f"its contract's {schema.names}",
                            hint="Select exactly the contract columns, in order.")

        def cast_all():
            for b in batches:
                arrays = [_cast_column(pa.chunked_array([b.column(i)]), f.type)
                          for i, f in enumerate(schema)]
                yield pa.RecordBatch.from_arrays(
                    [a.combine_chunks() if isinstance(a, pa.ChunkedArray) else a
                     for a in arrays], schema=schema)

        reader = pa.RecordBatchReader.from_batches(schema, cast_all())
        part = self._partition(name, partition_by)
        path = self._table_path(name)
        self.path.mkdir(parents=True, exist_ok=True)
        exists = self.has_table(name)
        mode = "overwrite" if exists or predicate is None else "append"
        try:
            write_deltalake(str(path), reader, mode=mode, partition_by=part,
                            predicate=predicate if exists else None,
                            schema_mode="overwrite" if (predicate is None and exists) else None,
                            target_file_size=target_file_size,
                            writer_properties=WriterProperties(
                                compression=_COMPRESSION,
                                max_row_group_size=max_row_group_size))
        except Exception as exc:
            raise LakeError(f"writing table '{name}' in {self.path} failed: {exc}",
                            hint="Check free disk space and permissions.") from exc
        return self.version(name)


def compact_lake(settings, retention_hours: float | None = None) -> dict:
    """`fleetwatch compact`: take the writer lock, undo killed batches, compact every table.

    ``retention_hours`` defaults to the retention_hours setting.
    """
    lake = Lake.from_settings(settings)
    if retention_hours is None:
        retention_hours = settings.retention_hours
    if not lake.path.is_dir():
        raise LakeError(f"no lake at {lake.path}", hint="Ingest some data first.")
    with lake.writer("compact"):
        lake.recover()
        return lake.compact(retention_hours)


# --------------------------------------------------------------------------- helpers

def _out_of_order(tbl: pa.Table, cols: list[str]) -> bool:
    """True when some row is lexicographically smaller on ``cols`` than the row before it.

    Vectorised: a handful of comparisons between the table and itself shifted by one row.
    Only for columns without nulls (the caller checks).
    """
    n = tbl.num_rows
    if n < 2:
        return False
    bad = None
    ties = None              # rows equal to their predecessor on the columns seen so far
    for c in cols:
        col = tbl.column(c)
        prev, cur = col.slice(0, n - 1), col.slice(1)
        lt = pc.less(cur, prev)
        step = lt if ties is None else pc.and_(ties, lt)
        bad = step if bad is None else pc.or_(bad, step)
        eq = pc.equal(cur, prev)
        ties = eq if ties is None else pc.and_(ties, eq)
    return bool(pc.any(bad).as_py())


def _has_missing(col: pa.ChunkedArray) -> bool:
    if col.null_count:
        return True
    return pa.types.is_floating(col.type) and bool(pc.any(pc.is_nan(col)).as_py())


def _sort_column(col: pa.ChunkedArray) -> pa.ChunkedArray | pa.Array:
    """A column that sorts like ``col`` (no nulls) but compares faster.

    Text with few distinct values (unit ids) becomes the rank of each value among the
    distinct ones: integers sort several times faster than strings.
    """
    if not (pa.types.is_string(col.type) or pa.types.is_large_string(col.type)):
        return col
    enc = col.combine_chunks().dictionary_encode()
    if len(enc.dictionary) * 4 > len(enc):
        return col
    rank = pc.rank(enc.dictionary, sort_keys="ascending", tiebreaker="first")
    return pc.take(rank, enc.indices)


def sort_order(tbl: pa.Table, key: list[str]) -> pa.Array | None:
    """The permutation that sorts ``tbl`` by ``key`` (ascending, nulls and NaN last,
    stable), or None when the rows are in order already; cheap in the common cases.

    Ingest mostly writes rows that arrive sorted by (unit_id, ts), or sorted by ts with the
    units interleaved (a fleet logger). The first costs one vectorised check; the second a
    stable sort on unit_id alone. Anything else gets a full multi-key sort. Arrow's sorts
    are stable. ``tbl`` needs only the key columns.
    """
    if any(_has_missing(tbl.column(k)) for k in key):
        return pc.sort_indices(tbl, sort_keys=[(k, "ascending", "at_end") for k in key])
    if not _out_of_order(tbl, key):
        return None
    if len(key) > 1 and not _out_of_order(tbl, key[1:]):
        # the rest of the key is already in order: a stable sort on the first column keeps it
        return pc.sort_indices(_sort_column(tbl.column(key[0])))
    keys = pa.table({f"k{i}": _sort_column(tbl.column(k)) for i, k in enumerate(key)})
    return pc.sort_indices(keys, sort_keys=[(f"k{i}", "ascending") for i in range(len(key))])


def _sort_by_key(tbl: pa.Table, key: list[str]) -> pa.Table:
    """Rows sorted by ``key`` (see ``sort_order``); no copy when already in order."""
    order = sort_order(tbl.select(key), key)
    if order is None:
        # one contiguous batch, as a sort would give: readers then see the file's order
        return tbl.combine_chunks() if any(c.num_chunks > 1 for c in tbl.columns) else tbl
    return tbl.take(order)


def _cast_column(col: pa.ChunkedArray, target: pa.DataType) -> pa.ChunkedArray:
    if col.type == target:
        return col
    if pa.types.is_timestamp(target) and pa.types.is_timestamp(col.type):
        # tz-aware: same instant; naive: read as UTC. ns -> us truncates sub-microseconds.
        return col.cast(target, safe=False)
    if pa.types.is_string_view(col.type) if hasattr(pa.types, "is_string_view") else False:
        col = col.cast(pa.large_string())
    if pa.types.is_null(col.type):
        return pa.nulls(len(col), target) if len(col) else pa.chunked_array([], target)
    return col.cast(target)


def _utc_frame(df: pl.DataFrame) -> pl.DataFrame:
    fixes = [pl.col(n).dt.convert_time_zone("UTC") for n, t in df.schema.items()
             if isinstance(t, pl.Datetime) and t.time_zone not in (None, "UTC")]
    return df.with_columns(fixes) if fixes else df


def _qi(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


def _now_iso() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


def _fsync_dir(d: Path) -> None:
    try:
        fd = os.open(d, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)
