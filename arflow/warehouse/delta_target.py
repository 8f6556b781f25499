"""Lakehouse output as Delta Lake tables, written by the ``deltalake`` package (no JVM).

Layout under ``[publish] lakehouse`` (a folder or an object-store URI), one
folder per ``[publish] schema``::

    <lakehouse>/<schema>/<table>/_delta_log/...     one Delta table per result table
    <lakehouse>/<schema>/_arflow/journal.json       the publication in progress (absent when none)

Tables: ``runs``, ``vintages``, ``series_status``, ``models``, ``gates``,
``residual_acf``, ``forecasts``, ``backtests``, ``accuracy``, ``job_policy``
(the columns of the DuckDB tables of those names), ``published_forecasts``
(the rows of the DuckDB view of that name, materialised), ``vintage_removals``
and ``commits`` (one row per publication: the gate, see below). The run tables
are partitioned by ``run_id`` (``accuracy`` by ``recorded_by``, the run that
scored), so a re-run of a vintage replaces exactly its partition in one
commit per table and earlier vintages stay.

Publishing one run (:meth:`DeltaTarget.prepare`, then
:meth:`PendingDelta.commit`):

1. *prepare*: every new data file is written into its table's folder, but no
   table's log names it yet, so no Delta reader sees it. The journal records the
   files (state ``prepared``).
2. *commit*: the journal records each table's current version and the plan
   (state ``committing``); then one Delta commit per table in a fixed order:
   the run tables, ``runs``, ``vintages``, ``job_policy``, ``published_forecasts``,
   and last the run's row in ``commits`` (the gate), which lists the version
   of every table after this run. The journal is then removed.

Guarantees. Each table shows all or none of a run attempt's rows (one commit
per table). ``published_forecasts``, the one table dashboards read, changes in
one commit after every other table holds the run. The detail tables commit one
after another (only small log writes: the data files were written in step 1),
so a reader of two detail tables at the same moment can see one of them a run
ahead; readers that need a consistent view of several tables read each at the
versions recorded in the latest ``commits`` row (arflow's own readers here do).
A run that died part-way is settled by the next publication (or
:func:`recover`): if all its commits landed, its gate row is written (roll
forward); otherwise every table it changed is restored to its version before
the run (roll back) and its files are deleted. One writer per schema at a time:
the journal doubles as the lock.
"""

from __future__ import annotations

import datetime as dt
import json
import os
import re
import socket
import time
import uuid
from collections.abc import Iterator
from dataclasses import dataclass, field
from hashlib import sha1
from pathlib import Path
from typing import Any

import duckdb
import polars as pl
import pyarrow as pa
import pyarrow.parquet as pq

from ..errors import PublishError, SettingsError, SourceError
from ..runtime import fault_point
from ..settings import coverage_label
from ..results import RUN_TABLES as RESULTS_RUN_TABLES
from ..results import VIEW_TABLES
from .contract import LAKEHOUSE_ORDER, RunRecord, TableLayout, check_jump, check_layout_match, runs_row
from .stage import process_start_time
from .duckdb_target import COVERAGE_COLUMNS, DDL_FILES, VIEW_FILE, render_sql
from .identifiers import check_identifier, quote

EXTRA = "lakehouse"
INSTALL_HINT = "pip install 'arflow-gated[lakehouse]'"
#: run tables (partition column), in commit order: accuracy rows belong to the run that scored them
RUN_TABLES: tuple[tuple[str, str], ...] = tuple((t, "recorded_by" if t == "accuracy" else "run_id") for t in RESULTS_RUN_TABLES)
#: small tables, rewritten whole in one commit
WHOLE_TABLES = ("runs", "vintages", "job_policy", "published_forecasts", "vintage_removals")
GATE = "commits"
COMMIT_ORDER = (*(t for t, _ in RUN_TABLES), *WHOLE_TABLES, GATE)
PARTITION = dict(RUN_TABLES)
JOURNAL = "_arflow/journal.json"
#: a journal whose writer is on another host is taken over after this long (its writer is presumed dead)
JOURNAL_TAKEOVER_HOURS = 24.0
FILE_ROWS = 2_000_000
_TXN_KEY = "arflow.txn"
#: key types DuckDB has and Delta Lake does not, with the cast to suggest
_NO_DELTA_TYPE = {"UTINYINT": "SMALLINT", "USMALLINT": "INTEGER", "UINTEGER": "BIGINT", "UBIGINT": "VARCHAR",
                  "UUID": "VARCHAR"}
_STATUS_FIXED = ("run_id", "job", "as_of", "decision", "on_failure", "reasons", "failed_gates", "warnings")


def require_extra() -> None:
    """Raise a one-line :class:`SettingsError` when the lakehouse extra (deltalake) is not installed."""
    _deltalake()


def _deltalake() -> Any:
    try:
        import deltalake
    except ImportError:
        raise SettingsError(
            f"[publish] lakehouse needs the {EXTRA} extra (the deltalake package), which is not installed; "
            f"install it with: {INSTALL_HINT}"
        ) from None
    return deltalake


def is_uri(location: str | Path) -> bool:
    """True for an object-store URI (``s3://``, ``az://``, ``gs://``, ``file://`` ...)."""
    return "://" in str(location)


def schema_uri(lakehouse: str | Path, schema: str) -> str:
    """The location of one schema's tables (a folder path or a URI)."""
    check_identifier(schema, "publish.schema")
    if is_uri(lakehouse):
        return str(lakehouse).rstrip("/") + "/" + schema
    return str(Path(lakehouse).expanduser() / schema)


def _safe_dir(value: str) -> str:
    """A partition value as one safe folder name (readable; a hash suffix when characters were replaced)."""
    clean = re.sub(r"[^A-Za-z0-9@._-]", "_", value)
    return clean if clean == value else f"{clean}-{sha1(value.encode()).hexdigest()[:8]}"


def _utcnow() -> dt.datetime:
    return dt.datetime.now(dt.timezone.utc).replace(tzinfo=None)


# ------------------------------------------------------------------------------------ storage


class _Lake:
    """One schema of a lakehouse: table locations, files and the journal, local or on an object store."""

    def __init__(self, lakehouse: str | Path, schema: str, options: dict[str, str] | None = None) -> None:
        self.lakehouse = lakehouse
        self.schema = schema
        self.root = schema_uri(lakehouse, schema)
        self.options = dict(options or {})
        self.local = not is_uri(lakehouse)
        self._fs: Any = None

    def uri(self, table: str) -> str:
        return f"{self.root}/{table}"

    @property
    def store(self) -> Any:
        """deltalake's object store rooted at the schema (same storage options as the tables)."""
        if self._fs is None:
            from deltalake.fs import DeltaStorageHandler

            self._fs = DeltaStorageHandler(self.root, self.options or None)
        return self._fs

    def write_parquet(self, rel: str, table: pa.Table) -> int:
        """Write one Parquet file at ``rel`` (under the schema); returns its size in bytes."""
        if self.local:
            path = Path(self.root) / rel
            path.parent.mkdir(parents=True, exist_ok=True)
            pq.write_table(table, path, compression="zstd")
            return path.stat().st_size
        sink = pa.BufferOutputStream()
        pq.write_table(table, sink, compression="zstd")
        data = sink.getvalue().to_pybytes()
        self._put(rel, data)
        return len(data)

    def _put(self, rel: str, data: bytes) -> None:
        out = self.store._handler.open_output_stream(rel, None)  # the raw stream takes bytes (pyarrow's wrapper does not)
        try:
            out.write(data)
        finally:
            out.close()

    def table(self, name: str, version: int | None = None) -> Any | None:
        dl = _deltalake()
        uri = self.uri(name)
        try:
            if not dl.DeltaTable.is_deltatable(uri, storage_options=self.options or None):
                return None
            return dl.DeltaTable(uri, version=version, storage_options=self.options or None)
        except OSError as exc:
            raise PublishError(f"cannot read lakehouse table {uri} ({_first(exc)}); check publish.lakehouse") from None

    def read_json(self, path: str) -> dict[str, Any] | None:
        if self.local:
            try:
                return json.loads((Path(self.root) / path).read_text(encoding="utf-8"))
            except FileNotFoundError:
                return None
        import pyarrow.fs as pafs

        (info,) = self.store.get_file_info([path])
        if info.type == pafs.FileType.NotFound:
            return None
        handle = self.store.open_input_file(path)
        try:
            data = handle.read(handle.size())
        finally:
            handle.close()
        return json.loads(bytes(data).decode("utf-8")) if data else None

    def write_json(self, path: str, payload: dict[str, Any], exclusive: bool = False) -> None:
        """Write a small JSON file atomically (``exclusive``: fail with FileExistsError when it exists; local only)."""
        data = json.dumps(payload, indent=1, sort_keys=True, default=str).encode("utf-8")
        if self.local:
            target = Path(self.root) / path
            target.parent.mkdir(parents=True, exist_ok=True)
            tmp = target.with_name(f".{target.name}.{uuid.uuid4().hex}.tmp")
            try:
                with open(tmp, "wb") as fh:
                    fh.write(data)
                    fh.flush()
                    os.fsync(fh.fileno())
                if exclusive:
                    os.link(tmp, target)  # fails if another writer created it first
                else:
                    os.replace(tmp, target)
            finally:
                tmp.unlink(missing_ok=True)
            return
        self._put(path, data)  # one PUT: atomic on object stores

    def delete(self, path: str) -> None:
        try:
            if self.local:
                (Path(self.root) / path).unlink(missing_ok=True)
            else:
                self.store.delete_file(path)
        except (FileNotFoundError, OSError):
            pass


def _first(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0][:300] if text else type(exc).__name__


# ------------------------------------------------------------------------------------ schemas


_SCHEMAS: dict[tuple, dict[str, pa.Schema]] = {}


def table_schemas(layout: TableLayout, labels: tuple[str, ...]) -> dict[str, pa.Schema]:
    """table -> Arrow schema, read off the DuckDB DDL (so both targets share one column list)."""
    key = (layout.keys, layout.key_types, layout.period_type, labels)
    if key not in _SCHEMAS:
        con = _memory(layout, labels)
        try:
            out = {}
            for name in (*DDL_FILES, VIEW_FILE):
                if name == "vintage_removals" or name in PARTITION or name in WHOLE_TABLES:
                    out[name] = _relation_schema(con, f"{quote(layout.schema)}.{quote(name)}")
            out[GATE] = _gate_schema()
            _SCHEMAS[key] = out
        finally:
            con.close()
    return _SCHEMAS[key]


def _memory(layout: TableLayout, labels: tuple[str, ...]) -> duckdb.DuckDBPyConnection:
    """An in-memory DuckDB with arflow's DDL tables (and this run's coverage columns) under the job's schema."""
    from .duckdb_source import engine_config, open_duckdb

    con = open_duckdb(":memory:", config=engine_config())
    con.execute(f"CREATE SCHEMA {quote(layout.schema)}")
    for name in DDL_FILES:
        con.execute(render_sql(name, layout))
    for table, prefixes in COVERAGE_COLUMNS.items():
        kind = "BOOLEAN" if table == "accuracy" else "DOUBLE"
        for label in labels:
            for prefix in prefixes:
                con.execute(f"ALTER TABLE {quote(layout.schema)}.{quote(table)} ADD COLUMN {quote(f'{prefix}_{label}')} {kind}")
    con.execute(render_sql(VIEW_FILE, layout))
    return con


def _normal_type(t: pa.DataType) -> pa.DataType:
    if pa.types.is_list(t) or pa.types.is_large_list(t):
        return pa.list_(pa.field("element", _normal_type(t.value_type)))
    if pa.types.is_large_string(t) or t == pa.string_view():
        return pa.string()
    return t


def _relation_schema(con: duckdb.DuckDBPyConnection, relation: str) -> pa.Schema:
    """Arrow schema of a DuckDB relation, lists named the Delta way (``element``)."""
    schema = con.sql(f"SELECT * FROM {relation} LIMIT 0").to_arrow_table().schema
    return pa.schema([pa.field(f.name, _normal_type(f.type)) for f in schema])


def _layout_of(schema: pa.Schema) -> tuple[list[str], str]:
    """(key columns, period type) of a ``series_status`` table's schema."""
    keys = [f.name for f in schema if f.name not in _STATUS_FIXED]
    t = schema.field("as_of").type
    period_type = "DATE" if pa.types.is_date(t) else "TIMESTAMP" if pa.types.is_timestamp(t) else "BIGINT"
    return keys, period_type


# ------------------------------------------------------------------------------------ files


@dataclass
class _TableWrite:
    """What one table's commit does: files to add and, for run tables, the partition they replace."""

    table: str
    mode: str  # "replace-partition" | "replace-all" | "append"
    schema: pa.Schema
    partition: tuple[str, str] | None = None  # (column, value)
    actions: list[Any] = field(default_factory=list)
    files: list[str] = field(default_factory=list)
    rows: int = 0


def _stats(batches: list[pa.RecordBatch], schema: pa.Schema) -> str:
    """Delta file statistics: row count, null counts and min/max of integer, date and short text columns."""
    import pyarrow.compute as pc

    n = sum(b.num_rows for b in batches)
    out: dict[str, Any] = {"numRecords": n, "minValues": {}, "maxValues": {}, "nullCount": {}}
    if not n:
        return json.dumps(out)
    for i, f in enumerate(schema):
        t = f.type
        if pa.types.is_nested(t):
            continue
        col = pa.chunked_array([b.column(i) for b in batches], type=t)
        out["nullCount"][f.name] = col.null_count
        if col.null_count == n:
            continue
        if pa.types.is_integer(t) or pa.types.is_date(t) or pa.types.is_string(t):
            mm = pc.min_max(col)
            lo, hi = mm["min"].as_py(), mm["max"].as_py()
            if isinstance(lo, str) and (len(lo) > 32 or len(hi) > 32):
                continue
            out["minValues"][f.name] = lo.isoformat() if isinstance(lo, dt.date) else lo
            out["maxValues"][f.name] = hi.isoformat() if isinstance(hi, dt.date) else hi
    return json.dumps(out)


def _write_files(lake: _Lake, write: _TableWrite, reader: pa.RecordBatchReader, txn: str) -> None:
    """Stream ``reader`` into Parquet files in the table's folder (not committed: no Delta reader sees them)."""
    from deltalake.transaction import AddAction

    part_col = write.partition[0] if write.partition else None
    folder = f"{write.table}/{part_col}={_safe_dir(write.partition[1])}" if write.partition else write.table
    file_schema = pa.schema([f for f in write.schema if f.name != part_col])
    pending: list[pa.RecordBatch] = []
    pending_rows = 0

    def flush() -> None:
        nonlocal pending, pending_rows
        if not pending_rows:
            pending, pending_rows = [], 0
            return
        rel = f"{folder}/part-{len(write.files):05d}-{txn}.parquet"
        table = pa.Table.from_batches(pending, schema=file_schema)
        write.files.append(rel)  # recorded before writing: a partial file is cleaned up with the rest
        size = lake.write_parquet(rel, table)
        values = {part_col: write.partition[1]} if part_col else {}
        write.actions.append(AddAction(rel.split("/", 1)[1], size, values, int(time.time() * 1000), True,
                                       _stats(pending, file_schema)))
        write.rows += pending_rows
        pending, pending_rows = [], 0

    for batch in reader:
        batch = _conform(batch, write.schema, part_col)
        if batch.num_rows == 0:
            continue
        pending.append(batch)
        pending_rows += batch.num_rows
        if pending_rows >= FILE_ROWS:
            flush()
    flush()


def _conform(batch: pa.RecordBatch, schema: pa.Schema, drop: str | None) -> pa.RecordBatch:
    """The batch with the table's columns in order (missing ones null), the partition column left out."""
    names = batch.schema.names
    arrays, fields = [], []
    for f in schema:
        if f.name == drop:
            continue
        col = batch.column(names.index(f.name)) if f.name in names else pa.nulls(batch.num_rows, f.type)
        arrays.append(col if col.type == f.type else col.cast(f.type))
        fields.append(f)
    return pa.RecordBatch.from_arrays(arrays, schema=pa.schema(fields))


# ------------------------------------------------------------------------------------ journal / lock


def _owner() -> dict[str, Any]:
    pid = os.getpid()
    return {"host": socket.gethostname(), "pid": pid, "pid_started": process_start_time(pid)}


def _owner_alive(journal: dict[str, Any]) -> bool:
    """True unless the journal's writer is certainly gone (same host, process ended) or the journal is stale."""
    owner = journal.get("owner", {})
    if owner.get("host") != socket.gethostname():
        try:
            started = dt.datetime.fromisoformat(journal["started_at"])
        except (KeyError, ValueError):
            return False
        return (_utcnow() - started).total_seconds() < JOURNAL_TAKEOVER_HOURS * 3600
    pid = int(owner.get("pid", -1))
    if pid == os.getpid():
        return False
    if pid <= 0 or process_start_time(pid) is None:
        return False
    return owner.get("pid_started") in (None, process_start_time(pid))


def _history_txns(table: Any, since: int) -> list[str | None]:
    """The arflow transaction id of every commit of ``table`` after version ``since``."""
    out = []
    for h in table.history():
        if int(h["version"]) > since:
            out.append(h.get(_TXN_KEY))
    return out


def recover(lakehouse: str | Path, schema: str = "arflow", options: dict[str, str] | None = None) -> str | None:
    """Settle a publication that died part-way (roll forward or back); returns what was done, or None."""
    return _recover(_Lake(lakehouse, schema, options))


def _recover(lake: _Lake) -> str | None:
    journal = lake.read_json(JOURNAL)
    if journal is None:
        return None
    if _owner_alive(journal):
        owner = journal.get("owner", {})
        raise PublishError(
            f"another arflow run (host {owner.get('host')}, pid {owner.get('pid')}, started {journal.get('started_at')}) "
            f"is publishing to lakehouse {lake.root}; retry when it finishes"
        )
    txn = journal["txn"]
    done = None
    if journal.get("state") == "committing":
        before: dict[str, int] = {t: int(v) for t, v in journal["versions_before"].items()}
        landed = {}
        for t, v in before.items():
            table = lake.table(t)
            landed[t] = table is not None and txn in _history_txns(table, v)
        gate = lake.table(GATE)
        gate_landed = gate is not None and txn in _history_txns(gate, before.get(GATE, -1))
        plan = journal["plan"]
        if gate_landed:
            done = f"completed run {journal.get('run_id')} (its last commit had landed)"
        elif all(landed.get(t, False) for t in plan if t != GATE):
            _commit_gate(lake, journal["run_id"], journal.get("job"), journal.get("kind", "publish"), txn, plan,
                         journal.get("arflow_version", ""))
            done = f"completed run {journal.get('run_id')} (rolled forward: every table had its commit)"
        else:
            dl = _deltalake()
            for t, v in before.items():
                table = lake.table(t)
                if table is None or table.version() <= v:
                    continue
                foreign = [x for x in _history_txns(table, v) if x != txn]
                if foreign:
                    raise PublishError(
                        f"lakehouse table {lake.uri(t)} changed after arflow's unfinished publication {txn} by another "
                        "writer; restore it by hand (DeltaTable.restore) and delete " + f"{lake.root}/{JOURNAL}"
                    )
                table.restore(v, commit_properties=dl.CommitProperties(custom_metadata={_TXN_KEY: f"{txn}-rollback"}))
            done = f"rolled back run {journal.get('run_id')} (it died before all its commits)"
    for rel in journal.get("files", []):
        if done is None or done.startswith("rolled back"):
            lake.delete(rel)
    lake.delete(JOURNAL)
    return done or f"removed the uncommitted files of run {journal.get('run_id')}"


def _commit_gate(lake: _Lake, run_id: str, job: str | None, kind: str, txn: str, plan: list[str], version: str) -> int:
    dl = _deltalake()
    versions = {}
    for t in COMMIT_ORDER:
        if t == GATE:
            continue
        table = lake.table(t)
        if table is not None:
            versions[t] = table.version()
    row = pa.table({
        "commit_id": [txn], "kind": [kind], "job": [job], "run_id": [run_id], "committed_at": [_utcnow()],
        "table_versions": [json.dumps(versions, sort_keys=True)], "arflow_version": [version],
    }, schema=_gate_schema())
    dl.write_deltalake(lake.uri(GATE), row, mode="append", storage_options=lake.options or None,
                       commit_properties=dl.CommitProperties(custom_metadata={_TXN_KEY: txn}))
    return versions.get("runs", -1)


def _gate_schema() -> pa.Schema:
    return pa.schema([("commit_id", pa.string()), ("kind", pa.string()), ("job", pa.string()),
                      ("run_id", pa.string()), ("committed_at", pa.timestamp("us")),
                      ("table_versions", pa.string()), ("arflow_version", pa.string())])


# ------------------------------------------------------------------------------------ target


def _staged_files(staged: Any, table: str) -> list[str]:
    return list(staged.files(table)) if hasattr(staged, "files") else []


def _parquet(files: list[str]) -> str | None:
    if not files:
        return None
    return "read_parquet([" + ", ".join("'" + f.replace("'", "''") + "'" for f in files) + "], union_by_name = true)"


class DeltaTarget:
    """Publishes runs to Delta tables under ``<lakehouse>/<schema>`` (see the module text)."""

    commit_order = LAKEHOUSE_ORDER

    def __init__(self, lakehouse: str | Path, layout: TableLayout, options: dict[str, str] | None = None) -> None:
        _deltalake()
        self.layout = layout
        self.lake = _Lake(lakehouse, layout.schema, options)

    @classmethod
    def from_spec(cls, publish: Any, layout: TableLayout) -> "DeltaTarget":
        return cls(publish.lakehouse, layout, getattr(publish, "lakehouse_options", None))

    def describe(self) -> str:
        return f"lakehouse {self.lake.root} (Delta tables)"

    def preflight(self) -> None:
        """The location can be written (a local folder's parent must exist)."""
        if self.lake.local:
            parent = Path(self.lake.lakehouse).expanduser().parent
            if not parent.is_dir():
                raise PublishError(f"folder {parent} of publish.lakehouse does not exist; create it or fix the path")
            if Path(self.lake.lakehouse).exists() and not os.access(Path(self.lake.lakehouse), os.W_OK):
                raise PublishError(f"lakehouse folder {self.lake.lakehouse} is read-only; make it writable or publish elsewhere")

    def check_layout(self) -> str:
        """Refuse a schema holding another job's key columns or period type; a status line otherwise."""
        self.preflight()
        if self.lake.local:
            root = Path(self.lake.root)  # the old layout (arflow.warehouse.parquet_legacy): markers, no Delta tables
            if (root / "_commits").is_dir() and not (root / GATE / "_delta_log").is_dir():
                raise PublishError(
                    f"lakehouse {self.lake.root} holds the old Parquet-marker layout of arflow 0.1; convert it once "
                    "with: arflow lakehouse-convert JOB.toml"
                )
        for key, kind in zip(self.layout.keys, self.layout.key_types):
            if kind in _NO_DELTA_TYPE:
                raise SettingsError(
                    f"source.keys: column {key} is {kind}, which Delta tables cannot hold; cast it in a [source] query "
                    f"(e.g. SELECT CAST({key} AS {_NO_DELTA_TYPE[kind]}) AS {key} ...) to publish to a lakehouse"
                )
        status = self.lake.table("series_status")
        if status is None:
            return "tables will be created"
        keys, period_type = _layout_of(_table_arrow_schema(status))
        check_layout_match(f"lakehouse {self.lake.root}", keys, period_type, self.layout)
        return "tables exist"

    def latest_vintage(self, job: str) -> Any | None:
        table = _snapshot(self.lake, "vintages")
        if table is None:
            return None
        frame = table.filter(pl.col("job") == job)
        return frame["as_of"].max() if frame.height else None

    def prepare(self, record: RunRecord, staged: Any) -> "PendingDelta":
        """Write every data file of the run (invisible to readers) and plan the commits."""
        try:
            note = _recover(self.lake)
            self.check_layout()
        except OSError as exc:
            raise PublishError(f"cannot write to lakehouse {self.lake.root} ({_first(exc)}); check publish.lakehouse") from None
        pending = PendingDelta(self.lake, self.layout, record, uuid.uuid4().hex[:16], note)
        try:
            pending._prepare(staged)
        except BaseException as exc:
            pending.abort()
            if isinstance(exc, OSError):
                raise PublishError(
                    f"writing to lakehouse {self.lake.root} failed ({_first(exc)}); nothing was committed there"
                ) from None
            raise
        return pending


class PendingDelta:
    """A run whose files are written but not committed; :meth:`commit` or :meth:`abort` it."""

    def __init__(self, lake: _Lake, layout: TableLayout, record: RunRecord, txn: str, note: str | None) -> None:
        self.lake = lake
        self.layout = layout
        self.record = record
        self.txn = txn
        self.note = note
        self.writes: list[_TableWrite] = []
        self.attempt = 1
        self.done = False
        self.labels = tuple(coverage_label(c) for c in record.coverage)

    # -- prepare
    def _journal(self, state: str, **extra: Any) -> None:
        rec = self.record
        payload = {"txn": self.txn, "state": state, "kind": "publish", "run_id": rec.run_id, "job": rec.job,
                   "started_at": _utcnow().isoformat(), "owner": _owner(), "arflow_version": rec.arflow_version,
                   "files": [f for w in self.writes for f in w.files], **extra}
        payload["kind"] = getattr(self, "kind", "publish")
        first = not self.__dict__.get("_journal_written")
        try:
            self.lake.write_json(JOURNAL, payload, exclusive=first)
        except FileExistsError:
            self.done = True  # the journal is the other writer's: abort must not touch it
            raise PublishError(
                f"another arflow run started publishing to lakehouse {self.lake.root} at the same moment; "
                "retry when it finishes"
            ) from None
        self._journal_written = True

    def _prepare(self, staged: Any) -> None:
        lake, layout, rec = self.lake, self.layout, self.record
        schemas = table_schemas(layout, self.labels)
        self._journal("prepared")
        self._ensure_tables(schemas)
        con = _memory(layout, self.labels)
        s = quote(layout.schema)
        try:
            current = {t: _snapshot_arrow(lake, t) for t in ("runs", "vintages", "job_policy")}
            prev = current["runs"].filter(pl.col("run_id") == rec.run_id) if current["runs"] is not None else None
            self.attempt = int(prev["attempt"].max()) + 1 if prev is not None and prev.height else 1
            self._check_jump(current["vintages"])
            models = _parquet(_staged_files(staged, "models"))
            held = rec.held
            for table, part in RUN_TABLES:
                if held and table in (*VIEW_TABLES, "accuracy"):
                    continue
                mem = f"{s}.{quote(table)}"
                if table == "series_status":
                    if models:
                        keys = ", ".join(quote(k) for k in layout.keys)
                        have_m = set(con.sql(f"SELECT * FROM {models} LIMIT 0").columns)
                        extra = "".join(f", {c}" for c in ("reasons", "failed_gates", "warnings") if c in have_m)
                        con.execute(f"INSERT INTO {mem} BY NAME SELECT ? AS run_id, ? AS job, ? AS as_of, {keys}, decision{extra}, "
                                    f"? AS on_failure FROM {models}", [rec.run_id, rec.job, rec.as_of, rec.on_failure])
                elif table == "accuracy":
                    self._accuracy(con, staged)
                else:
                    src = _parquet(_staged_files(staged, table))
                    if src:
                        have = {c for c, in con.execute(
                            "SELECT column_name FROM information_schema.columns WHERE table_schema = ? AND table_name = ?",
                            [layout.schema, table]).fetchall()}
                        cols = [c for c in con.sql(f"SELECT * FROM {src} LIMIT 0").columns if c in have and c != "run_id"]
                        con.execute(f"INSERT INTO {mem} BY NAME SELECT ? AS run_id, "
                                    f"{', '.join(quote(c) for c in cols)} FROM {src}", [rec.run_id])
                    if table == "forecasts" and rec.on_failure == "keep-previous" and models:
                        self._keep_previous(con, models)
                write = _TableWrite(table, "replace-partition", _relation_schema(con, mem), (part, rec.run_id))
                _write_files(lake, write, con.sql(f"SELECT * FROM {mem}").to_arrow_reader(100_000), self.txn)
                if table not in ("series_status", "forecasts"):  # kept for published_forecasts
                    con.execute(f"DELETE FROM {mem}")
                self.writes.append(write)
                self._journal("prepared")
                fault_point(f"lakehouse-prepare:{table}")
            self._whole_tables(con, schemas, current, held)
        finally:
            con.close()
        self._journal("prepared")

    def _ensure_tables(self, schemas: dict[str, pa.Schema]) -> None:
        dl = _deltalake()
        for table in COMMIT_ORDER:
            if self.lake.table(table) is None:
                part = PARTITION.get(table)
                dl.DeltaTable.create(self.lake.uri(table), schemas[table], partition_by=[part] if part else None,
                                     mode="ignore", storage_options=self.lake.options or None,
                                     name=f"{self.layout.schema}.{table}")

    def _check_jump(self, vintages: pl.DataFrame | None) -> None:
        """The far-ahead guard again, against the lake's vintages as this publication sees them."""
        rec = self.record
        if rec.jump_limit is None or vintages is None:
            return
        mine = vintages.filter(pl.col("job") == rec.job)
        check_jump(rec, mine["as_of"].max() if mine.height else None)

    def _register(self, con: duckdb.DuckDBPyConnection, table: str, name: str) -> bool:
        """Load the lake table's current rows into ``con`` as table ``name`` once (False when there is no table).

        Streamed by deltalake's own reader into DuckDB, which spills to disk past its memory limit.
        """
        loaded = self.__dict__.setdefault("_loaded", {})
        if name not in loaded:
            t = self.lake.table(table)
            loaded[name] = t is not None
            if t is not None:
                con.register("arflow_reader", _reader(t))
                con.execute(f"CREATE TEMP TABLE {quote(name)} AS SELECT * FROM arflow_reader")
                con.unregister("arflow_reader")
        return loaded[name]

    def _keep_previous(self, con: duckdb.DuckDBPyConnection, models: str) -> None:
        """keep-previous: an earlier attempt's forecasts of series this attempt quarantines stay (stale)."""
        if not self._register(con, "forecasts", "lake_forecasts"):
            return
        s, keys = quote(self.layout.schema), [quote(k) for k in self.layout.keys]
        same = " AND ".join(f"m.{k} = f.{k}" for k in keys)
        have = set(con.sql(f"SELECT * FROM {s}.forecasts LIMIT 0").columns)
        cols = ", ".join(f"f.{quote(c)}" for c in con.sql("SELECT * FROM lake_forecasts LIMIT 0").columns if c in have)
        con.execute(
            f"INSERT INTO {s}.forecasts BY NAME SELECT {cols} FROM lake_forecasts AS f "
            f"WHERE f.run_id = ? AND EXISTS (SELECT 1 FROM {models} AS m WHERE m.decision <> 'published' AND {same})",
            [self.record.run_id],
        )

    def _accuracy(self, con: duckdb.DuckDBPyConnection, staged: Any) -> None:
        """Score earlier published vintages against the actuals this run saw (once each), as the DuckDB target does."""
        actuals = _parquet(_staged_files(staged, "actuals"))
        if actuals is None or not self._register(con, "forecasts", "lake_forecasts"):
            return
        if not self._register(con, "vintages", "lake_vintages"):
            return
        has_acc = self._register(con, "accuracy", "lake_accuracy")
        if has_acc:  # an empty table's scan may carry no columns: nothing scored yet means nothing to skip
            have = set(con.sql("SELECT * FROM lake_accuracy LIMIT 0").columns)
            has_acc = {"forecast_run_id", "period", *self.layout.keys} <= have
        rec, s = self.record, quote(self.layout.schema)
        keys = [quote(k) for k in self.layout.keys]
        on = " AND ".join(f"a.{k} = f.{k}" for k in keys)
        same = " AND ".join(f"x.{k} = f.{k}" for k in keys)
        fcols = set(con.sql("SELECT * FROM lake_forecasts LIMIT 0").columns)
        labels = [lab for lab in self.labels if {f"lower_{lab}", f"upper_{lab}"} <= fcols]
        acols = set(con.sql("SELECT * FROM lake_accuracy LIMIT 0").columns) if has_acc else set()
        labels += [c[len("covered_"):] for c in sorted(acols) if c.startswith("covered_")
                   and c[len("covered_"):] not in labels and {f"lower_{c[8:]}", f"upper_{c[8:]}"} <= fcols]
        for lab in labels:
            if f"covered_{lab}" not in {c for c, in con.execute(
                    "SELECT column_name FROM information_schema.columns WHERE table_schema = ? AND table_name = 'accuracy'",
                    [self.layout.schema]).fetchall()}:
                con.execute(f"ALTER TABLE {s}.accuracy ADD COLUMN {quote('covered_' + lab)} BOOLEAN")
        covered = "".join(
            f", CASE WHEN f.{quote('lower_' + lab)} IS NULL THEN NULL "
            f"ELSE a.value BETWEEN f.{quote('lower_' + lab)} AND f.{quote('upper_' + lab)} END AS {quote('covered_' + lab)}"
            for lab in labels
        )
        seen = (f"AND NOT EXISTS (SELECT 1 FROM lake_accuracy AS x WHERE x.recorded_by <> ? AND x.forecast_run_id = f.run_id "
                f"AND x.period = f.period AND {same})") if has_acc else "AND ? IS NOT NULL"
        con.execute(
            f"""
            INSERT INTO {s}.accuracy BY NAME
            SELECT f.run_id AS forecast_run_id, v.job, {', '.join('f.' + k for k in keys)}, f.period, f.step, f.forecast,
                   a.value AS actual, a.value - f.forecast AS error,
                   CASE WHEN a.value <> 0 THEN abs((a.value - f.forecast) / a.value) END AS abs_pct_error,
                   ? AS recorded_by{covered}
            FROM lake_forecasts AS f
            JOIN lake_vintages AS v ON v.run_id = f.run_id AND v.job = ? AND v.as_of < ?
            JOIN {actuals} AS a ON {on} AND a.period = f.period
            WHERE a.value IS NOT NULL AND isfinite(a.value) {seen}
            """,
            [rec.run_id, rec.job, rec.as_of, rec.run_id],
        )

    def _whole_tables(self, con: duckdb.DuckDBPyConnection, schemas: dict[str, pa.Schema],
                      current: dict[str, pl.DataFrame | None], held: bool) -> None:
        rec, s = self.record, quote(self.layout.schema)
        run_row = {"run_id": rec.run_id, **runs_row(rec, self.attempt)}
        self._whole(con, "runs", schemas, current["runs"], pl.col("run_id") != rec.run_id,
                    f"INSERT INTO {s}.runs ({', '.join(quote(c) for c in run_row)}) VALUES ({', '.join('?' for _ in run_row)})",
                    list(run_row.values()))
        if held:
            return
        self._whole(con, "vintages", schemas, current["vintages"], ~((pl.col("job") == rec.job) & (pl.col("as_of") == rec.as_of)),
                    f"INSERT INTO {s}.vintages VALUES (?, ?, ?, ?, ?)",
                    [rec.job, rec.as_of, rec.run_id, self.attempt, rec.finished_at])
        self._whole(con, "job_policy", schemas, current["job_policy"], pl.col("job") != rec.job,
                    f"INSERT INTO {s}.job_policy VALUES (?, ?, ?)", [rec.job, rec.frequency, rec.stale_after_periods])
        self._view(con, schemas, True)

    def _view(self, con: duckdb.DuckDBPyConnection, schemas: dict[str, pa.Schema], with_new: bool) -> None:
        """Write ``published_forecasts`` over the tables as they will be after this commit (the run's partition replaced).

        The memory tables ``series_status`` and ``forecasts`` hold this run's new rows (``with_new``) or none.
        """
        rec, s, layout = self.record, quote(self.layout.schema), self.layout
        for table in ("series_status", "forecasts"):
            lake_has = self._register(con, table, f"lake_{table}")
            con.execute(f"ALTER TABLE {s}.{quote(table)} RENAME TO {quote('new_' + table)}")
            parts = [f"SELECT * FROM {s}.{quote('new_' + table)}"] if with_new else []
            if lake_has:
                parts.append(f"SELECT * FROM lake_{table} WHERE run_id <> {_lit(rec.run_id)}")
            if not parts:
                parts = [f"SELECT * FROM {s}.{quote('new_' + table)}"]
            con.execute(f"CREATE VIEW {s}.{quote(table)} AS " + " UNION ALL BY NAME ".join(parts))
        con.execute(render_sql(VIEW_FILE, layout))
        keys = ", ".join(quote(k) for k in layout.keys)
        view = con.sql(f"SELECT * FROM {s}.published_forecasts ORDER BY job, {keys}, step")
        pf_schema = _merge_schema(schemas["published_forecasts"], _relation_schema(con, f"{s}.published_forecasts"))
        write = _TableWrite("published_forecasts", "replace-all", pf_schema)
        _write_files(self.lake, write, view.to_arrow_reader(100_000), self.txn)
        self.writes.append(write)

    def _whole(self, con: duckdb.DuckDBPyConnection, table: str, schemas: dict[str, pa.Schema], frame: pl.DataFrame | None,
               keep: pl.Expr, insert: str, params: list[Any]) -> None:
        s = quote(self.layout.schema)
        con.execute(insert, params)
        new = con.sql(f"SELECT * FROM {s}.{quote(table)}").to_arrow_table()
        parts = [new]
        if frame is not None and frame.height:
            parts.insert(0, frame.filter(keep).to_arrow().select(new.schema.names).cast(new.schema))
        full = pa.concat_tables(parts)
        write = _TableWrite(table, "replace-all", schemas[table])
        _write_files(self.lake, write, full.to_reader(), self.txn)
        self.writes.append(write)
        con.register("arflow_whole", full)  # the memory table holds the whole table now (the view reads job_policy)
        con.execute(f"DELETE FROM {s}.{quote(table)}")
        con.execute(f"INSERT INTO {s}.{quote(table)} SELECT * FROM arflow_whole")
        con.unregister("arflow_whole")

    # -- commit / abort
    def commit(self) -> int:
        """Commit every table in order, the gate row last; returns the vintage's attempt number."""
        if self.done:
            return self.attempt
        dl = _deltalake()
        lake = self.lake
        plan = [w.table for w in self.writes] + [GATE]
        before = {}
        for t in plan:
            table = lake.table(t)
            before[t] = table.version() if table is not None else -1
        self._journal("committing", plan=plan, versions_before=before)
        fault_point("lakehouse:committing")
        props = dl.CommitProperties(custom_metadata={_TXN_KEY: self.txn, "arflow.run_id": self.record.run_id,
                                                     "arflow.attempt": str(self.attempt)})
        hooks = dl.PostCommitHookProperties(create_checkpoint=True, cleanup_expired_logs=None)
        try:
            for w in self.writes:
                table = lake.table(w.table)
                schema = w.schema
                schema = _merge_schema(_table_arrow_schema(table), schema)
                if w.mode == "delete-where":
                    table.delete(w.partition[1], commit_properties=props, post_commithook_properties=hooks)
                elif w.mode == "replace-partition":
                    col, value = w.partition
                    table.create_write_transaction(w.actions, "overwrite", schema, partition_by=[col],
                                                   partition_filters=[(col, "=", value)], commit_properties=props,
                                                   post_commithook_properties=hooks)
                else:
                    table.create_write_transaction(w.actions, "overwrite", schema, commit_properties=props,
                                                   post_commithook_properties=hooks)
                fault_point(f"lakehouse:{w.table}")
            _commit_gate(lake, self.record.run_id, self.record.job, getattr(self, "kind", "publish"), self.txn, plan,
                         self.record.arflow_version)
            fault_point("lakehouse:commits")
        except BaseException as exc:
            # settle now: roll back what landed (the journal says what), unless every commit landed
            try:
                _recover_own(lake)
            except Exception:  # noqa: BLE001 - the next run settles it from the journal
                pass
            self.done = True
            if isinstance(exc, OSError):
                raise PublishError(f"committing to lakehouse {lake.root} failed ({_first(exc)}); "
                                   "the lakehouse was rolled back to before this run") from None
            raise
        lake.delete(JOURNAL)
        self.done = True
        return self.attempt

    def abort(self) -> None:
        """Delete this run's uncommitted files and its journal (no-op after commit)."""
        if self.done:
            return
        self.done = True
        for w in self.writes:
            for f in w.files:
                self.lake.delete(f)
        journal = self.lake.read_json(JOURNAL)
        if journal is not None and journal.get("txn") == self.txn:
            if journal.get("state") == "committing":
                _recover_own(self.lake)
            else:
                for f in journal.get("files", []):
                    self.lake.delete(f)
                self.lake.delete(JOURNAL)


def _recover_own(lake: _Lake) -> None:
    """Settle this process's own unfinished journal (its owner is us, so the liveness check is skipped)."""
    journal = lake.read_json(JOURNAL)
    if journal is None:
        return
    journal["owner"] = {"host": socket.gethostname(), "pid": -1}
    lake.write_json(JOURNAL, journal)
    _recover(lake)


def _reader(table: Any, columns: list[str] | None = None, predicate: str | None = None) -> pa.RecordBatchReader:
    """A table's rows through deltalake's own scan (no pandas import, predicate pushed down)."""
    return pa.RecordBatchReader.from_stream(table.scan(columns=columns, predicate=predicate))


def _lit(text: str) -> str:
    return "'" + str(text).replace("'", "''") + "'"


def _table_arrow_schema(table: Any) -> pa.Schema:
    return pa.schema(table.schema().to_arrow())


def _merge_schema(base: pa.Schema, extra: pa.Schema) -> pa.Schema:
    """``base`` plus the columns of ``extra`` it lacks (coverage levels new to the table), in order."""
    names = set(base.names)
    out = list(base)
    for f in extra:
        if f.name not in names:
            out.append(f)
    return pa.schema(out)


# ------------------------------------------------------------------------------------ readers


def _gate_versions(lake: _Lake) -> dict[str, int] | None:
    """Table versions after the last complete publication (None when nothing was published yet)."""
    gate = lake.table(GATE)
    if gate is None:
        return None
    frame = pl.from_arrow(_reader(gate).read_all())
    if not frame.height:
        return None
    last = frame.sort("committed_at").row(-1, named=True)
    return {k: int(v) for k, v in json.loads(last["table_versions"]).items()}


def _snapshot(lake: _Lake, table: str) -> pl.DataFrame | None:
    """A table as of the last complete publication (None when it does not exist)."""
    versions = _gate_versions(lake)
    if versions is None or table not in versions:
        t = lake.table(table)
        if t is None or versions is None:
            return None
        return pl.from_arrow(_reader(t).read_all())
    t = lake.table(table, version=versions[table])
    return pl.from_arrow(_reader(t).read_all()) if t is not None else None


def _snapshot_arrow(lake: _Lake, table: str) -> pl.DataFrame | None:
    t = lake.table(table)
    return pl.from_arrow(_reader(t).read_all()) if t is not None else None


def _open(lakehouse: str | Path, schema: str, options: dict[str, str] | None) -> _Lake:
    _deltalake()
    lake = _Lake(lakehouse, schema, options)
    if lake.local and not Path(lake.root).is_dir():
        raise SourceError(f"lakehouse folder {lake.root} does not exist; check the lakehouse path and schema")
    return lake


def read_table(lakehouse: str | Path, table: str, schema: str = "arflow",
               options: dict[str, str] | None = None) -> pl.DataFrame:
    """All rows of ``table`` as of the last complete publication (only complete runs)."""
    lake = _open(lakehouse, schema, options)
    frame = _snapshot(lake, check_identifier(table, "table"))
    return frame if frame is not None else pl.DataFrame()


def published_forecasts(lakehouse: str | Path, schema: str = "arflow",
                        options: dict[str, str] | None = None) -> pl.DataFrame:
    """The lakehouse's ``published_forecasts`` (the same rows as the DuckDB view of that name)."""
    return read_table(lakehouse, "published_forecasts", schema, options)


def committed_runs(lakehouse: str | Path, schema: str = "arflow", options: dict[str, str] | None = None) -> pl.DataFrame:
    """The ``runs`` table as of the last complete publication, ordered by run id."""
    frame = read_table(lakehouse, "runs", schema, options)
    return frame.sort("run_id") if frame.height else frame


def iter_tables() -> Iterator[str]:
    """Every table name of a lakehouse schema, in commit order."""
    yield from COMMIT_ORDER


# ------------------------------------------------------------------------------------ vintages


@dataclass(frozen=True)
class LakeVintage:
    """One vintage of a job in a lakehouse (what ``arflow vintages`` lists)."""

    as_of: Any
    run_id: str
    attempts: int
    status: str
    series_total: int
    series_published: int
    series_quarantined: int
    visible: int
    published_at: dt.datetime | None
    current: bool


def lake_vintages(lakehouse: str | Path, schema: str, job: str, options: dict[str, str] | None = None) -> list[LakeVintage]:
    """The job's vintages in a lakehouse, oldest first (as of the last complete publication)."""
    lake = _Lake(lakehouse, schema, options)
    if lake.local and not Path(lake.root).is_dir():
        return []
    runs = _snapshot(lake, "runs")
    if runs is None or not runs.height:
        return []
    vintages = _snapshot(lake, "vintages")
    view = _snapshot(lake, "published_forecasts")
    shown: dict[str, int] = {}
    if view is not None and view.height:
        for run_id, n in view.filter(pl.col("step") == 1).group_by("run_id").len().iter_rows():
            shown[run_id] = int(n)
    published = {} if vintages is None else {r["run_id"]: r["published_at"] for r in vintages.iter_rows(named=True)}
    mine = vintages.filter(pl.col("job") == job) if vintages is not None else None
    current = mine["as_of"].max() if mine is not None and mine.height else None
    out = []
    for r in runs.filter(pl.col("job") == job).sort("as_of").iter_rows(named=True):
        out.append(LakeVintage(r["as_of"], r["run_id"], int(r["attempt"]), r["status"], int(r["series_total"]),
                               int(r["series_published"]), int(r["series_quarantined"]), shown.get(r["run_id"], 0),
                               published.get(r["run_id"]), r["as_of"] == current))
    return out


def lake_latest_vintage(lakehouse: str | Path, schema: str, job: str, options: dict[str, str] | None = None) -> Any | None:
    """The job's latest vintage that changed the view (None when none)."""
    lake = _Lake(lakehouse, schema, options)
    if lake.local and not Path(lake.root).is_dir():
        return None
    vintages = _snapshot(lake, "vintages")
    if vintages is None:
        return None
    mine = vintages.filter(pl.col("job") == job)
    return mine["as_of"].max() if mine.height else None


def lake_period_type(lakehouse: str | Path, schema: str, options: dict[str, str] | None = None) -> str | None:
    """DATE, TIMESTAMP or BIGINT: the period type of a lakehouse schema (None when it has no tables)."""
    lake = _Lake(lakehouse, schema, options)
    if lake.local and not Path(lake.root).is_dir():
        return None
    status = lake.table("series_status")
    return None if status is None else _layout_of(_table_arrow_schema(status))[1]


def prepare_removal(lakehouse: str | Path, schema: str, job: str, as_of: Any, who: str, host: str, version: str,
                    options: dict[str, str] | None = None) -> tuple["PendingDelta", dict[str, int]]:
    """Plan removing one vintage from every table (rows counted per table); commit or abort the result.

    Raises :class:`PublishError` when the lakehouse holds no such vintage.
    """
    lake = _Lake(lakehouse, schema, options)
    _recover(lake)
    runs = _snapshot(lake, "runs")
    mine = runs.filter((pl.col("job") == job) & (pl.col("as_of") == as_of)) if runs is not None and runs.height else None
    if mine is None or not mine.height:
        raise PublishError(f"lakehouse {lake.root} has no vintage {as_of} of job {job}; see arflow vintages")
    row = mine.row(0, named=True)
    status = lake.table("series_status")
    keys, period_type = _layout_of(_table_arrow_schema(status))
    key_types = tuple(_duck_type(_table_arrow_schema(status).field(k).type) for k in keys)
    layout = TableLayout(schema, tuple(keys), key_types, period_type)
    record = RunRecord(run_id=row["run_id"], job=job, as_of=as_of, started_at=row["started_at"],
                       finished_at=row["finished_at"], status=row["status"], series_total=0, series_published=0,
                       series_quarantined=0, quarantine_share=0.0, on_failure=row["on_failure"],
                       frequency=row["frequency"] or "month", horizon=int(row["horizon"] or 1), coverage=(),
                       source="", config_sha256="", arflow_version=version)
    pending = PendingDelta(lake, layout, record, uuid.uuid4().hex[:16], None)
    pending.kind = "retract"
    counts: dict[str, int] = {}
    try:
        pending._journal("prepared")
        pending._prepare_removal(row, who, host, counts)
    except BaseException:
        pending.abort()
        raise
    return pending, counts


def _duck_type(t: pa.DataType) -> str:
    if pa.types.is_string(t) or pa.types.is_large_string(t):
        return "VARCHAR"
    if pa.types.is_boolean(t):
        return "BOOLEAN"
    if pa.types.is_date(t):
        return "DATE"
    if pa.types.is_timestamp(t):
        return "TIMESTAMP"
    return {pa.int8(): "TINYINT", pa.int16(): "SMALLINT", pa.int32(): "INTEGER"}.get(t, "BIGINT")


def _prepare_removal(self: PendingDelta, row: dict[str, Any], who: str, host: str, counts: dict[str, int]) -> None:
    lake, rec, s = self.lake, self.record, quote(self.layout.schema)
    run = rec.run_id
    for table, part in RUN_TABLES:
        t = lake.table(table)
        if t is None:
            continue
        n = _count(t, part, run)
        counts["accuracy (recorded by it)" if table == "accuracy" else table] = n
        self.writes.append(_TableWrite(table, "replace-partition", _table_arrow_schema(t), (part, run)))
        if table == "accuracy":
            scored = _count(t, "forecast_run_id", run)
            counts["accuracy"] = scored
            if scored:
                self.writes.append(_TableWrite(table, "delete-where", _table_arrow_schema(t), ("forecast_run_id", f"forecast_run_id = {_lit(run)}")))
    schemas = {name: _table_arrow_schema(lake.table(name)) for name in ("runs", "vintages", "published_forecasts",
                                                                     "vintage_removals", "job_policy")}
    con = _memory(self.layout, ())
    try:
        for table, cond in (("runs", pl.col("run_id") != run), ("vintages", pl.col("run_id") != run)):
            frame = _snapshot(lake, table)
            counts[table] = 0 if frame is None else frame.height - frame.filter(cond).height
            kept = frame.filter(cond) if frame is not None else None
            write = _TableWrite(table, "replace-all", schemas[table])
            arrow = kept.to_arrow() if kept is not None else schemas[table].empty_table()
            _write_files(lake, write, arrow.to_reader(), self.txn)
            self.writes.append(write)
            if table == "vintages" and kept is not None and kept.height:
                con.register("arflow_whole", arrow)
                con.execute(f"INSERT INTO {s}.vintages BY NAME SELECT * FROM arflow_whole")
        policy = _snapshot(lake, "job_policy")
        if policy is not None and policy.height:
            con.register("arflow_policy", policy.to_arrow())
            con.execute(f"INSERT INTO {s}.job_policy BY NAME SELECT * FROM arflow_policy")
        self._view(con, schemas, False)
        removals = _snapshot(lake, "vintage_removals")
        audit = pa.table({
            "removed_at": [_utcnow()], "removed_by": [who], "host": [host], "job": [rec.job], "as_of": [rec.as_of],
            "run_id": [run], "attempts": [int(row["attempt"])], "rows_removed": [json.dumps(counts, sort_keys=True)],
            "arflow_version": [rec.arflow_version],
        })
        parts = ([removals.to_arrow()] if removals is not None and removals.height else []) + [audit]
        write = _TableWrite("vintage_removals", "replace-all", schemas["vintage_removals"])
        _write_files(lake, write, _concat(parts, schemas["vintage_removals"]).to_reader(), self.txn)
        self.writes.append(write)
    finally:
        con.close()
    self._journal("prepared")


PendingDelta._prepare_removal = _prepare_removal  # type: ignore[attr-defined]


def _concat(parts: list[pa.Table], schema: pa.Schema) -> pa.Table:
    return pa.concat_tables([p.select([f.name for f in schema]).cast(schema) for p in parts])


def _count(table: Any, column: str, value: str) -> int:
    return _reader(table, [column], f"{column} = {_lit(value)}").read_all().num_rows


def convert_frames(lakehouse: str | Path, layout: TableLayout, tables: dict[str, pl.DataFrame], runs: pl.DataFrame,
                   view: pl.DataFrame, vintages: list[dict[str, Any]], policy: list[dict[str, Any]]) -> dict[str, int]:
    """Write an old lakehouse's rows as Delta tables (the conversion from the marker layout); rows per table."""
    dl = _deltalake()
    labels = tuple(sorted(c[len("lower_"):] for c in tables.get("forecasts", pl.DataFrame()).columns if c.startswith("lower_")))
    schemas = table_schemas(layout, labels)
    lake = _Lake(lakehouse, layout.schema)
    txn = uuid.uuid4().hex[:16]
    props = dl.CommitProperties(custom_metadata={_TXN_KEY: txn, "arflow.operation": "convert"})
    frames: dict[str, pl.DataFrame] = dict(tables)
    frames["runs"] = runs
    frames["published_forecasts"] = view
    frames["vintages"] = pl.DataFrame(vintages) if vintages else pl.DataFrame()
    frames["job_policy"] = pl.DataFrame(policy) if policy else pl.DataFrame()
    counts = {}
    for table in COMMIT_ORDER:
        if table == GATE:
            continue
        schema = schemas[table]
        if table == "published_forecasts" and view.width:
            schema = _merge_schema(schema, pa.schema([pa.field(c, pa.float64()) for c in view.columns
                                                      if c.startswith(("lower_", "upper_"))]))
        frame = frames.get(table)
        data = _cast_frame(frame, schema) if frame is not None and frame.height else schema.empty_table()
        part = PARTITION.get(table)
        dl.write_deltalake(lake.uri(table), data, partition_by=[part] if part else None, mode="error",
                           commit_properties=props, name=f"{layout.schema}.{table}")
        counts[table] = data.num_rows
    _commit_gate(lake, "", None, "convert", txn, list(COMMIT_ORDER), "")
    return counts


def _cast_frame(frame: pl.DataFrame, schema: pa.Schema) -> pa.Table:
    """A polars frame as an Arrow table of ``schema`` (text dates and times parsed; missing columns null)."""
    arrow = frame.to_arrow()
    cols = []
    for f in schema:
        if f.name not in arrow.column_names:
            cols.append(pa.nulls(arrow.num_rows, f.type))
            continue
        col = arrow.column(f.name)
        if (pa.types.is_date(f.type) or pa.types.is_timestamp(f.type)) and (
                pa.types.is_string(col.type) or pa.types.is_large_string(col.type)):
            parsed = pl.Series(col.to_pylist(), dtype=pl.String).str.to_datetime(strict=False)
            col = (parsed.dt.date() if pa.types.is_date(f.type) else parsed).to_arrow()
        cols.append(col.cast(f.type))
    return pa.table(cols, schema=schema)


def removal_counts(lakehouse: str | Path, schema: str, run_id: str, options: dict[str, str] | None = None) -> dict[str, int]:
    """Rows per table that removing ``run_id`` would drop (for ``retract --dry-run``)."""
    lake = _Lake(lakehouse, schema, options)
    counts: dict[str, int] = {}
    for table, part in RUN_TABLES:
        t = lake.table(table)
        if t is None:
            continue
        counts["accuracy (recorded by it)" if table == "accuracy" else table] = _count(t, part, run_id)
        if table == "accuracy":
            counts["accuracy"] = _count(t, "forecast_run_id", run_id)
    for table in ("runs", "vintages"):
        frame = _snapshot(lake, table)
        counts[table] = 0 if frame is None else frame.filter(pl.col("run_id") == run_id).height
    return counts
