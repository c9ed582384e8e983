"""Ingest: read -> map -> validate -> split accepted/quarantined -> dedupe -> append.

One file is one batch. Files are streamed in chunks of ``ingest_chunk_rows`` rows, so memory
stays bounded whatever the file size. Per chunk, all checks are polars expressions (no Python
loop over rows); accepted rows go to ``telemetry`` (or ``maintenance``), rejected rows to
``quarantine`` with file, line, column, rule, message and the raw values as JSON.

Row accounting per file: rows_read = accepted + quarantined + duplicates (blank lines are
not rows). Duplicates are found by key ((unit_id, ts); maintenance: (unit_id, ts, action))
within the file and against the lake: identical values are counted as duplicates and not
written; the same key with other values is quarantined as ``conflicting_duplicate`` (the
first row wins, nothing in the lake is overwritten).

Atomicity: a batch is marked pending before its first write, writes its chunks, then its
``batches`` ledger row, then clears the mark. Readers hide rows of batches that have no ledger
row (see lake.py), and the next writer deletes the rows of a batch that was killed half way,
so a re-run ends complete, without duplicates and with exact accounting.

Speed: three threads share the work of a file (see "pipeline" below): one reads and parses
the next chunks, the main thread validates, dedupes and sorts the current one, one writes the
earlier ones to the lake; each may run up to two chunks ahead of the next. Rows whose key the
next chunk may continue (the last timestamp of a time-ordered chunk, the last unit of a
unit-ordered one) are held back to it, so consecutive chunks share no key range: a chunk's
lake lookup never has to read the previous chunk's file back, nor wait for it to be written
(dedupe waits only for earlier writes whose key range overlaps its own, so it sees what a
sequential run would); a file of one chunk is still one commit. The content hash is worked
out in a fourth thread, started before polars and pyarrow are imported; chunks are validated
meanwhile, and nothing is written before it is known. CSV values of numeric columns are parsed as numbers by the CSV reader; the few rows
where that gives null (empty or not a number) or that fail a check are read again as text and
validated exactly as the text path would (``_recheck_as_text``), so quarantine keeps raw text.
"""
from __future__ import annotations

import abc
import codecs
import csv
import glob as globmod
import gzip
import hashlib
import importlib
import json
import math
import os
import queue
import secrets
import sys
import threading
import tomllib
import zlib
from concurrent.futures import FIRST_COMPLETED, Future, ThreadPoolExecutor
from concurrent.futures import wait as wait_futures
from dataclasses import asdict, dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import TYPE_CHECKING, Callable, Iterator
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

# Polars' allocator (jemalloc) gives freed memory back to the kernel after 0.5 s by default.
# Ingest frees and allocates a few hundred MB per chunk, about once a second, so every chunk
# faulted its memory in again: kernel time was about a third of ingest CPU. Keeping freed
# pages for 10 s lets the next chunk reuse them (measured: ingest CPU -20 %, peak RSS +10 %).
# On a machine of up to 4 cores one arena serves all threads: a chunk is allocated by the
# reader's threads and freed by others, and with an arena per thread the memory one thread
# freed was not reused by the next (measured on 2 cores at 20 M rows: page faults -15 %,
# kernel time -0.3 s, peak RSS -100 MB). jemalloc reads this once, when polars is loaded,
# so it only applies when this module is imported before polars (as `fleetwatch ingest`
# does); a value the user set is kept.
if "polars" not in sys.modules and "_RJEM_MALLOC_CONF" not in os.environ:
    os.environ["_RJEM_MALLOC_CONF"] = "dirty_decay_ms:10000,muzzy_decay_ms:10000" + (
        ",narenas:1" if (os.cpu_count() or 1) <= 4 else "")
# Ingest runs its own stages in parallel (a reader, the validation, two writers); on a
# 2-core machine polars' own thread pool on top of them only adds contention (measured at
# 20 M rows: wall -3 %, peak RSS -100 MB with one polars thread). Same conditions as above;
# a value the user set is kept.
if ("polars" not in sys.modules and "POLARS_MAX_THREADS" not in os.environ
        and (os.cpu_count() or 1) <= 2):
    os.environ["POLARS_MAX_THREADS"] = "1"


def _glibc_keep_large_blocks() -> bool:
    """Let glibc's malloc (the Delta writer's allocator; polars and pyarrow have their own)
    serve blocks up to 512 MB from its heap and keep up to 1 GB freed at the heap's top,
    instead of mapping every large block fresh and unmapping it when freed: each chunk's
    write faulted its buffers in again. Measured at 20 M rows: kernel time 4.1-4.5 s ->
    3.1-3.2 s, ingest wall about 0.5 s less, peak RSS about 130 MB more. Like the jemalloc
    setting above it applies to the whole process and is set when this module is imported;
    Linux with glibc only; MALLOC_MMAP_THRESHOLD_ / MALLOC_TRIM_THRESHOLD_ set by the user
    win. Returns whether it was applied."""
    if not sys.platform.startswith("linux") or any(
            k in os.environ for k in ("MALLOC_MMAP_THRESHOLD_", "MALLOC_TRIM_THRESHOLD_")):
        return False
    try:
        if not os.confstr("CS_GNU_LIBC_VERSION"):
            return False
        import ctypes
        libc = ctypes.CDLL("libc.so.6")
        # mallopt(M_MMAP_THRESHOLD = -3, ...), mallopt(M_TRIM_THRESHOLD = -1, ...)
        return bool(libc.mallopt(-3, 512 * 1024 * 1024)) and \
            bool(libc.mallopt(-1, 1024 * 1024 * 1024))
    except (OSError, ValueError, AttributeError):
        return False


_GLIBC_TUNED = _glibc_keep_large_blocks()

from .errors import InputError, UsageError
from .units import COLUMN_QUANTITY, unit_factor


class _LazyModule:
    """Stands in for a module until its first use, then imports it and puts the module
    itself in its place among this module's globals.

    polars, pyarrow and the lake (which needs both) take most of a second to import, on one
    core. ``ingest_files`` starts hashing the first file before it needs them, so that the
    hash (about a second per GB) runs on the other core meanwhile.
    """

    def __init__(self, module: str, alias: str):
        self._module, self._alias = module, alias

    def __getattr__(self, attr: str):
        mod = importlib.import_module(self._module)
        globals()[self._alias] = mod
        return getattr(mod, attr)


if TYPE_CHECKING:  # annotations only; the lake is imported on first use at run time
    from .lake import Lake

pl = _LazyModule("polars", "pl")
pa = _LazyModule("pyarrow", "pa")
pq = _LazyModule("pyarrow.parquet", "pq")
lakemod = _LazyModule("fleetwatch.lake", "lakemod")

__all__ = ["ingest_files", "IngestReport", "FileReport", "Mapping", "load_mapping",
           "discover_files", "KINDS", "DEFAULT_RESETS_WEAR"]

KINDS = ("telemetry", "maintenance")
FIELDS = {
    "telemetry": ("unit_id", "ts", "v_in", "i_in", "p_in", "n_in", "n_out", "ratio_cmd",
                  "t_out", "temp"),
    "maintenance": ("unit_id", "ts", "action", "note", "resets_wear"),
}
NUMERIC = ("v_in", "i_in", "p_in", "n_in", "n_out", "ratio_cmd", "t_out", "temp")
KEYS = {"telemetry": ("unit_id", "ts"), "maintenance": ("unit_id", "ts", "action")}
VALUES = {"telemetry": NUMERIC, "maintenance": ("note", "resets_wear")}
DEFAULT_RESETS_WEAR = ("roller replaced", "roller changed", "wheel replaced",
                       "cones reground", "overhaul")
_WALK_SUFFIXES = (".csv", ".csv.gz", ".parquet", ".ndjson", ".jsonl", ".ndjson.gz",
                  ".jsonl.gz", ".tsv", ".tsv.gz")
_DELIMS = (",", ";", "\t", "|")
_N_EXTRA = 4          # spare columns that catch rows with too many fields
_C = "__"             # prefix of canonical columns while source columns are still present
_TS_RE = (r"^(\d{4})[-/](\d{1,2})[-/](\d{1,2})"
          r"(?:[T ](\d{1,2}):(\d{2})(?::(\d{2})(?:[.,](\d{1,9}))?)?)?"
          r"\s*(Z|z|UTC|GMT|[+-]\d{2}(?::?\d{2})?)?$")

Progress = Callable[[str, int, int], None]


# =========================================================================== reports

@dataclass
class FileReport:
    """Accounting of one input file (one batch)."""
    path: str
    kind: str
    status: str = "ok"              # ok, refused, skipped
    rows_read: int = 0
    accepted: int = 0
    quarantined: int = 0
    duplicates: int = 0
    message: str = ""
    batch_id: str | None = None
    content_sha256: str | None = None
    rules: dict[str, int] = field(default_factory=dict)   # quarantine rule -> rows

    def to_dict(self) -> dict:
        return asdict(self)


@dataclass
class IngestReport:
    """Per-file accounting and totals of one ``ingest_files`` call."""
    files: list[FileReport] = field(default_factory=list)
    errors: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    strict: bool = False

    @property
    def totals(self) -> dict[str, int]:
        t = {k: sum(getattr(f, k) for f in self.files)
             for k in ("rows_read", "accepted", "quarantined", "duplicates")}
        for s in ("ok", "refused", "skipped"):
            t["files_" + s] = sum(1 for f in self.files if f.status == s)
        return t

    @property
    def exit_code(self) -> int:
        """0 ok; 1 when a file was refused (or, with strict, a row was quarantined)."""
        t = self.totals
        if t["files_refused"] or (self.strict and t["quarantined"]):
            return 1
        return 0

    def to_dict(self) -> dict:
        return {"files": [f.to_dict() for f in self.files], "totals": self.totals,
                "errors": list(self.errors), "notes": list(self.notes),
                "exit_code": self.exit_code}


# =========================================================================== mapping

@dataclass
class ColumnSpec:
    source: str
    unit: str | None = None


@dataclass
class Mapping:
    """A column mapping file (TOML): [format], [columns], [maintenance]."""
    columns: dict[str, ColumnSpec] = field(default_factory=dict)
    delimiter: str | None = None
    timezone: str | None = None
    encoding: str | None = None
    decimal: str = "."
    ts_format: str | None = None
    resets_wear: tuple[str, ...] | None = None
    path: str | None = None


_FORMAT_KEYS = ("delimiter", "timezone", "encoding", "decimal", "ts_format")


def load_mapping(path: str | os.PathLike) -> Mapping:
    """Read a mapping file. Raises InputError naming the file and the bad entry."""
    p = Path(path)
    where = str(p)
    try:
        with open(p, "rb") as fh:
            data = tomllib.load(fh)
    except FileNotFoundError:
        raise InputError(f"mapping file {where} not found",
                         hint="Pass an existing TOML file with --mapping.") from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"mapping file {where}: {exc}", hint="Fix the TOML syntax.") from None
    except OSError as exc:
        raise InputError(f"cannot read mapping file {where}: {exc}") from None
    unknown = [k for k in data if k not in ("format", "columns", "maintenance")]
    if unknown:
        raise InputError(f"mapping file {where}: unknown section(s) {', '.join(unknown)}",
                         hint="Sections are [format], [columns] and [maintenance].")
    m = Mapping(path=where)
    fmt = data.get("format", {})
    bad = [k for k in fmt if k not in _FORMAT_KEYS]
    if bad:
        raise InputError(f"mapping file {where}: unknown [format] key(s) {', '.join(bad)}",
                         hint="Known keys: " + ", ".join(_FORMAT_KEYS) + ".")
    if "delimiter" in fmt:
        d = str(fmt["delimiter"])
        d = {"tab": "\t", "\\t": "\t", "comma": ",", "semicolon": ";", "pipe": "|"}.get(d, d)
        if len(d) != 1:
            raise InputError(f"mapping file {where}: delimiter {fmt['delimiter']!r} must be one "
                             "character", hint='For example delimiter = ";" or "tab".')
        m.delimiter = d
    if "timezone" in fmt:
        m.timezone = _check_tz(str(fmt["timezone"]), where)
    if "encoding" in fmt:
        try:
            m.encoding = codecs.lookup(str(fmt["encoding"])).name
        except LookupError:
            raise InputError(f"mapping file {where}: unknown encoding {fmt['encoding']!r}",
                             hint="Use utf-8, utf-8-sig or latin-1.") from None
    if "decimal" in fmt:
        if fmt["decimal"] not in (".", ","):
            raise InputError(f"mapping file {where}: decimal must be '.' or ','")
        m.decimal = fmt["decimal"]
    if "ts_format" in fmt:
        m.ts_format = str(fmt["ts_format"])
    known = set(FIELDS["telemetry"]) | set(FIELDS["maintenance"])
    for canon, spec in data.get("columns", {}).items():
        if canon not in known:
            raise InputError(f"mapping file {where}: [columns] key '{canon}' is not a canonical "
                             "column", hint="Canonical columns: " + ", ".join(sorted(known)) + ".")
        if isinstance(spec, str):
            m.columns[canon] = ColumnSpec(spec)
        elif isinstance(spec, dict) and isinstance(spec.get("column"), str):
            extra = [k for k in spec if k not in ("column", "unit")]
            if extra:
                raise InputError(f"mapping file {where}: [columns] {canon} has unknown key(s) "
                                 f"{', '.join(extra)}", hint='Use { column = "...", unit = "..." }.')
            m.columns[canon] = ColumnSpec(spec["column"], spec.get("unit"))
        else:
            raise InputError(f"mapping file {where}: [columns] {canon} must be a column name or "
                             '{ column = "...", unit = "..." }')
    mt = data.get("maintenance", {})
    if "resets_wear" in mt:
        rw = mt["resets_wear"]
        if not isinstance(rw, list) or not all(isinstance(x, str) for x in rw):
            raise InputError(f"mapping file {where}: [maintenance] resets_wear must be a list of "
                             "strings")
        m.resets_wear = tuple(rw)
    return m


def _check_tz(name: str, where: str) -> str:
    try:
        ZoneInfo(name)
    except (ZoneInfoNotFoundError, ValueError):
        raise InputError(f"{where}: unknown time zone {name!r}",
                         hint="Use an IANA name such as Europe/Lisbon or UTC.") from None
    return name


# =========================================================================== discovery

def discover_files(paths) -> tuple[list[Path], list[str]]:
    """Expand files, folders (recursive) and globs; returns (files, paths that matched nothing)."""
    if isinstance(paths, (str, os.PathLike)):
        paths = [paths]
    files: list[Path] = []
    missing: list[str] = []
    seen: set[str] = set()

    def add(p: Path):
        k = str(p.resolve())
        if k not in seen:
            seen.add(k)
            files.append(p)

    for raw in paths:
        p = Path(raw).expanduser()
        if p.is_dir():
            found = sorted(q for q in p.rglob("*")
                           if q.is_file() and q.name.lower().endswith(_WALK_SUFFIXES))
            for q in found:
                add(q)
        elif p.is_file():
            add(p)
        elif any(ch in str(raw) for ch in "*?["):
            hits = sorted(Path(h) for h in globmod.glob(str(p), recursive=True))
            hits = [h for h in hits if h.is_file()]
            if not hits:
                missing.append(str(raw))
            for h in hits:
                add(h)
        else:
            missing.append(str(raw))
    return files, missing


# =========================================================================== sources

class _Refuse(Exception):
    """Stop this file: message and hint for the report."""

    def __init__(self, message: str, hint: str = ""):
        super().__init__(message)
        self.message = message
        self.hint = hint


def _file_sha256(path: Path, stop: threading.Event | None = None) -> str | None:
    """Hex SHA-256 of the file's bytes; None when ``stop`` is set before the end."""
    h = hashlib.sha256()
    # one buffer for all reads (no fresh pages per read); large reads, as the thread needs
    # the GIL back after each read and each update while the pipeline's threads run
    buf = bytearray(1 << 24)
    view = memoryview(buf)
    with open(path, "rb", buffering=0) as fh:
        while n := fh.readinto(buf):
            if stop is not None and stop.is_set():
                return None
            h.update(view[:n])
    return h.hexdigest()


def _detect_format(path: Path) -> str:
    name = path.name.lower()
    with open(path, "rb") as fh:
        head = fh.read(4)
    if head == b"PAR1":
        return "parquet"
    inner = name[:-3] if name.endswith(".gz") else name
    if inner.endswith((".ndjson", ".jsonl")):
        return "ndjson"
    if inner.endswith((".parquet", ".pq")):
        raise _Refuse(f"{path} does not look like a Parquet file (no PAR1 magic)",
                      "Re-export the file as Parquet, CSV or NDJSON.")
    if inner.endswith((".csv", ".tsv", ".txt")):
        return "csv"
    raise _Refuse(f"{path}: not a CSV, Parquet or NDJSON file",
                  "Give CSV (.csv, .csv.gz), Parquet (.parquet) or NDJSON (.ndjson, .jsonl) "
                  "files.")


class _ByteStream:
    """Raw or gzip-decompressed bytes, with the position in the file for progress."""

    def __init__(self, path: Path):
        self.raw = open(path, "rb")
        magic = self.raw.read(2)
        self.raw.seek(0)
        self.stream = gzip.GzipFile(fileobj=self.raw, mode="rb") if magic == b"\x1f\x8b" \
            else self.raw
        self.total = os.fstat(self.raw.fileno()).st_size

    def read(self, n: int) -> bytes:
        parts, need = [], n
        while need > 0:
            b = self.stream.read(need)
            if not b:
                break
            parts.append(b)
            need -= len(b)
        return b"".join(parts)

    def readinto(self, view: memoryview) -> int:
        """Fill ``view`` (fewer bytes only at the end of the data); returns the count."""
        got, n = 0, len(view)
        while got < n:
            k = self.stream.readinto(view[got:])
            if not k:
                break
            got += k
        return got

    @property
    def done(self) -> int:
        return self.raw.tell()

    def close(self):
        try:
            if self.stream is not self.raw:
                self.stream.close()
        finally:
            self.raw.close()


class _Source(abc.ABC):
    """Yields chunks: (a frame of source columns plus ``_line``, ``_malformed`` and for
    NDJSON ``_json``; a ``_Retext`` when the frame holds typed columns, else None).
    One subclass per file format (CSV, NDJSON, Parquet)."""
    fmt: str
    columns: list[str]
    notes: list[str]

    @abc.abstractmethod
    def chunks(self) -> Iterator[tuple[pl.DataFrame, _Retext | None]]:
        """The file's rows, in chunks of at most the configured chunk size."""

    def use_typed(self, columns) -> None:
        """Parse these numeric columns as numbers when the format allows (CSV does)."""

    def close(self):
        pass


class _Decoder:
    def __init__(self, encoding: str | None, path: Path):
        self.explicit = encoding
        self.mode = encoding or "utf-8"
        self.path = path
        self.switched_at: int | None = None

    def __call__(self, b: bytes, line: int) -> bytes:
        if self.mode in ("utf-8", "utf-8-sig"):
            if b.isascii():      # the common case: valid UTF-8 without building a str
                return b
            try:
                b.decode("utf-8")
                return b
            except UnicodeDecodeError as exc:
                if self.explicit:
                    raise _Refuse(f"{self.path}: not valid {self.explicit} near line {line} "
                                  f"({exc.reason})",
                                  'Set [format] encoding = "latin-1" (or the file\'s encoding) '
                                  "in the mapping file.") from None
                self.mode = "latin-1"
                self.switched_at = line
        try:
            return b.decode(self.mode).encode("utf-8")
        except UnicodeDecodeError as exc:
            raise _Refuse(f"{self.path}: not valid {self.mode} near line {line} ({exc.reason})",
                          "Set [format] encoding in the mapping file.") from None


def _sniff_delimiter(lines: list[str]) -> str:
    best, best_score = ",", (-1.0, 0)
    for d in _DELIMS:
        try:
            rows = list(csv.reader(lines[:50], delimiter=d))
        except csv.Error:
            continue
        rows = [r for r in rows if r]
        if not rows:
            continue
        n = len(rows[0])
        if n < 2:
            continue
        body = rows[1:]
        consistent = (sum(1 for r in body if len(r) == n) / len(body)) if body else 1.0
        score = (consistent, n)
        if score > best_score:
            best, best_score = d, score
    return best


def _clean_header(names: list[str]) -> list[str]:
    names = [n.strip() for n in names]
    while names and names[-1] == "":
        names.pop()          # a trailing delimiter on every line
    out, seen = [], {}
    for i, n in enumerate(names):
        n = n or f"column_{i + 1}"
        if n in seen:
            seen[n] += 1
            n = f"{n}_{seen[n]}"
        else:
            seen[n] = 1
        out.append(n)
    return out


class _CsvSource(_Source):
    fmt = "csv"

    def __init__(self, path: Path, mapping: Mapping | None, chunk_rows: int):
        self.path = path
        self.notes = []
        self.bs = _ByteStream(path)
        try:
            head = self.bs.read(1 << 20)
        except (OSError, EOFError, zlib.error, gzip.BadGzipFile) as exc:
            self.bs.close()
            raise _Refuse(f"{path}: cannot read ({exc})", "Check that the file is complete.")
        if head.startswith((b"\xff\xfe", b"\xfe\xff")):
            self.bs.close()
            raise _Refuse(f"{path}: UTF-16 text is not supported",
                          "Save the file as UTF-8 (or latin-1) CSV.")
        if b"\x00" in head:
            self.bs.close()
            raise _Refuse(f"{path}: looks binary (NUL bytes), not a CSV file",
                          "Give CSV, Parquet or NDJSON files.")
        if head.startswith(b"\xef\xbb\xbf"):
            head = head[3:]
        enc = mapping.encoding if mapping else None
        if enc == "utf-8-sig":
            enc = "utf-8"
        self.decode = _Decoder(enc, path)
        nl = head.find(b"\n")
        header_b = head if nl < 0 else head[:nl]
        self.carry = b"" if nl < 0 else head[nl + 1:]
        sample_b = head[: max(head.rfind(b"\n"), 0)] or head
        sample = self.decode(sample_b, 1).decode("utf-8", "replace")
        lines = sample.splitlines()[:60]
        if not lines or not lines[0].strip():
            self.bs.close()
            raise _Refuse(f"{path}: empty file or empty header line",
                          "The first line must hold the column names.")
        self.delimiter = (mapping.delimiter if mapping and mapping.delimiter
                          else _sniff_delimiter(lines))
        if not (mapping and mapping.delimiter):
            self.notes.append("delimiter " + {"\t": "tab"}.get(self.delimiter,
                                                               repr(self.delimiter)))
        header_txt = self.decode(header_b, 1).decode("utf-8").rstrip("\r")
        self.columns = _clean_header(next(csv.reader([header_txt], delimiter=self.delimiter)))
        self.n_header_fields = len(self.columns)
        avg = max(8.0, len(sample_b) / max(1, sample_b.count(b"\n") + 1))
        self.block_bytes = int(max(1 << 12, min(chunk_rows * avg * 1.05, 1 << 30)))
        self.next_line = 2
        self.typed: list[str] = []

    @staticmethod
    def _cut(buf, end: int | None = None, quotes_before: int = 0) -> int | None:
        """Offset just after the last line break in ``buf[:end]`` outside quotes, counting
        ``quotes_before`` quote characters that come before ``buf``; None when there is none.
        """
        q = b'"'
        end = len(buf) if end is None else end
        p = buf.rfind(b"\n", 0, end)
        if not quotes_before and buf.find(q, 0, end) < 0:
            return p + 1 if p >= 0 else None
        total = quotes_before + buf.count(q, 0, end)
        tries = 0
        while p >= 0 and tries < 64:
            if (total - buf.count(q, p, end)) % 2 == 0:
                return p + 1
            p = buf.rfind(b"\n", 0, p)
            tries += 1
        return None

    def _blocks(self) -> Iterator[bytes]:
        """Blocks of about ``block_bytes`` that end at a line break outside quotes.

        Every read lands in one reused buffer and each block is built with a single copy:
        fresh memory costs page faults, which were a large share of the CPU time.
        """
        size = self.block_bytes
        carry, self.carry = self.carry, b""
        while len(carry) > size:            # the first read (1 MB) can hold several blocks
            cut, end = None, size
            while cut is None and end < min(len(carry), 16 * size):
                cut = self._cut(carry, end)     # None: an open quote or a long line
                end *= 2
            if cut is None:
                break
            yield carry[:cut]
            carry = carry[cut:]
        buf = bytearray(size)
        view = memoryview(buf)
        pending = [carry] if carry else []  # read, not yet yielded; comes before buf
        pending_len, pending_quotes = len(carry), carry.count(b'"')
        while True:
            n = self.bs.readinto(view)
            if n == 0:
                if pending_len:
                    yield b"".join(pending)
                return
            cut = self._cut(buf, n, pending_quotes)
            if cut is None:
                if pending_len + n < 8 * size:     # an open quote or a long line: read on
                    more = bytes(view[:n])
                    pending.append(more)
                    pending_len += n
                    pending_quotes += more.count(b'"')
                    continue
                cut = buf.rfind(b"\n", 0, n) + 1 or n    # give up on quote balance
            yield b"".join(pending + [view[:cut]])
            rest = bytes(view[cut:n])
            pending = [rest] if rest else []
            pending_len, pending_quotes = len(rest), rest.count(b'"')

    def use_typed(self, columns) -> None:
        """Read ``columns`` (source columns holding numbers) as Float64 while parsing.

        Parsing text and casting it afterwards cost a third of the validation time; the CSV
        reader parses numbers directly. Any value it cannot parse becomes null and its row
        is read again as text (see ``chunks``), so results never depend on this.
        """
        self.typed = [c for c in columns if c in self.columns]

    def _text_frame(self, data: bytes, first_line: int, lines: pl.Series | None = None
                    ) -> pl.DataFrame:
        """Parse ``data`` with every column as text: the source columns, ``_extra_<i>``,
        ``_line`` and ``_malformed``; lines holding only blanks or delimiters are dropped.
        ``lines`` gives the line number of every physical line when ``data`` is not a
        contiguous run of the file's lines."""
        names = self.columns + [f"_extra_{i + 1}" for i in range(_N_EXTRA)]
        df = pl.read_csv(data, has_header=False, separator=self.delimiter,
                         quote_char='"', schema={n: pl.String for n in names},
                         missing_columns="insert", truncate_ragged_lines=True,
                         empty_string_is_null=False, raise_if_empty=False, infer_schema=False)
        if df.height == 0:
            return df.with_columns(_line=pl.lit(None, pl.Int64), _malformed=pl.lit(False))
        physical = _count_newlines(data) + (0 if data.endswith(b"\n") else 1)
        if lines is not None:
            if physical != df.height:
                raise RuntimeError("lines read again as text did not give one row each")
            line = lines.alias("_line")
        else:
            idx = pl.int_range(0, pl.len(), dtype=pl.Int64)
            if physical == df.height:
                line = idx + first_line
            else:  # quoted fields hold line breaks: count them per row
                nl = pl.sum_horizontal([pl.col(c).str.count_matches("\n", literal=True)
                                        .fill_null(0) for c in names]).cast(pl.Int64)
                line = idx + first_line + (nl.cum_sum() - nl)
        df = df.with_columns(_line=line)
        # lines holding only blanks or delimiters are not rows
        maybe = df[names[0]].fill_null("").str.strip_chars() == ""
        if maybe.any():
            blank = pl.all_horizontal([pl.col(c).fill_null("").str.strip_chars() == ""
                                       for c in names])
            df = df.filter(~blank)
        return df.with_columns(_malformed=_extras_filled(df, strip=True))

    def _typed_frame(self, data: bytes, first_line: int, n_newlines: int
                     ) -> pl.DataFrame | None:
        """Parse ``data`` with the typed columns as Float64 (see ``use_typed``), plus
        ``_line``, ``_malformed`` and ``_suspect`` (rows to read again as text: a typed value
        is null, which is an empty field or one the reader could not parse; or a field past
        the header is not empty). None when that is not worth it here: quoted line breaks (a
        row is then not one line), a row with two or more fields past the header, or many
        suspect rows.

        Only one spare column is parsed (the reader refuses a row with more fields, and the
        text parse then takes the block): four cost about a fifth of the parse."""
        names = self.columns + ["_extra_1"]
        typed = set(self.typed)
        schema = {n: (pl.Float64 if n in typed else pl.String) for n in names}
        try:
            df = pl.read_csv(data, has_header=False, separator=self.delimiter,
                             quote_char='"', schema=schema, missing_columns="insert",
                             truncate_ragged_lines=False, empty_string_is_null=False,
                             raise_if_empty=False, infer_schema=False, ignore_errors=True)
        except pl.exceptions.PolarsError:
            return None                     # the text parse reports it, with the lines
        physical = n_newlines + (0 if data.endswith(b"\n") else 1)
        if df.height == 0 or physical != df.height:
            return None
        df = df.with_columns(_line=pl.int_range(0, pl.len(), dtype=pl.Int64) + first_line,
                             _malformed=_extras_filled(df, strip=False),
                             **{f"_extra_{i + 1}": pl.lit(None, pl.String)
                                for i in range(1, _N_EXTRA)})
        df = df.with_columns(_suspect=pl.any_horizontal(
            [pl.col(c).is_null() for c in self.typed] + [pl.col("_malformed")]))
        if int(df["_suspect"].sum()) * 20 > df.height:
            return None                     # more than 5 %: one text parse is cheaper
        return df

    def chunks(self) -> Iterator[tuple[pl.DataFrame, Callable | None]]:
        first_line = self.next_line
        try:
            for block in self._blocks():
                first_line = self.next_line
                n_newlines = _count_newlines(block)
                self.next_line += n_newlines
                data = self.decode(block, first_line)
                del block
                df = self._typed_frame(data, first_line, n_newlines) if self.typed else None
                if df is not None:
                    yield df, _Retext(self, data, first_line)
                    continue
                df = self._text_frame(data, first_line)
                if df.height:
                    yield df, None
        except (OSError, EOFError, zlib.error, gzip.BadGzipFile) as exc:
            raise _Refuse(f"{self.path}: cannot read past line {self.next_line} ({exc})",
                          "The file may be truncated; export it again.") from None
        except pl.exceptions.PolarsError as exc:
            last = max(first_line, self.next_line - 1)
            where = f"line {first_line}" if last == first_line else \
                f"lines {first_line}-{last}"
            raise _Refuse(f"{self.path}: cannot parse CSV in {where}: "
                          f"{str(exc).splitlines()[0]}",
                          "Check the delimiter and quoting; set [format] delimiter.") from None
        if self.decode.switched_at is not None:
            self.notes.append(f"decoded as latin-1 from line {self.decode.switched_at}")

    @property
    def bytes_done(self) -> int:
        return self.bs.done

    @property
    def bytes_total(self) -> int:
        return self.bs.total

    def close(self):
        self.bs.close()


def _extras_filled(df: pl.DataFrame, strip: bool) -> pl.Series:
    """Per row: does a field past the header (``_extra_<i>``) hold anything (with
    ``strip``: anything but blanks)? A file without such fields costs one length check."""
    extras = [f"_extra_{i + 1}" for i in range(_N_EXTRA) if f"_extra_{i + 1}" in df.columns]
    if not any(df.select([pl.col(e).str.len_bytes().max() for e in extras]).row(0)):
        return pl.repeat(False, df.height, dtype=pl.Boolean, eager=True)
    cols = [pl.col(e).fill_null("") for e in extras]
    if strip:
        cols = [c.str.strip_chars() for c in cols]
    return df.select(pl.any_horizontal([c != "" for c in cols])).to_series()


def _count_newlines(data: bytes) -> int:
    """``data.count(b"\\n")``, about four times faster: numpy compares a slice at a time
    (kept small, so that the comparison's result stays in cache)."""
    import numpy as np
    a = np.frombuffer(data, np.uint8)
    step = 1 << 18
    return sum(int(np.count_nonzero(a[i:i + step] == 10)) for i in range(0, len(a), step))


class _Retext:
    """Text of chosen rows of one typed CSV block (see ``_CsvSource.use_typed``).

    Calling it with line numbers parses those lines again with every column as text, as
    the text path would have: (frame as ``_CsvSource._text_frame`` gives it). A typed block
    has no quoted line breaks, so its row ``i`` is its physical line ``i``.
    """

    def __init__(self, src: _CsvSource, data: bytes, first_line: int):
        self.src, self.data, self.first_line = src, data, first_line

    def __call__(self, lines: pl.Series) -> pl.DataFrame:
        import numpy as np
        buf = np.frombuffer(self.data, dtype=np.uint8)
        ends = np.flatnonzero(buf == 10) + 1                    # just after each line break
        if not len(ends) or ends[-1] != len(buf):
            ends = np.append(ends, len(buf))
        starts = np.concatenate(([0], ends[:-1]))
        idx = (lines.to_numpy() - self.first_line).astype(np.int64)
        d = self.data
        parts = [d[a:b] if d[b - 1:b] == b"\n" else d[a:b] + b"\n"
                 for a, b in zip(starts[idx].tolist(), ends[idx].tolist())]
        return self.src._text_frame(b"".join(parts), self.first_line,
                                    lines=lines.cast(pl.Int64))


class _NdjsonSource(_Source):
    fmt = "ndjson"

    def __init__(self, path: Path, mapping: Mapping | None, chunk_rows: int):
        self.path = path
        self.notes = []
        self.bs = _ByteStream(path)
        try:
            head = self.bs.read(1 << 20)
        except (OSError, EOFError, zlib.error, gzip.BadGzipFile) as exc:
            self.bs.close()
            raise _Refuse(f"{path}: cannot read ({exc})")
        if head.startswith(b"\xef\xbb\xbf"):
            head = head[3:]
        self.carry = head
        enc = mapping.encoding if mapping else None
        self.decode = _Decoder(None if enc in (None, "utf-8-sig") else enc, path)
        keys: dict[str, None] = {}
        text = self.decode(head[: max(head.rfind(b"\n"), 0)] or head, 1).decode("utf-8")
        lines = text.splitlines()
        for ln in lines[:1000]:
            try:
                obj = json.loads(ln)
            except ValueError:
                continue
            if isinstance(obj, dict):
                for k in obj:
                    keys.setdefault(str(k), None)
        if not keys:
            self.bs.close()
            raise _Refuse(f"{path}: no JSON objects found in the first lines",
                          "NDJSON needs one JSON object per line.")
        self.columns = list(keys)
        avg = max(8.0, len(text) / max(1, len(lines)))
        self.block_bytes = int(max(1 << 12, min(chunk_rows * avg * 1.05, 1 << 30)))
        self.next_line = 1

    def chunks(self) -> Iterator[tuple[pl.DataFrame, None]]:
        carry, eof = self.carry, False
        try:
            while True:
                if not eof and len(carry) < self.block_bytes:
                    more = self.bs.read(self.block_bytes - len(carry))
                    if len(more) < self.block_bytes - len(carry):
                        eof = True
                    carry += more
                if eof:
                    block, carry = carry, b""
                else:
                    cut = carry.rfind(b"\n") + 1
                    if cut == 0:
                        self.block_bytes *= 2
                        continue
                    block, carry = carry[:cut], carry[cut:]
                if block:
                    first = self.next_line
                    self.next_line += block.count(b"\n")
                    text = self.decode(block, first).decode("utf-8")
                    lines = text.split("\n")
                    if text.endswith("\n"):
                        lines.pop()
                    df = pl.DataFrame({"_json": pl.Series(lines, dtype=pl.String)})
                    df = df.with_columns(
                        _line=pl.int_range(0, pl.len(), dtype=pl.Int64) + first,
                        _json=pl.col("_json").str.strip_chars())
                    df = df.filter(pl.col("_json") != "")
                    root = pl.col("_json").str.json_path_match("$")
                    df = df.with_columns(
                        _malformed=root.is_null() | ~pl.col("_json").str.starts_with("{"))
                    cols = [pl.col("_json").str.json_path_match(_json_path(c)).alias(c)
                            for c in self.columns]
                    yield df.with_columns(cols), None
                if eof and not carry:
                    return
        except (OSError, EOFError, zlib.error, gzip.BadGzipFile) as exc:
            raise _Refuse(f"{self.path}: cannot read past line {self.next_line} ({exc})",
                          "The file may be truncated; export it again.") from None

    @property
    def bytes_done(self) -> int:
        return self.bs.done

    @property
    def bytes_total(self) -> int:
        return self.bs.total

    def close(self):
        self.bs.close()


def _json_path(key: str) -> str:
    if key.isidentifier():
        return f"$.{key}"
    return "$['" + key.replace("\\", "\\\\").replace("'", "\\'") + "']"


class _ParquetSource(_Source):
    fmt = "parquet"

    def __init__(self, path: Path, mapping: Mapping | None, chunk_rows: int):
        self.path = path
        self.notes = []
        self.chunk_rows = chunk_rows
        try:
            self.pf = pq.ParquetFile(path)
        except (pa.ArrowException, OSError) as exc:
            raise _Refuse(f"{path}: not a readable Parquet file ({exc})",
                          "Re-export the file as Parquet, CSV or NDJSON.") from None
        self.columns = list(self.pf.schema_arrow.names)
        self.total_rows = self.pf.metadata.num_rows
        self.done_rows = 0
        self.size = path.stat().st_size

    def chunks(self) -> Iterator[tuple[pl.DataFrame, None]]:
        offset = 1
        try:
            for batch in self.pf.iter_batches(batch_size=self.chunk_rows):
                df = pl.from_arrow(pa.Table.from_batches([batch]))
                if isinstance(df, pl.Series):
                    df = df.to_frame()
                n = df.height
                df = df.with_columns(_line=pl.int_range(0, pl.len(), dtype=pl.Int64) + offset,
                                     _malformed=pl.lit(False))
                offset += n
                self.done_rows += n
                yield df, None
        except (pa.ArrowException, OSError) as exc:
            raise _Refuse(f"{self.path}: cannot read Parquet data after row {offset - 1} "
                          f"({exc})", "The file may be damaged; export it again.") from None

    @property
    def bytes_done(self) -> int:
        return int(self.size * self.done_rows / max(1, self.total_rows))

    @property
    def bytes_total(self) -> int:
        return self.size

    def close(self):
        try:
            self.pf.close()
        except Exception:  # pragma: no cover - older pyarrow has no close()
            pass


def _open_source(path: Path, mapping: Mapping | None, chunk_rows: int) -> _Source:
    fmt = _detect_format(path)
    if fmt == "parquet":
        return _ParquetSource(path, mapping, chunk_rows)
    if fmt == "ndjson":
        return _NdjsonSource(path, mapping, chunk_rows)
    return _CsvSource(path, mapping, chunk_rows)


# =========================================================================== validation

@dataclass
class _Plan:
    """How canonical columns come from source columns for one file."""
    kind: str
    sources: dict[str, str]             # canonical -> source column
    factors: dict[str, tuple[float, float]]
    tz: str
    decimal: str
    ts_format: str | None
    resets_wear: tuple[str, ...]
    source_columns: list[str]


def _find(columns: list[str], name: str) -> str | None:
    if name in columns:
        return name
    folded = [c for c in columns if c.strip().casefold() == name.strip().casefold()]
    return folded[0] if len(folded) == 1 else None


def _make_plan(kind: str, src: _Source, mapping: Mapping | None, settings, path: Path) -> _Plan:
    cols = src.columns
    listing = ", ".join(cols) if len(cols) <= 40 else ", ".join(cols[:40]) + ", ..."
    sources: dict[str, str] = {}
    factors: dict[str, tuple[float, float]] = {}
    for canon in FIELDS[kind]:
        spec = mapping.columns.get(canon) if mapping else None
        if spec is not None:
            found = _find(cols, spec.source)
            if found is None:
                raise _Refuse(f"column '{spec.source}' (mapped to {canon}) not found in {path}; "
                              f"columns are: {listing}",
                              f"Fix [columns] {canon} in the mapping file {mapping.path}.")
            sources[canon] = found
            if canon in COLUMN_QUANTITY:
                q = COLUMN_QUANTITY[canon]
                try:
                    factors[canon] = unit_factor(spec.unit, q) if spec.unit else (1.0, 0.0)
                except InputError as exc:
                    raise _Refuse(f"{path}: [columns] {canon}: {exc.message}",
                                  exc.hint or "") from None
        else:
            found = _find(cols, canon)
            if found is not None and not (mapping and found in
                                          {s.source for s in mapping.columns.values()}):
                sources[canon] = found
                factors[canon] = (1.0, 0.0)
    if kind == "telemetry":
        required = ["unit_id", "ts", "n_in", "n_out", "ratio_cmd"]
        if "p_in" not in sources:
            required += ["v_in", "i_in"]
    else:
        required = ["unit_id", "ts", "action"]
    missing = [c for c in required if c not in sources]
    if missing:
        need = ", ".join(missing)
        extra = (" (or p_in instead of v_in and i_in)"
                 if kind == "telemetry" and {"v_in", "i_in"} & set(missing) else "")
        raise _Refuse(f"{path}: no column for {need}{extra}; columns are: {listing}",
                      "Map them in [columns] of a mapping file (--mapping), e.g. "
                      f'{missing[0]} = "<source column>".')
    tz = (mapping.timezone if mapping and mapping.timezone else settings.plant_timezone)
    try:
        ZoneInfo(tz)
    except (ZoneInfoNotFoundError, ValueError):
        raise _Refuse(f"unknown time zone {tz!r} (plant_timezone or [format] timezone)",
                      "Use an IANA name such as Europe/Lisbon.") from None
    rw = (mapping.resets_wear if mapping and mapping.resets_wear is not None
          else DEFAULT_RESETS_WEAR)
    return _Plan(kind, sources, factors, tz, mapping.decimal if mapping else ".",
                 mapping.ts_format if mapping else None, rw, cols)


def _num(name: str, dtype, decimal: str) -> tuple[pl.Expr, pl.Expr]:
    """(value as Float64, value present) for a source column of any type."""
    c = pl.col(name)
    if dtype == pl.String:
        s = c.str.strip_chars()
        if decimal == ",":
            s = s.str.replace(",", ".", literal=True)
        return s.cast(pl.Float64, strict=False), s.is_not_null() & (s != "")
    if dtype.is_numeric() or dtype == pl.Boolean:
        return c.cast(pl.Float64, strict=False), c.is_not_null()
    s = c.cast(pl.String, strict=False).str.strip_chars()
    return s.cast(pl.Float64, strict=False), s.is_not_null() & (s != "")


_FAST_AWARE = ("%Y-%m-%dT%H:%M:%S%.f%#z", "%Y-%m-%d %H:%M:%S%.f%#z")
_FAST_NAIVE = ("%Y-%m-%dT%H:%M:%S%.f", "%Y-%m-%d %H:%M:%S%.f")


def _nulls(n: int, dtype) -> pl.Series:
    return pl.Series("", [], dtype=dtype).extend_constant(None, n)


def _parse_number(df: pl.DataFrame, name: str, decimal: str) -> tuple[pl.Series, pl.Series]:
    """(Float64 values, present) of a source column. Text is cast directly; only a column
    with values that fail (surrounding blanks, decimal commas) pays for the slow path."""
    col = df[name]
    if col.dtype.is_numeric() or col.dtype == pl.Boolean:
        return col.cast(pl.Float64, strict=False), col.is_not_null()
    s = col.cast(pl.String, strict=False)
    if decimal == ",":
        s = s.str.replace(",", ".", literal=True)
    v = s.cast(pl.Float64, strict=False)
    present = s.is_not_null() & (s != "")
    retry = present & v.is_null()
    if retry.any():
        pos = retry.arg_true()
        sub = s.gather(pos).str.strip_chars()
        v = v.scatter(pos, sub.cast(pl.Float64, strict=False))
        empty = sub == ""
        if empty.any():
            present = present.scatter(pos.filter(empty), False)
    return v, present


def _parse_ts_regex(s: pl.Series) -> tuple[pl.Series, pl.Series]:
    """(aware UTC, naive) for ISO-like strings the fast formats did not take: single-digit
    fields, '/' separators, minutes without seconds, dates alone, 'UTC'/'GMT' suffixes."""
    d = pl.DataFrame({"s": s.str.strip_chars()}).with_columns(
        g=pl.col("s").str.extract_groups(_TS_RE))
    f = [pl.col("g").struct.field(str(i)) for i in range(1, 9)]
    norm = pl.concat_str([f[0], pl.lit("-"), f[1].str.zfill(2), pl.lit("-"), f[2].str.zfill(2),
                          pl.lit(" "), f[3].fill_null("0").str.zfill(2), pl.lit(":"),
                          f[4].fill_null("00"), pl.lit(":"), f[5].fill_null("00"), pl.lit("."),
                          f[6].fill_null("0")])
    off = f[7]
    sign = pl.when(off.str.starts_with("-")).then(-1).otherwise(1)
    digits = off.str.replace_all(r"[^0-9]", "")
    off_min = pl.when(off.is_in(["Z", "z", "UTC", "GMT"])).then(0).otherwise(
        sign * (digits.str.slice(0, 2).cast(pl.Int64, strict=False) * 60
                + digits.str.slice(2, 2).cast(pl.Int64, strict=False).fill_null(0)))
    d = d.with_columns(naive=norm.str.to_datetime("%Y-%m-%d %H:%M:%S%.f", strict=False,
                                                  time_unit="us"),
                       has_off=off.is_not_null(), off_min=off_min)
    d = d.with_columns(
        aware=pl.when(pl.col("has_off")).then(
            pl.col("naive").dt.replace_time_zone("UTC") - pl.duration(minutes=pl.col("off_min"))),
        naive=pl.when(pl.col("has_off")).then(None).otherwise(pl.col("naive")))
    return d["aware"].cast(pl.Datetime("us", "UTC")), d["naive"].cast(pl.Datetime("us"))


def _timestamp(df: pl.DataFrame, name: str, plan: _Plan) -> pl.DataFrame:
    """Add __ts (UTC), __ts_present and __ts_rule (null, bad_timestamp,
    nonexistent_local_time or ambiguous_local_time) for the source column ``name``.

    Timestamps with an offset (or Z) are exact instants. Naive ones are read in the
    mapping's / plant's time zone: a local time skipped by a DST change is
    nonexistent_local_time, one that happens twice is ambiguous_local_time.
    """
    col = df[name]
    dtype = col.dtype
    utc = pl.Datetime("us", "UTC")
    n = df.height
    fmt = plan.ts_format
    if isinstance(dtype, pl.Datetime) and dtype.time_zone:
        aware = col.dt.convert_time_zone("UTC").cast(utc)
        naive = _nulls(n, pl.Datetime("us"))
        present = col.is_not_null()
    elif isinstance(dtype, (pl.Datetime, pl.Date)):
        aware = _nulls(n, utc)
        naive = col.cast(pl.Datetime("us"))
        present = col.is_not_null()
    elif fmt in ("epoch_s", "epoch_ms"):
        v, pr = _num(name, dtype, plan.decimal)
        tmp = df.select(v.alias("v"), pr.alias("p"))
        mult, lim = (1_000_000, 1e11) if fmt == "epoch_s" else (1_000, 1e14)
        ok = tmp["v"].is_finite() & (tmp["v"].abs() < lim)
        aware = tmp.select(pl.when(ok).then((pl.col("v") * mult).round(0).cast(pl.Int64))
                           .cast(pl.Datetime("us")).dt.replace_time_zone("UTC"))[:, 0]
        naive = _nulls(n, pl.Datetime("us"))
        present = tmp["p"]
    else:
        s = col.cast(pl.String, strict=False)
        present = s.is_not_null() & (s != "")
        if fmt and ("%z" in fmt or "%Z" in fmt or "%:z" in fmt):
            aware = s.str.strip_chars().str.to_datetime(fmt, strict=False, time_unit="us",
                                                        time_zone="UTC")
            naive = _nulls(n, pl.Datetime("us"))
        elif fmt:
            aware = _nulls(n, utc)
            naive = s.str.strip_chars().str.to_datetime(fmt, strict=False, time_unit="us")
        else:
            aware = s.str.to_datetime(_FAST_AWARE[0], strict=False, time_unit="us",
                                      time_zone="UTC")
            naive = _nulls(n, pl.Datetime("us"))
            left = aware.is_null() & present
            if left.any():
                naive = s.str.to_datetime(_FAST_NAIVE[0], strict=False, time_unit="us")
                left = left & naive.is_null()
            for fa, fn in zip(_FAST_AWARE[1:], _FAST_NAIVE[1:]):
                if not left.any():
                    break
                pos = left.arg_true()
                sub = s.gather(pos)
                aware = aware.scatter(pos, sub.str.to_datetime(fa, strict=False, time_unit="us",
                                                               time_zone="UTC"))
                naive = naive.scatter(pos, sub.str.to_datetime(fn, strict=False,
                                                               time_unit="us"))
                left = left & aware.is_null() & naive.is_null()
            if left.any():
                pos = left.arg_true()
                sub = s.gather(pos)
                a2, n2 = _parse_ts_regex(sub)
                aware = aware.scatter(pos, a2)
                naive = naive.scatter(pos, n2)
                blank = sub.str.strip_chars() == ""
                if blank.any():
                    present = present.scatter(pos.filter(blank), False)
    d = pl.DataFrame({"aware": aware, "naive": naive, "present": present})
    need_local = d.select((pl.col("aware").is_null() & pl.col("naive").is_not_null()).any()).item()
    if need_local and plan.tz != "UTC":
        nv = pl.col("naive")
        d = d.with_columns(
            strict=nv.dt.replace_time_zone(plan.tz, ambiguous="null", non_existent="null"),
            early=nv.dt.replace_time_zone(plan.tz, ambiguous="earliest", non_existent="null"))
        d = d.with_columns(
            local=pl.col("strict").dt.convert_time_zone("UTC"),
            ne=nv.is_not_null() & pl.col("early").is_null(),
            amb=nv.is_not_null() & pl.col("early").is_not_null() & pl.col("strict").is_null())
    elif need_local:
        d = d.with_columns(local=pl.col("naive").dt.replace_time_zone("UTC"),
                           ne=pl.lit(False), amb=pl.lit(False))
    else:
        d = d.with_columns(local=pl.lit(None, utc), ne=pl.lit(False), amb=pl.lit(False))
    d = d.with_columns(ts=pl.coalesce(pl.col("aware"), pl.col("local").cast(utc)))
    p, aw = pl.col("present"), pl.col("aware").is_not_null()
    rule = (pl.when(~p | pl.col("ts").is_not_null()).then(pl.lit(None, pl.String))
            .when(~aw & pl.col("ne")).then(pl.lit("nonexistent_local_time"))
            .when(~aw & pl.col("amb")).then(pl.lit("ambiguous_local_time"))
            .otherwise(pl.lit("bad_timestamp")))
    d = d.select(pl.col("ts").alias("__ts"), p.alias("__ts_present"), rule.alias("__ts_rule"))
    return df.with_columns(d.get_columns())


def _fmt(x: pl.Expr) -> pl.Expr:
    return x.cast(pl.String).fill_null("")


def _validate(df: pl.DataFrame, plan: _Plan, settings,
              fmt: str) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Parse and check one chunk: (good rows: _line and __<canonical> columns; bad rows:
    _line, _rule, _col, _msg, _raw).

    Canonical values land in ``__<name>`` columns. Each check is materialised as a boolean
    column first and the first failing check (in column order) names the rule, so the
    expression graph stays small and every row costs a few vector operations.
    """
    kind, S = plan.kind, plan.sources
    checks: list[tuple[pl.Expr, str, str | None, pl.Expr]] = []
    groups: list[str] = []      # what each check is about (see _checks_that_may_fail)

    def tag(group: str) -> None:
        groups.extend([group] * (len(checks) - len(groups)))

    uid_src, ts_src = S["unit_id"], S["ts"]

    df = df.with_columns(__unit_id=_stripped(df[uid_src]))
    df = _timestamp(df, ts_src, plan)
    checks.append((pl.col("_malformed"), "malformed_row", None,
                   pl.lit("the row has more fields than the header (or is not a JSON object)")))
    tag("malformed")
    uid = pl.col("__unit_id")
    checks.append((uid.is_null() | (uid == ""), "empty_unit_id", uid_src,
                   pl.lit(f"unit_id ({uid_src}) is empty")))
    tag("unit_id")
    raw_ts = _fmt(pl.col(ts_src))
    checks.append((~pl.col("__ts_present"), "missing_value", ts_src,
                   pl.lit(f"ts ({ts_src}) is empty")))
    for rule, text in (("bad_timestamp", "is not a timestamp (expected ISO 8601 such as "
                        "2024-03-31T02:30:00+01:00)"),
                       ("nonexistent_local_time", f"does not exist in {plan.tz} (clocks went "
                        "forward); log with a UTC offset"),
                       ("ambiguous_local_time", f"happened twice in {plan.tz} (clocks went "
                        "back); log with a UTC offset")):
        checks.append((pl.col("__ts_rule") == rule, rule, ts_src,
                       pl.concat_str([pl.lit(f"ts ({ts_src}) '"), raw_ts, pl.lit(f"' {text}")])))
    tag("ts")

    if kind == "telemetry":
        bounds = _numeric_bounds(settings)
        required = {"n_in", "n_out", "ratio_cmd"}
        if "p_in" not in S:
            required |= {"v_in", "i_in"}
        parsed = []
        for canon in NUMERIC:
            if canon not in S:
                parsed += [_nulls(df.height, pl.Float64).alias(_C + canon),
                           _nulls(df.height, pl.Boolean).fill_null(False)
                           .alias(f"{_C}{canon}_present")]
                continue
            src = S[canon]
            v, present = _parse_number(df, src, plan.decimal)
            scale, offset = plan.factors.get(canon, (1.0, 0.0))
            if (scale, offset) != (1.0, 0.0):
                v = v * scale + offset
            parsed += [v.alias(_C + canon), present.alias(f"{_C}{canon}_present")]
        df = df.with_columns(parsed)
        p = pl.col("__p_in")
        df = df.with_columns(__p_in_parsed=p)
        if "v_in" in S and "i_in" in S:
            vi = pl.col("__v_in") * pl.col("__i_in")
            df = df.with_columns(__p_in=pl.coalesce(p, vi) if "p_in" in S else vi)
        for canon in NUMERIC:
            if canon not in S:
                continue
            src = S[canon]
            v, present = pl.col(_C + canon), pl.col(f"{_C}{canon}_present")
            raw = _fmt(pl.col(src))
            lo, hi, unit = bounds[canon]
            if canon in required:
                checks.append((~present, "missing_value", src,
                               pl.lit(f"{canon} ({src}) is empty")))
            if canon == "p_in":
                checks.append((present & pl.col("__p_in_parsed").is_null(),
                               "not_numeric", src,
                               pl.concat_str([pl.lit(f"p_in ({src}) '"), raw,
                                              pl.lit("' is not a number")])))
                checks.append((v.is_null(), "missing_value", src,
                               pl.lit(f"p_in ({src}) is empty and v_in*i_in is not available")))
            else:
                checks.append((present & v.is_null(), "not_numeric", src,
                               pl.concat_str([pl.lit(f"{canon} ({src}) '"), raw,
                                              pl.lit("' is not a number")])))
            checks.append((v.is_not_null() & ~v.is_finite(), "not_finite", src,
                           pl.concat_str([pl.lit(f"{canon} ({src}) '"), raw,
                                          pl.lit("' is not a finite number")])))
            if canon in ("n_in", "n_out"):
                what = f"must be >= 0 and <= {hi:g} rpm (n_max_rpm)"
            elif canon == "ratio_cmd":
                what = f"is outside [{lo:g}, {hi:g}] (ratio_min, ratio_max)"
            elif canon == "temp":
                what = f"is outside [{lo:g}, {hi:g}] degC (temp_min_c, temp_max_c)"
            else:
                what = f"exceeds +/-{hi:g} {unit} (bounds in settings)"
            checks.append((v.is_finite() & ((v < lo) | (v > hi)), "out_of_range", src,
                           pl.concat_str([pl.lit(f"{canon} ({src}) = "),
                                          v.round(6).cast(pl.String),
                                          pl.lit((f" {unit} " if unit != "-" else " ") + what)])))
            tag(canon)
        if "p_in" not in S:
            v = pl.col("__p_in")
            checks.append((v.is_finite() & (v.abs() > settings.p_max_w), "out_of_range",
                           S["v_in"], pl.concat_str([pl.lit("p_in = v_in*i_in = "),
                                                     v.round(3).cast(pl.String),
                                                     pl.lit(f" W exceeds +/-{settings.p_max_w:g}"
                                                            " W (p_max_w)")])))
            checks.append((v.is_not_null() & ~v.is_finite(), "not_finite", S["v_in"],
                           pl.lit("p_in = v_in*i_in is not a finite number")))
            tag("p_in")
    else:
        a_src = S["action"]
        df = df.with_columns(__action=pl.col(a_src).cast(pl.String, strict=False)
                             .str.strip_chars())
        action = pl.col("__action")
        checks.append((action.is_null() | (action == ""), "missing_value", a_src,
                       pl.lit(f"action ({a_src}) is empty")))
        if "note" in S:
            note = pl.col(S["note"]).cast(pl.String, strict=False).str.strip_chars()
            df = df.with_columns(__note=pl.when(note == "").then(None).otherwise(note))
        else:
            df = df.with_columns(__note=pl.lit(None, pl.String))
        phrases = [x.lower() for x in plan.resets_wear if x.strip()]
        by_phrase = (action.fill_null("").str.contains_any(phrases, ascii_case_insensitive=True)
                     if phrases else pl.lit(False))
        if "resets_wear" in S:
            rsrc = S["resets_wear"]
            r = pl.col(rsrc).cast(pl.String, strict=False).str.strip_chars().str.to_lowercase()
            flag = (pl.when(r.is_in(["true", "yes", "y", "1", "t"])).then(True)
                    .when(r.is_in(["false", "no", "n", "0", "f"])).then(False)
                    .otherwise(None))
            df = df.with_columns(__rw_flag=flag, __rw_raw=r)
            checks.append((pl.col("__rw_raw").is_not_null() & (pl.col("__rw_raw") != "")
                           & pl.col("__rw_flag").is_null(), "not_boolean", rsrc,
                           pl.concat_str([pl.lit(f"resets_wear ({rsrc}) '"), _fmt(pl.col(rsrc)),
                                          pl.lit("' is not true/false")])))
            df = df.with_columns(__resets_wear=pl.col("__rw_flag").fill_null(False) | by_phrase)
        else:
            df = df.with_columns(__resets_wear=by_phrase)

    tag("other")
    checks = _checks_that_may_fail(df, checks, groups, plan, settings)
    df = df.with_columns([flag.fill_null(False).alias(f"_f{i}")
                          for i, (flag, _, _, _) in enumerate(checks)])
    fcols = [f"_f{i}" for i in range(len(checks))]
    rule = pl.lit(None, pl.String)
    for i in reversed(range(len(checks))):
        rule = pl.when(pl.col(fcols[i])).then(pl.lit(checks[i][1])).otherwise(rule)
    # the rule (first failing check) is worked out for the failing rows only
    is_bad = (df.select(pl.any_horizontal(fcols)).to_series() if fcols
              else pl.repeat(False, df.height, dtype=pl.Boolean, eager=True))
    canon = [_C + c for c in FIELDS[kind] if _C + c in df.columns]
    if not is_bad.any():
        good = df.select(["_line"] + canon)
        bad = df.clear().with_columns(_rule=rule)
    else:
        good = df.filter(~is_bad).select(["_line"] + canon)
        bad = df.filter(is_bad).with_columns(_rule=rule)
    col = pl.lit(None, pl.String)
    msg = pl.lit(None, pl.String)
    for i in reversed(range(len(checks))):
        _, _, c, m = checks[i]
        col = pl.when(pl.col(fcols[i])).then(pl.lit(c, pl.String)).otherwise(col)
        msg = pl.when(pl.col(fcols[i])).then(m).otherwise(msg)
    bad = bad.select("_line", "_rule", col.alias("_col"), msg.alias("_msg"),
                     _raw_json(plan, fmt).alias("_raw"))
    return good, bad


def _stripped(col: pl.Series) -> pl.Series:
    """``col`` as text without surrounding blanks. Unit ids take few distinct values: when
    none of them has blanks to strip, the column is used as it is (half the cost)."""
    s = col.cast(pl.String, strict=False)
    distinct = s.unique()
    if distinct.len() * 8 < s.len() and distinct.str.strip_chars().equals(distinct):
        return s
    return s.str.strip_chars()


def _checks_that_may_fail(df: pl.DataFrame, checks: list, groups: list[str], plan: _Plan,
                          settings) -> list:
    """``checks`` without those that chunk-wide figures prove false for every row.

    Most chunks are clean, and evaluating every check row by row was most of the validation
    time. One pass of reductions (null counts, NaN present, minimum and maximum) settles
    a whole group of checks (``groups`` names the group of each check): a numeric column
    with no null and a finite range inside its bounds fails none of missing_value,
    not_numeric, not_finite or out_of_range (its value is null wherever its text is empty or
    not a number); a timestamp column that parsed everywhere fails none of the timestamp
    rules; no row is malformed. A check that is false everywhere cannot be a row's first
    failing check, so dropping it changes no result. The unit_id check and maintenance
    checks are always evaluated.
    """
    numeric = [c for c in NUMERIC if plan.kind == "telemetry" and c in groups]
    stats = [pl.col("__ts").null_count().alias("ts_nulls"),
             pl.col("_malformed").any().fill_null(False).alias("malformed")]
    for canon in numeric:
        v = pl.col(_C + canon)
        # min and max skip NaN (and are several times cheaper than nan_min / nan_max)
        stats += [v.null_count().alias(f"{canon}_nulls"),
                  v.is_nan().any().alias(f"{canon}_nan"),
                  v.min().alias(f"{canon}_min"), v.max().alias(f"{canon}_max")]
    if "p_in" in numeric and "p_in" in plan.sources:
        stats.append(pl.col("__p_in_parsed").null_count().alias("p_in_parsed_nulls"))
    st = df.select(stats).row(0, named=True)
    clean = set()
    if st["ts_nulls"] == 0:
        clean.add("ts")
    if not st["malformed"]:
        clean.add("malformed")
    bounds = _numeric_bounds(settings)
    for canon in numeric:
        lo, hi, _ = bounds[canon]
        mn, mx = st[f"{canon}_min"], st[f"{canon}_max"]
        if (st[f"{canon}_nulls"] == 0 and st.get(f"{canon}_parsed_nulls", 0) == 0
                and not st[f"{canon}_nan"] and mn is not None and mx is not None
                and math.isfinite(mn) and math.isfinite(mx) and lo <= mn and mx <= hi):
            clean.add(canon)
    return [c for c, g in zip(checks, groups) if g not in clean]


def _numeric_bounds(settings) -> dict[str, tuple[float, float, str]]:
    """(lowest, highest, unit) accepted for each numeric column (canonical units)."""
    return {
        "v_in": (-settings.v_max_v, settings.v_max_v, "V"),
        "i_in": (-settings.i_max_a, settings.i_max_a, "A"),
        "p_in": (-settings.p_max_w, settings.p_max_w, "W"),
        "n_in": (0.0, settings.n_max_rpm, "rpm"),
        "n_out": (0.0, settings.n_max_rpm, "rpm"),
        "ratio_cmd": (settings.ratio_min, settings.ratio_max, "-"),
        "t_out": (-settings.t_out_max_nm, settings.t_out_max_nm, "N*m"),
        "temp": (settings.temp_min_c, settings.temp_max_c, "degC"),
    }


def _raw_json(plan: _Plan, fmt: str) -> pl.Expr:
    if fmt == "ndjson":
        return pl.col("_json")
    cols = [pl.col(c).cast(pl.String, strict=False) for c in plan.source_columns]
    plain = pl.struct(cols).struct.json_encode()
    if fmt != "csv":
        return plain
    extra = [pl.col(f"_extra_{i + 1}") for i in range(_N_EXTRA)]
    return pl.when(pl.col("_malformed")).then(pl.struct(cols + extra).struct.json_encode()) \
        .otherwise(plain)


def _typed_columns(plan: _Plan) -> list[str]:
    """Source columns that may be parsed as numbers while reading (telemetry values with a
    '.' decimal point that no text column shares)."""
    if plan.kind != "telemetry" or plan.decimal != ".":
        return []
    S = plan.sources
    return sorted({S[c] for c in NUMERIC if c in S} - {S["unit_id"], S["ts"]})


def _recheck_as_text(chunk: pl.DataFrame, good: pl.DataFrame, bad: pl.DataFrame,
                     retext: _Retext, plan: _Plan, settings, fmt: str
                     ) -> tuple[pl.DataFrame, pl.DataFrame, int]:
    """A chunk read with typed columns: its rows that failed a check, or whose typed value
    is null (an empty field, or text the reader could not parse), are read again as text
    and validated as the text path would (quarantine keeps the raw text; an unparseable
    number is not_numeric, an empty optional one is fine). (good rows, bad rows, lines that
    turned out blank, which are not rows)."""
    suspect = chunk.filter(pl.col("_suspect"))["_line"]
    if bad.height == 0 and suspect.len() == 0:
        return good, bad, 0
    redo = pl.concat([suspect, bad["_line"]]).unique().sort()
    text = retext(redo)
    good2, bad2 = _validate(text, plan, settings, fmt)
    if suspect.len():
        good = good.filter(~pl.col("_line").is_in(redo.implode()))
    if good2.height:
        good = pl.concat([good, good2]).sort("_line")
    return good, bad2, redo.len() - text.height


class _RawRows:
    """The source rows behind the rows being deduped, to give quarantined rows their raw
    text: parts of (chunk frame, its ``_Retext`` or None for a frame that is text)."""

    def __init__(self, parts: list[tuple[pl.DataFrame, _Retext | None]]):
        self.parts = parts

    def __add__(self, other: _RawRows) -> _RawRows:
        return _RawRows(self.parts + other.parts)

    def since(self, line: int) -> _RawRows:
        """The rows from line ``line`` on. Parts left without rows are dropped: each holds
        its whole block of text, and rows are held back chunk after chunk."""
        parts = [(f.filter(pl.col("_line") >= line), r) for f, r in self.parts]
        return _RawRows([(f, r) for f, r in parts if f.height])

    def text(self, lines: pl.Series) -> pl.DataFrame:
        """The rows of these line numbers, every source column as text."""
        want = lines.implode()
        out = []
        for f, r in self.parts:
            sel = f.filter(pl.col("_line").is_in(want))
            if sel.height:
                out.append(sel if r is None else r(sel["_line"]))
        if not out:
            raise ValueError("no source rows for these lines")    # cannot happen: a bug
        return pl.concat(out)


# =========================================================================== dedupe

def _lake_matches(lake: Lake, kind: str, cand: pl.DataFrame, one_pass: bool = False
                  ) -> pl.DataFrame:
    """Rows already in the lake with the same key as ``cand``: _line, _lake_batch and the
    lake's values (``_lake_<col>``).

    Bounded: only Delta files whose min/max statistics overlap the chunk's keys are opened,
    key columns are streamed batch by batch and semi-joined with the chunk, and values are
    read only for the keys that matched. ``one_pass``: read keys and values together in
    one scan instead, cheaper when most keys match (a file that overlaps what the lake
    holds); the result is the same.
    """
    import pyarrow.dataset as pds
    key, vals = list(KEYS[kind]), list(VALUES[kind])
    empty = pl.DataFrame(schema={"_line": pl.Int64, "_lake_batch": pl.String,
                                 **{f"_lake_{v}": cand.schema[_C + v] for v in vals}})
    if cand.height == 0:
        return empty
    keys = cand.select([pl.col("_line")] + [pl.col(_C + k).alias(k) for k in key])
    tmin, tmax = keys["ts"].min(), keys["ts"].max()
    umin, umax = keys["unit_id"].min(), keys["unit_id"].max()
    prune = (f"ts >= '{_iso(tmin)}' AND ts <= '{_iso(tmax)}' AND unit_id >= {_sql_str(umin)} "
             f"AND unit_id <= {_sql_str(umax)}")
    ds = lake.latest_dataset(kind, file_pruning_predicate=prune)
    if ds is None or not ds.files:
        return empty
    units = pa.array(keys["unit_id"].unique().to_list(), pa.string())
    flt = ((pds.field("ts") >= pa.scalar(tmin, pa.timestamp("us", "UTC")))
           & (pds.field("ts") <= pa.scalar(tmax, pa.timestamp("us", "UTC")))
           & pds.field("unit_id").isin(units))
    if one_pass:
        return _lake_values(ds, keys, key, vals, flt, empty)
    hits = []
    for batch in ds.to_batches(columns=key, filter=flt, batch_size=1 << 18):
        if batch.num_rows:
            lk = pl.from_arrow(pa.Table.from_batches([batch])).cast(
                {k: keys.schema[k] for k in key}, strict=False)
            h = keys.join(lk, on=key, how="semi")
            if h.height:
                hits.append(h)
    if not hits:
        return empty
    hit = pl.concat(hits).unique("_line")
    flt2 = ((pds.field("ts") >= pa.scalar(hit["ts"].min(), pa.timestamp("us", "UTC")))
            & (pds.field("ts") <= pa.scalar(hit["ts"].max(), pa.timestamp("us", "UTC")))
            & pds.field("unit_id").isin(pa.array(hit["unit_id"].unique().to_list(),
                                                 pa.string())))
    return _lake_values(ds, hit, key, vals, flt2, empty)


def _lake_values(ds, keys: pl.DataFrame, key: list[str], vals: list[str], flt,
                 empty: pl.DataFrame) -> pl.DataFrame:
    """The lake rows (``flt``) whose key is one of ``keys`` (with their ``_line``):
    _line, _lake_batch and ``_lake_<col>`` values, batch by batch."""
    found = []
    for batch in ds.to_batches(columns=key + vals + ["batch_id"], filter=flt,
                               batch_size=1 << 18):
        if batch.num_rows:
            lk = pl.from_arrow(pa.Table.from_batches([batch])).cast(
                {k: keys.schema[k] for k in key}, strict=False)
            found.append(keys.join(lk, on=key, how="inner"))
    found = [f for f in found if f.height]
    if not found:
        return empty
    got = pl.concat(found).unique("_line", keep="first").select(
        ["_line", pl.col("batch_id").alias("_lake_batch")]
        + [pl.col(v).alias(f"_lake_{v}") for v in vals])
    return got.cast({c: t for c, t in empty.schema.items()}, strict=False)


def _iso(t: datetime) -> str:
    return t.astimezone(timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def _sql_str(v: str) -> str:
    return "'" + str(v).replace("'", "''") + "'"


def _dedupe_in_chunk(good: pl.DataFrame, plan: _Plan
                     ) -> tuple[pl.DataFrame, list[pl.DataFrame], int]:
    """Dedupe the good rows of a chunk among themselves: (the first row of every key,
    conflicting_duplicate rows without their raw text, duplicate count).

    The first row of a key wins; a later row with identical values is a duplicate, with
    other values a conflicting_duplicate. ``_dedupe_against_lake`` then does the same
    against the lake (earlier batches and earlier chunks of this batch).
    """
    kind = plan.kind
    key, vals = [_C + k for k in KEYS[kind]], [_C + v for v in VALUES[kind]]
    if good.height == 0:
        return good, [], 0
    # distinct key hashes prove distinct keys; only otherwise find the first rows exactly
    if good.select(pl.struct(key).hash().n_unique()).item() == good.height:
        return good, [], 0
    first = good.select(pl.struct(key).is_first_distinct()).to_series()
    if first.all():
        return good, [], 0
    later = good.filter(~first)
    cand = good.filter(first)
    ref = cand.select(key + [pl.col(v).alias(v + "_ref") for v in vals]
                      + [pl.col("_line").alias("_first_line")])
    later = later.join(ref, on=key, how="left")
    same = pl.all_horizontal([pl.col(v).eq_missing(pl.col(v + "_ref")) for v in vals])
    later = later.with_columns(_same=same)
    dups = int(later["_same"].sum())
    conflict = later.filter(~pl.col("_same")).select(
        "_line", pl.lit("conflicting_duplicate").alias("_rule"),
        pl.lit(None, pl.String).alias("_col"),
        pl.concat_str([pl.lit("same " + ", ".join(KEYS[kind]) + " as line "),
                       pl.col("_first_line").cast(pl.String),
                       pl.lit(" of this file, with different values")]).alias("_msg"))
    return cand, [conflict], dups


def _dedupe_against_lake(cand: pl.DataFrame, plan: _Plan, lake: Lake, one_pass: bool = False
                         ) -> tuple[pl.Series | None, list[pl.DataFrame], int]:
    """Rows of ``cand`` whose key is already in the lake: (a mask of them in ``cand``'s
    order, None when there is none; conflicting_duplicate rows without raw text (the lake
    holds other values); duplicate count (the lake holds the same values)). ``one_pass``:
    see ``_lake_matches``."""
    kind = plan.kind
    m = _lake_matches(lake, kind, cand, one_pass)
    if m.height == 0:
        return None, [], 0
    hit = cand.join(m, on="_line", how="inner")
    same_lake = pl.all_horizontal([pl.col(_C + v).eq_missing(pl.col(f"_lake_{v}"))
                                   for v in VALUES[kind]])
    hit = hit.with_columns(_same_lake=same_lake)
    dups = int(hit["_same_lake"].sum())
    conflict = hit.filter(~pl.col("_same_lake")).select(
        "_line", pl.lit("conflicting_duplicate").alias("_rule"),
        pl.lit(None, pl.String).alias("_col"),
        pl.concat_str([pl.lit("same " + ", ".join(KEYS[kind]) + " already in the lake "
                              "(batch "), pl.col("_lake_batch"),
                       pl.lit(") with different values; the lake is not overwritten")]
                      ).alias("_msg"))
    return cand["_line"].is_in(m["_line"].implode()), [conflict], dups


def _with_conflicts(bad: pl.DataFrame, conflicts: list[pl.DataFrame], plan: _Plan,
                    raw_rows: _RawRows, fmt: str) -> pl.DataFrame:
    """``bad`` plus the conflicting duplicates, with their raw text."""
    conflicts = [c for c in conflicts if c.height]
    if not conflicts:
        return bad
    conf = pl.concat(conflicts)
    raw = raw_rows.text(conf["_line"]).select("_line", _raw_json(plan, fmt).alias("_raw"))
    conf = conf.join(raw, on="_line", how="left")
    return pl.concat([bad, conf.select(bad.columns)])


def _dedupe_and_sort(good: pl.DataFrame, plan: _Plan
                     ) -> tuple[pl.DataFrame, list[pl.DataFrame], int]:
    """``_dedupe_in_chunk`` followed by ``_sorted_by_key``, cheaper when the chunk has no
    repeated key (nearly always): the rows are sorted first, and with the sort stable and
    the key in the sort, a repeated key would sit next to itself. Only a chunk with one
    takes the general path."""
    kind = plan.kind
    srt = _sorted_by_key(good, kind)
    if srt.height > 1:
        key = [pl.col(_C + k) for k in KEYS[kind]]
        repeated = pl.all_horizontal([k.eq_missing(k.shift(1)) for k in key]).any()
        if not srt.select(repeated).item():
            return srt, [], 0
    else:
        return srt, [], 0
    cand, conflicts, dups = _dedupe_in_chunk(good, plan)
    return _sorted_by_key(cand, kind), conflicts, dups


def _sorted_by_key(cand: pl.DataFrame, kind: str) -> pl.DataFrame:
    """``cand`` in the order the table stores rows (by key; see lake.sort_order). Done
    here rather than by the writer: polars' gather is about 3x cheaper than arrow's take,
    and the writer thread is the busiest."""
    keys = cand.select([pl.col(_C + k).alias(k) for k in KEYS[kind]]).to_arrow()
    order = lakemod.sort_order(keys, list(KEYS[kind]))
    return cand if order is None else cand[pl.from_arrow(order)]


def _joined_in_key_order(a: pa.Table, b: pa.Table, kind: str) -> pa.Table:
    """Two tables of rows to append, each in key order, as one table in key order (the
    writer is told not to check)."""
    joined = pa.concat_tables([a, b])
    key = list(KEYS[kind])
    order = lakemod.sort_order(joined.select(key), key)
    return joined if order is None else joined.take(order)


def _output(cand: pl.DataFrame, kind: str, batch_id: str, lake: Lake) -> pa.Table:
    """Rows to append to ``kind``, in ``cand``'s order: canonical columns, batch_id (and
    day), cast to the contract."""
    out = cand.select([pl.col(_C + c).alias(c) for c in FIELDS[kind]])
    out = out.with_columns(batch_id=pl.lit(batch_id))
    if kind == "telemetry":
        out = out.with_columns(day=pl.col("ts").dt.date())
    return lake._prepare(kind, out, in_key_order=True)     # cand is sorted (_dedupe_and_sort)


# =========================================================================== pipeline
# Two cores, three stages: one thread reads and parses the next chunks, the main thread
# validates, dedupes and sorts the current one, writer threads write earlier ones to the
# lake (deltalake and polars release the GIL). Each stage may run ahead of the next by a
# bounded number of chunks, so that a short stall in one stage does not leave a core idle,
# and memory stays bounded. Dedupe of chunk n waits for the earlier writes whose rows may
# share a key with it (their key ranges overlap, see _KeyBox), and for every write submitted
# before those, so it sees what a sequential run would see; two writes may commit in either
# order (their rows are disjoint, and the batch becomes visible only with its ledger row).

_DONE = object()

# Parsed chunks the reader may have waiting for the main thread, and data appends (running
# or queued) the main thread may have waiting for the writer. Two each: with one, every
# stall of a stage stopped the stage before it, and a core sat idle (measured: ingest used
# about 1.6 of 2 cores). Each extra chunk in flight costs about 100 MB.
_READ_AHEAD = 2
_WRITE_AHEAD = 2
_GATE_AHEAD = 2     # more appends waiting while the writers wait for the gate (see _Writer)
_WRITERS = 2


@dataclass(frozen=True)
class _KeyBox:
    """The smallest (unit_id, ts) ranges holding a set of rows: two sets whose boxes do not
    overlap share no key (maintenance keys add ``action``; the box still bounds them)."""
    umin: str
    umax: str
    tmin: datetime
    tmax: datetime

    @staticmethod
    def of(frame: pl.DataFrame) -> _KeyBox | None:
        """The box of ``frame``'s ``__unit_id`` and ``__ts`` (accepted rows: no nulls)."""
        if frame.height == 0:
            return None
        u, t = pl.col("__unit_id"), pl.col("__ts")
        return _KeyBox(*frame.select(u.min().alias("a"), u.max().alias("b"),
                                     t.min().alias("c"), t.max().alias("d")).row(0))

    def overlaps(self, other: _KeyBox) -> bool:
        return (self.umin <= other.umax and other.umin <= self.umax
                and self.tmin <= other.tmax and other.tmin <= self.tmax)

    def union(self, other: _KeyBox | None) -> _KeyBox:
        if other is None:
            return self
        return _KeyBox(min(self.umin, other.umin), max(self.umax, other.umax),
                       min(self.tmin, other.tmin), max(self.tmax, other.tmax))


class _Prefetch:
    """Runs a chunk generator in a thread, up to ``ahead`` chunks ahead. Yields (chunk,
    bytes_done).

    Exceptions raised by the generator are re-raised in the consumer at the same point of
    the sequence. ``close()`` stops the thread (it blocks until the thread is gone, so the
    source can then be closed safely).
    """

    def __init__(self, src: _Source, ahead: int = _READ_AHEAD):
        self.src = src
        self.q: queue.Queue = queue.Queue(maxsize=ahead)
        self.stop = threading.Event()
        self.permit = threading.Semaphore(ahead)
        self.thread = threading.Thread(target=self._run, name="fleetwatch-read", daemon=True)
        self.thread.start()

    def _put(self, item) -> bool:
        while not self.stop.is_set():
            try:
                self.q.put(item, timeout=0.1)
                return True
            except queue.Full:
                continue
        return False

    def _run(self):
        it = self.src.chunks()
        try:
            while True:
                # parse a chunk only while fewer than ``ahead`` parsed chunks wait for the
                # consumer: that bounds memory
                while not self.permit.acquire(timeout=0.1):
                    if self.stop.is_set():
                        return
                if self.stop.is_set():
                    return
                try:
                    chunk = next(it)
                except StopIteration:
                    break
                if not self._put((chunk, self.src.bytes_done)):
                    return
        except BaseException as exc:  # handed over to the consumer
            self._put(exc)
            return
        self._put(_DONE)

    def __iter__(self):
        while True:
            item = self.q.get()
            self.permit.release()
            if item is _DONE:
                return
            if isinstance(item, BaseException):
                raise item
            yield item

    def close(self):
        self.stop.set()
        self.thread.join()


class _Dropped(Exception):
    """An append not run because an earlier one (or the gate) failed."""


class _Writer:
    """Background threads that run lake appends (Delta commits), up to ``_WRITERS`` at once.

    ``gate`` runs once, before the first append: it begins the batch (waits for the content
    hash, checks the ledger, marks the batch pending), so the main thread goes on validating
    while the hash is worked out; no append starts before it has run. An append that
    creates its table runs alone; appends to existing tables may commit concurrently (Delta
    appends do not conflict: the later one is committed as the next version), which keeps
    both cores busy once the other stages have run out of work at the end of a file.
    Appends of accepted rows carry their key box; ``wait_for`` waits only for the appends
    whose box overlaps a given one. Once an append (or the gate) fails, the appends not yet
    started are dropped and the failure is raised in the calling thread by the next
    ``append``, ``wait_for`` or ``wait``.
    """

    def __init__(self, lake: Lake, gate: Callable[[], None] | None = None,
                 ahead: int = _WRITE_AHEAD):
        self.lake = lake
        self.gate = gate
        self.ahead = ahead
        self.failed: BaseException | None = None
        self.pool = ThreadPoolExecutor(max_workers=_WRITERS,
                                       thread_name_prefix="fleetwatch-write")
        self.pending: list[tuple[Future, _KeyBox | None]] = []
        self._alone = threading.Lock()      # held by the gate and by table-creating appends
        self._exists: set[str] = set()
        self._open = gate is None           # the gate has run

    def _run(self, name: str, data, in_key_order: bool) -> None:
        if self.failed is not None:
            raise _Dropped
        try:
            if name not in self._exists:
                with self._alone:
                    if self.failed is not None:
                        raise _Dropped
                    if self.gate is not None:
                        gate, self.gate = self.gate, None
                        gate()
                        self._open = True
                    if not self.lake.has_table(name):
                        self.lake.append(name, data, in_key_order=in_key_order)
                        self._exists.add(name)
                        return
                    self._exists.add(name)
            self.lake.append(name, data, in_key_order=in_key_order)
        except _Dropped:
            raise
        except BaseException as exc:
            self.failed = exc
            raise

    def _reap(self) -> None:
        self.pending = [(f, b) for f, b in self.pending if not f.done()]
        if self.failed is not None:
            raise self.failed

    def append(self, name: str, data, box: _KeyBox | None = None,
               in_key_order: bool = False) -> None:
        """Queue an append (``box``: key box of accepted rows; None for quarantine rows;
        ``in_key_order``: see Lake.append). Blocks while ``ahead`` appends are already
        running or queued (bounded memory)."""
        self._reap()
        # until the gate has run (the content hash takes a second or two on a large file)
        # nothing is written: let the main thread run further ahead meanwhile
        while len(self.pending) >= self.ahead + (0 if self._open else _GATE_AHEAD):
            wait_futures([f for f, _ in self.pending], return_when=FIRST_COMPLETED)
            self._reap()
        self.pending.append((self.pool.submit(self._run, name, data, in_key_order), box))

    def wait_for(self, box: _KeyBox) -> None:
        """Block until every append whose rows may share a key with ``box`` is committed
        (with the appends before it); re-raise a failure."""
        last = -1
        for i, (_, b) in enumerate(self.pending):
            if b is not None and b.overlaps(box):
                last = i
        if last >= 0:
            wait_futures([f for f, _ in self.pending[:last + 1]])
        self._reap()

    def wait(self) -> None:
        """Block until every submitted append is committed; re-raise the first failure."""
        wait_futures([f for f, _ in self.pending])
        self._reap()

    def close(self) -> None:
        """Wait for everything submitted (errors are dropped: the caller is failing)."""
        wait_futures([f for f, _ in self.pending])
        self.pending = []
        self.pool.shutdown(wait=True)


# =========================================================================== driver

def _now() -> datetime:
    return datetime.now(timezone.utc)


def _ledger_row(fr: FileReport, started: datetime) -> pl.DataFrame:
    return pl.DataFrame({
        "batch_id": [fr.batch_id], "kind": [fr.kind], "source_file": [fr.path],
        "content_sha256": [fr.content_sha256], "rows_read": [fr.rows_read],
        "accepted": [fr.accepted], "quarantined": [fr.quarantined],
        "duplicates": [fr.duplicates], "status": [fr.status], "message": [fr.message or None],
        "started_at": [started], "finished_at": [_now()],
    })


def _done_hashes(lake: Lake) -> tuple[set[tuple[str, str]], set[tuple[str, str]]]:
    """(content hash, kind) and (source file, kind) of the files ingested so far."""
    ds = lake.raw_dataset("batches")
    if ds is None:
        return set(), set()
    t = pl.from_arrow(ds.to_table(columns=["content_sha256", "kind", "status", "source_file"]))
    t = t.filter(pl.col("status") == "ok")
    return (set(zip(t["content_sha256"].to_list(), t["kind"].to_list())),
            set(zip(t["source_file"].to_list(), t["kind"].to_list())))


class _AlreadyIngested(Exception):
    """The file's content hash is in the ledger: nothing to do."""


class _Hasher:
    """SHA-256 of a file's bytes, worked out in a thread while the file's first chunks are
    parsed and validated (a separate pass before them cost about 5 % of the ingest wall
    time)."""

    def __init__(self, path: Path):
        self.path = path
        self._sha: str | None = None
        self._error: BaseException | None = None
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, args=(path,),
                                        name="fleetwatch-hash", daemon=True)
        self._thread.start()

    def _run(self, path: Path) -> None:
        try:
            self._sha = _file_sha256(path, self._stop)
        except BaseException as exc:  # handed over to result()
            self._error = exc

    def cancel(self) -> None:
        """Stop reading the file when nobody will ask for the result."""
        self._stop.set()

    def peek(self) -> str | None:
        """The hex digest if it is already known (and reading the file did not fail);
        None otherwise. Does not wait."""
        return None if self._thread.is_alive() or self._error is not None else self._sha

    def result(self) -> str:
        """The hex digest; raises what reading the file raised (OSError)."""
        self._thread.join()
        if self._error is not None:
            raise self._error
        assert self._sha is not None
        return self._sha


def _ingest_one(path: Path, kind: str, lake: Lake, settings, mapping: Mapping | None,
                done: set, progress: Progress | None,
                hasher: _Hasher | None = None,
                done_paths: set[tuple[str, str]] | None = None) -> FileReport:
    shown = str(path.resolve())
    fr = FileReport(path=shown, kind=kind)
    started = _now()
    # The batch id does not depend on the content hash, so chunks are validated while the
    # hash is worked out; nothing is written before it is known (the writer's gate, begin):
    # a file whose content is in the ledger still leaves the lake untouched.
    fr.batch_id = f"{lakemod.INGEST_BATCH_PREFIX}{started:%Y%m%dT%H%M%S}-{secrets.token_hex(6)}"
    hasher = hasher or _Hasher(path)
    src: _Source | None = None
    chunks: _Prefetch | None = None
    writer: _Writer | None = None
    begun = False

    def check_hash() -> None:
        fr.content_sha256 = hasher.result()
        if (fr.content_sha256, kind) in done:
            raise _AlreadyIngested

    def begin() -> None:
        """Runs once, in the writer thread before its first append (or at the end when
        nothing was appended)."""
        nonlocal begun
        check_hash()
        lake.begin_batch(fr.batch_id)
        begun = True

    try:
        # A file of a path ingested before is most likely the same content again (a folder
        # ingested day after day): its hash is awaited first, and an unchanged file costs
        # one read instead of a validation and a lake lookup of every row. Other files are
        # validated while their hash is worked out.
        if done_paths and (shown, kind) in done_paths:
            check_hash()
        src = _open_source(path, mapping, int(settings.ingest_chunk_rows))
        plan = _make_plan(kind, src, mapping, settings, path)
        src.use_typed(_typed_columns(plan))
        ingested_at = started
        if progress:
            progress(shown, 0, src.bytes_total)
        writer = _Writer(lake, gate=begin)
        chunks = _Prefetch(src)
        held: tuple[pl.DataFrame, _RawRows] | None = None      # (good rows, their source)
        no_bad: pl.DataFrame | None = None
        deferred: pa.Table | None = None          # accepted rows not yet handed to the writer
        deferred_box: _KeyBox | None = None
        one_pass = False                          # see _lake_matches
        for item, bytes_done in _with_end(chunks):
            chunk = None if item is None else item[0]
            if chunk is None:           # the end: rows held back from the last chunk
                if held is None:
                    break
                (good, raw), held = held, None
                bad = no_bad
            else:
                if not begun and hasher.peek() is not None:
                    check_hash()            # content ingested before: stop here (skipped)
                if chunk.height == 0:
                    continue
                if deferred is not None:    # more rows follow: the last chunk's rows can go
                    writer.append(kind, deferred, deferred_box, in_key_order=True)
                    deferred = deferred_box = None
                retext = item[1]
                fr.rows_read += chunk.height
                good, bad = _validate(chunk, plan, settings, src.fmt)
                if retext is not None:
                    good, bad, blank = _recheck_as_text(chunk, good, bad, retext, plan,
                                                        settings, src.fmt)
                    fr.rows_read -= blank
                no_bad = bad.clear()
                raw = _RawRows([(chunk, retext)])
                if held is not None:
                    good = pl.concat([held[0], good])
                    raw = held[1] + raw
                    held = None
                if kind == "telemetry":
                    good, tail = _hold_tail(good)
                    if tail is not None:
                        held = (tail, raw.since(tail["_line"].min()))
            # the rows to append are deduped, sorted and converted while earlier chunks are
            # still being written (the writer thread is the busiest); only the lake lookup
            # needs the earlier writes, and it rarely finds anything to take out again
            cand, conflicts, dups = _dedupe_and_sort(good, plan)
            out = box = None
            if cand.height:
                out = _output(cand, kind, fr.batch_id, lake)
                box = _KeyBox.of(cand)
                if deferred_box is not None and deferred_box.overlaps(box):
                    # rows not yet handed over may share a key with these (input in no
                    # usable order): commit them first
                    writer.append(kind, deferred, deferred_box, in_key_order=True)
                    deferred = deferred_box = None
            # earlier writes that may hold these keys are in the lake before dedupe looks
            # there; for rows in time order (or unit order) the held-back tail makes the
            # boxes of consecutive chunks disjoint, and nothing is waited for
            if box is not None:
                writer.wait_for(box)
            in_lake, more, more_dups = _dedupe_against_lake(cand, plan, lake, one_pass)
            # most keys of this chunk already in the lake: the next chunk (likely the same)
            # reads keys and values in one scan
            one_pass = in_lake is not None and int(in_lake.sum()) * 2 >= cand.height
            if in_lake is not None:
                keep = ~in_lake
                cand = cand.filter(keep)
                out = out.filter(keep.to_arrow())
                box = _KeyBox.of(cand)
            bad = _with_conflicts(bad, conflicts + more, plan, raw, src.fmt)
            fr.duplicates += dups + more_dups
            if cand.height:
                # written once the next chunk arrives, or at the end together with the rows
                # held back (one commit for a file of one chunk)
                deferred = out if deferred is None else _joined_in_key_order(deferred, out, kind)
                deferred_box = box.union(deferred_box)
                fr.accepted += cand.height
            if bad.height:
                q = bad.select(
                    pl.lit(fr.batch_id).alias("batch_id"), pl.lit(shown).alias("source_file"),
                    pl.col("_line").alias("line"), pl.col("_col").alias("column"),
                    pl.col("_rule").alias("rule"), pl.col("_msg").alias("message"),
                    pl.col("_raw").alias("raw"), pl.lit(kind).alias("kind"),
                    pl.lit(ingested_at).cast(pl.Datetime("us", "UTC")).alias("ingested_at"))
                writer.append("quarantine", q)
                fr.quarantined += bad.height
                for r, n in bad.group_by("_rule").len().iter_rows():
                    fr.rules[r] = fr.rules.get(r, 0) + n
            if progress and chunk is not None:
                progress(shown, bytes_done, src.bytes_total)
            # drop this chunk's frames now: the next chunk is parsed while they would still
            # be referenced, and memory is bounded by the chunks alive at once
            chunk = item = retext = raw = good = bad = cand = out = q = keep = None
        if deferred is not None:
            writer.append(kind, deferred, deferred_box, in_key_order=True)
            deferred = None
        writer.wait()
        if not begun:
            begin()
        assert fr.rows_read == fr.accepted + fr.quarantined + fr.duplicates
        notes = list(src.notes)
        if fr.quarantined:
            notes.append("quarantined: " + ", ".join(f"{n} {r}" for r, n in
                                                    sorted(fr.rules.items())))
        fr.message = "; ".join(notes)
        lake.append("batches", _ledger_row(fr, started))
        lake.end_batch(fr.batch_id)
        done.add((fr.content_sha256, kind))
        if progress:
            progress(shown, src.bytes_total, src.bytes_total)
        return fr
    except _Refuse as exc:
        _stop(chunks, writer)       # no write may still be running: begun is final now
        chunks = writer = None
        if begun:
            lake.rollback_batch(fr.batch_id)
        else:
            try:
                check_hash()
            except _AlreadyIngested:
                return _skipped(fr)
            except OSError as exc2:
                return _unreadable(fr, exc2)
        fr.status = "refused"
        fr.rows_read = fr.accepted = fr.quarantined = fr.duplicates = 0
        fr.rules = {}
        fr.message = exc.message + (f" -- {exc.hint}" if exc.hint else "")
        lake.append("batches", _ledger_row(fr, started))   # the refusal is on record
        if begun:
            lake.end_batch(fr.batch_id)
        return fr
    except _AlreadyIngested:
        return _skipped(fr)
    except OSError:
        _stop(chunks, writer)
        chunks = writer = None
        if begun:
            raise
        try:
            hasher.result()
        except OSError as exc2:
            return _unreadable(fr, exc2)
        raise
    finally:
        # no write may still be running once we return (or roll back): stop both threads
        _stop(chunks, writer)
        if src is not None:
            src.close()


def _skipped(fr: FileReport) -> FileReport:
    fr.status, fr.batch_id = "skipped", None
    fr.rows_read = fr.accepted = fr.quarantined = fr.duplicates = 0
    fr.rules = {}
    fr.message = "already ingested (same content hash); nothing to do"
    return fr


def _unreadable(fr: FileReport, exc: OSError) -> FileReport:
    fr.status, fr.message = "refused", f"{fr.path}: cannot read ({exc.strerror or exc})"
    fr.batch_id = None
    fr.rows_read = fr.accepted = fr.quarantined = fr.duplicates = 0
    fr.rules = {}
    return fr


def _with_end(chunks: Iterator) -> Iterator:
    """The items of ``chunks``, then one (None, None) to mark the end."""
    yield from chunks
    yield None, None


def _hold_tail(good: pl.DataFrame) -> tuple[pl.DataFrame, pl.DataFrame | None]:
    """Split off the rows that the next chunk may continue: (rows to process now, tail).

    The lake lookup in ``_split`` opens every Delta file whose key range overlaps the chunk.
    A chunk cut in the middle of a run of equal timestamps (a fleet logger: time order,
    units interleaved) or of one unit's rows (an export sorted by unit, then time) shares
    that key with the next chunk, so the next chunk would read this chunk's whole file back.
    Holding the last run back to the next chunk makes consecutive chunks' key ranges
    disjoint, and the lookup skips the earlier files by their statistics. Rows in any other
    order are not held (the lookup still finds everything, it is only slower).
    """
    n = good.height
    if n < 2:
        return good, None
    ts, uid = good["__ts"], good["__unit_id"]
    if ts.null_count() or uid.null_count():
        return good, None
    if ts.is_sorted():
        start = int(ts.search_sorted(ts[-1], side="left"))
    else:
        u, t = pl.col("__unit_id"), pl.col("__ts")
        in_order = good.select(((u > u.shift(1)) | ((u == u.shift(1)) & (t >= t.shift(1))))
                               .slice(1).all()).item()
        if not in_order:
            return good, None
        start = int(uid.search_sorted(uid[-1], side="left"))
    if start == 0 or (n - start) * 2 > n:
        return good, None
    return good.slice(0, start), good.slice(start)


def _stop(chunks: _Prefetch | None, writer: _Writer | None) -> None:
    if chunks is not None:
        chunks.close()
    if writer is not None:
        writer.close()


def _warm_up() -> None:
    """Import pyarrow.dataset (the lake lookups need it; it loads pandas: about half a
    second) in a thread, while the first chunk is read and parsed, instead of in the
    middle of the pipeline."""
    if "pyarrow.dataset" not in sys.modules:
        threading.Thread(target=importlib.import_module, args=("pyarrow.dataset",),
                         name="fleetwatch-import", daemon=True).start()


def ingest_files(paths, settings, mapping: str | os.PathLike | Mapping | None = None,
                 kind: str = "telemetry", progress: Progress | None = None,
                 strict: bool = False) -> IngestReport:
    """Ingest files, folders (recursive) or globs into the lake of ``settings``.

    Each file is one batch: accepted rows to ``kind`` (telemetry or maintenance), rejected
    rows to ``quarantine``, one ``batches`` row. A file already ingested (same content hash
    and kind) is skipped. A file that cannot be used is refused (status refused, message
    says why and what to do) and the others still go in. ``progress(path, bytes_done,
    bytes_total)`` is called per chunk. Holds the lake's writer lock for the whole call.

    Raises UsageError (bad kind, no paths), InputError (bad mapping file), LockHeldError.
    """
    if kind not in KINDS:
        raise UsageError(f"unknown kind '{kind}'", hint="Use --kind telemetry or maintenance.")
    if not paths:
        raise UsageError("no input files given", hint="fleetwatch ingest PATH...")
    mp = mapping if isinstance(mapping, Mapping) or mapping is None else load_mapping(mapping)
    files, missing = discover_files(paths)
    report = IngestReport(strict=strict)
    for m in missing:
        report.files.append(FileReport(path=m, kind=kind, status="refused",
                                       message=f"{m}: no such file, folder or matching glob"))
    # the first file's hash starts before polars, pyarrow and the lake are imported (they
    # take most of a second on one core): it runs on the other core meanwhile
    early = _Hasher(files[0]) if files else None
    try:
        lake = lakemod.Lake.from_settings(settings)
        if files:
            _warm_up()
            with lake.writer("ingest"):
                undone = lake.recover()
                if undone:
                    report.notes.append("removed the rows of batches interrupted earlier "
                                        "(they had no ledger row): " + ", ".join(undone))
                done, done_paths = _done_hashes(lake)
                for i, p in enumerate(files):
                    report.files.append(_ingest_one(p, kind, lake, settings, mp, done,
                                                    progress, early if i == 0 else None,
                                                    done_paths))
    finally:
        if early is not None:
            early.cancel()      # e.g. the lake is locked: stop reading the file
    for f in report.files:
        if f.status == "refused":
            report.errors.append(f.message)
    return report
