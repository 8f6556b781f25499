"""Publish one run into PostgreSQL: the same tables and views as the DuckDB target, in one transaction.

:meth:`PostgresTarget.prepare` opens a connection, takes a transaction-level
advisory lock on the target schema (a second run waits up to
``[publish] lock_wait_seconds``, then fails with a one-line error), creates or
checks arflow's tables (``sql/postgres/*.sql``), deletes the vintage's earlier
rows and bulk-loads the run's rows with binary ``COPY`` (Arrow in, through
``adbc-driver-postgresql``), all before ``COMMIT``. Readers keep seeing the
previous state (MVCC) until :meth:`PostgresPublication.commit`; anything
that goes wrong before it, a kill of the process included, leaves the
target exactly as it was (the server rolls back a transaction whose client
went away).

The semantics mirror :class:`arflow.warehouse.duckdb_target.DuckDBTarget`
(re-runs replace their vintage, keep-previous / withdraw, ``hold_on_alarm``,
accuracy tracking across vintages, the far-ahead guard, schema ownership):
the two targets publish the same rows.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import time
from collections.abc import Iterator
from importlib import resources
from string import Template
from typing import Any

import pyarrow as pa
import pyarrow.parquet as pq

from ..errors import PublishError
from ..runtime import fault_point, hold_signals, release_signals, unwatch_connection, watch_connection
from ..results import RUN_TABLES
from .contract import (
    COVERAGE_COLUMNS, DATABASE_ORDER, RENAMED_COLUMNS, RunRecord, TableLayout, check_coverage_levels, check_jump,
    check_layout_match, check_owned_tables, runs_row,
)
from .duckdb_target import (
    ACCURACY_VIEW, DDL_FILES, MARKER_FILE, MARKER_TABLE, STATUS_VIEW, VIEW_FILE, expected_columns,
)
from .identifiers import key_fragments, quote
from .postgres_connection import PgAddress, connect, detail, driver_errors, lost_connection, sqlstate

#: default [publish] lock_wait_seconds and statement_timeout_seconds
DEFAULT_LOCK_WAIT = 60.0
DEFAULT_STATEMENT_TIMEOUT = 3600.0
#: first half of the advisory lock key (the second is hashtext(schema)): "arfl" in ASCII
LOCK_CLASS = 0x6172666C

#: arflow's type names (DuckDB's) -> PostgreSQL DDL types
_PG_TYPES = {
    "VARCHAR": "text", "TINYINT": "smallint", "SMALLINT": "smallint", "INTEGER": "integer", "BIGINT": "bigint",
    "UTINYINT": "smallint", "USMALLINT": "integer", "UINTEGER": "bigint", "UBIGINT": "numeric(20,0)",
    "BOOLEAN": "boolean", "DATE": "date", "UUID": "uuid", "TIMESTAMP": "timestamp", "DOUBLE": "double precision",
}
#: PostgreSQL's own spelling of a type (format_type) where it differs from the DDL's
_FORMATTED = {"timestamp": "timestamp without time zone"}
#: format_type() of a period column -> arflow's period type
_PERIOD_TYPES = {"date": "DATE", "timestamp without time zone": "TIMESTAMP", "bigint": "BIGINT"}
#: a coverage level's column type per table, as format_type spells it
_LEVEL_TYPES = {"forecasts": "double precision", "backtests": "double precision", "accuracy": "boolean"}
#: format_type() -> Arrow type the bulk load sends (binary COPY needs the exact type)
_ARROW = {
    "text": pa.string(), "smallint": pa.int16(), "integer": pa.int32(), "bigint": pa.int64(),
    "double precision": pa.float64(), "boolean": pa.bool_(), "date": pa.date32(),
    "timestamp without time zone": pa.timestamp("us"),
}


#: series_status columns written besides the keys and the decision (arflow.vocabulary names)
STATUS_FIXED = ("run_id", "job", "as_of", "decision", "on_failure", "reasons", "failed_gates", "warnings")


def pg_type(duckdb_type: str) -> str:
    """The PostgreSQL DDL type for one of arflow's (DuckDB) type names (``X[]`` too).

    A list of STRUCTs (``series_status.failed_gates``) is ``jsonb``: an array
    of objects with the struct's field names (PostgreSQL drivers read
    composite-type arrays poorly; every client reads jsonb).
    """
    if duckdb_type.upper().startswith("STRUCT(") and duckdb_type.endswith("[]"):
        return "jsonb"
    if duckdb_type.endswith("[]"):
        return pg_type(duckdb_type[:-2]) + "[]"
    return _PG_TYPES[duckdb_type.upper()]


def formatted(duckdb_type: str) -> str:
    """What PostgreSQL's ``format_type`` reports for a column created with :func:`pg_type`."""
    if duckdb_type.upper().startswith("STRUCT("):
        return pg_type(duckdb_type)
    if duckdb_type.endswith("[]"):
        return formatted(duckdb_type[:-2]) + "[]"
    base = pg_type(duckdb_type)
    return _FORMATTED.get(base, base)


def arrow_type(formatted_type: str) -> pa.DataType:
    """The Arrow type that binary COPY writes into a column of ``formatted_type``."""
    if formatted_type.endswith("[]"):
        return pa.list_(arrow_type(formatted_type[:-2]))
    try:
        return _ARROW[formatted_type]
    except KeyError:
        raise PublishError(f"arflow cannot bulk-load a PostgreSQL column of type {formatted_type}") from None


def load_pg_sql(name: str) -> str:
    """Text of ``sql/postgres/<name>.sql`` (package data ``arflow.sql.postgres``)."""
    return resources.files("arflow.sql.postgres").joinpath(f"{name}.sql").read_text(encoding="utf-8")


def render_pg_sql(name: str, layout: TableLayout, coverage_labels: tuple[str, ...] = (),
                  forecast_columns: tuple[str, ...] = ()) -> str:
    """Fill a PostgreSQL DDL template with quoted identifiers and whitelisted types only."""
    keys = [quote(k) for k in layout.keys]
    hit_rates = "".join(
        f",\n       avg(CASE WHEN {quote('covered_' + lab)} THEN 1.0::double precision ELSE 0.0::double precision END)"
        f" AS {quote('hit_rate_' + lab)}"
        for lab in coverage_labels
    )
    return Template(load_pg_sql(name)).substitute(
        hit_rates=hit_rates,
        schema=quote(layout.schema),
        period_type=pg_type(layout.period_type),
        key_defs=",\n    ".join(f"{k} {pg_type(t)} NOT NULL" for k, t in zip(keys, layout.key_types)),
        age=_age_sql(layout.period_type),
        forecast_columns=", ".join(f"f.{quote(c)}" for c in forecast_columns),
        **key_fragments(keys),
    )


def _age_sql(period_type: str) -> str:
    """Whole periods from a kept vintage (``v.as_of``) to the job's latest (DuckDB's ``date_diff`` counts)."""
    if period_type == "BIGINT":
        return "(v.arflow_latest__ - v.as_of)"
    a, b = "v.as_of", "v.arflow_latest__"

    def part(p: str, x: str) -> str:
        return f"extract({p} FROM {x})::integer"

    days = f"({b}::date - {a}::date)"
    return (
        "CASE v.arflow_frequency__ "
        f"WHEN 'day' THEN {days} "
        f"WHEN 'month' THEN (({part('year', b)} * 12 + {part('month', b)}) - ({part('year', a)} * 12 + {part('month', a)})) "
        f"WHEN 'quarter' THEN (({part('year', b)} * 4 + {part('quarter', b)}) - ({part('year', a)} * 4 + {part('quarter', a)})) "
        f"WHEN 'year' THEN ({part('year', b)} - {part('year', a)}) "
        f"WHEN 'week' THEN div({days}, 7) END"
    )


class _Interruptible:
    """What the stop-signal watcher calls: cancels the statement running on the connection."""

    def __init__(self, con: Any) -> None:
        self._con = con

    def interrupt(self) -> None:
        self._con.adbc_cancel()


class PostgresTarget:
    """Publishes runs into ``layout.schema`` of the database at ``address``."""

    commit_order = DATABASE_ORDER

    def __init__(self, address: PgAddress, layout: TableLayout, *, lock_wait: float = DEFAULT_LOCK_WAIT,
                 statement_timeout: float = DEFAULT_STATEMENT_TIMEOUT) -> None:
        self.address = address
        self.layout = layout
        self.lock_wait = float(lock_wait)
        self.statement_timeout = float(statement_timeout)
        self._schema = quote(layout.schema)

    @classmethod
    def from_spec(cls, publish: Any, layout: TableLayout) -> "PostgresTarget":
        """The target of a job file's ``[publish]`` with ``postgres`` set."""
        return cls(publish.postgres, layout, lock_wait=publish.lock_wait, statement_timeout=publish.statement_timeout)

    def describe(self) -> str:
        return f"{self.address.describe()} (schema {self.layout.schema}, view {self.layout.schema}.published_forecasts)"

    # -- connections ----------------------------------------------------------
    def _connect(self) -> Any:
        return connect(self.address, "target", PublishError)

    def _where(self) -> str:
        return f"schema {self.layout.schema} in {self.address.describe()}"

    def error_for(self, exc: BaseException, doing: str) -> PublishError:
        state = sqlstate(exc) or ""
        fix_rights = (
            f"grant role {self.address.user} CREATE on the database (to create the schema) or USAGE and CREATE on "
            f"schema {self.layout.schema} and ownership of arflow's tables there (README: PostgreSQL grants)"
        )
        if state == "42501":
            return PublishError(f"role {self.address.user} may not {doing} {self._where()} ({detail(exc)}); {fix_rights}")
        if state == "57014" and "statement timeout" in str(exc).lower():
            return PublishError(
                f"a statement took longer than publish.statement_timeout_seconds = {self.statement_timeout:g} while "
                f"{doing.replace('write', 'writing')} {self._where()}; it was rolled back and earlier results are unchanged; "
                "raise the limit or retry when the server is less busy"
            )
        if state in ("55P03", "40P01"):
            return PublishError(f"{self._where()} is locked by another session ({detail(exc)}); rolled back, retry when it finishes")
        if lost_connection(exc):
            return PublishError(
                f"the connection to {self.address.describe()} was lost while publishing ({detail(exc)}); the server rolls "
                "the run back, earlier results are unchanged; re-run the job"
            )
        return PublishError(f"publishing to {self._where()} failed and was rolled back ({detail(exc)}); earlier results are unchanged")

    # -- checks before any work -------------------------------------------------
    def preflight(self) -> None:
        """Before reading or fitting: the server is reachable, the login works and the schema is writable."""
        con = self._connect()
        try:
            (can_create_schema,) = fetch_rows(con, "SELECT has_database_privilege(current_database(), 'CREATE')")[0]
            found = fetch_rows(con, "SELECT nspname FROM pg_namespace WHERE nspname = $1", (self.layout.schema,))
            schema = found[0][0] if found else None
            writable = None
            if schema is not None:
                (writable,) = fetch_rows(con, "SELECT has_schema_privilege($1, 'USAGE') AND has_schema_privilege($1, 'CREATE')",
                                     (self.layout.schema,))[0]
        except driver_errors() as exc:
            raise self.error_for(exc, "read the catalogue of") from None
        finally:
            _close(con)
        if schema is None and not can_create_schema:
            raise PublishError(
                f"role {self.address.user} may not create schema {self.layout.schema} in {self.address.describe()}; "
                f"create the schema for it or GRANT CREATE ON DATABASE to it (README: PostgreSQL grants); nothing was computed"
            )
        if schema is not None and not writable:
            raise PublishError(
                f"role {self.address.user} may not write schema {self.layout.schema} in {self.address.describe()} "
                f"(needs USAGE and CREATE on it); GRANT them or publish to another schema; nothing was computed"
            )

    def check_layout(self) -> str:
        """Read-only look at the target for ``validate`` and dry runs; returns a status note."""
        con = self._connect()
        try:
            present = table_columns(con, self.layout.schema)
            self._check_schema(con, present)
            return "tables exist" if "series_status" in present else "tables will be created"
        except driver_errors() as exc:
            raise self.error_for(exc, "read") from None
        finally:
            _close(con)

    def latest_vintage(self, job: str) -> Any | None:
        """The job's latest vintage that changed the view (None when none, or no table yet)."""
        con = self._connect()
        try:
            if "vintages" not in table_columns(con, self.layout.schema):
                return None
            return fetch_rows(con, f"SELECT max(as_of) FROM {self._schema}.vintages WHERE job = $1", (job,))[0][0]
        except driver_errors() as exc:
            raise self.error_for(exc, "read") from None
        finally:
            _close(con)

    # -- publishing ------------------------------------------------------------
    def prepare(self, record: RunRecord, staged: Any, coverage_labels: tuple[str, ...] | None = None) -> "PostgresPublication":
        """Write the whole run inside an open transaction (invisible to readers until ``commit``)."""
        labels = tuple(coverage_labels) if coverage_labels is not None else _labels_of(record)
        con = self._connect()
        guard = _Interruptible(con)
        watch_connection(guard)  # a stop signal before COMMIT cancels the running statement (then rolls back)
        try:
            attempt = self._write(con, record, staged, labels)
        except BaseException as exc:
            unwatch_connection(guard)
            rollback_close(con)
            if isinstance(exc, driver_errors()):
                raise self.error_for(exc, "write") from None
            raise
        return PostgresPublication(self, con, guard, attempt)

    def publish(self, record: RunRecord, staged: Any, coverage_labels: tuple[str, ...] | None = None) -> int:
        """prepare + commit (the whole publish of a run that has this one target)."""
        pending = self.prepare(record, staged, coverage_labels)
        try:
            return pending.commit()
        finally:
            pending.abort()

    def _write(self, con: Any, record: RunRecord, staged: Any, labels: tuple[str, ...]) -> int:
        s = self._schema
        cur = con.cursor()
        try:
            cur.execute(f"SET LOCAL statement_timeout = {int(self.statement_timeout * 1000)}")
            cur.execute("SET LOCAL idle_in_transaction_session_timeout = 0")
        finally:
            cur.close()
        self.lock_schema(con)
        self._ensure_tables(con, labels, record.arflow_version)
        (previous,) = fetch_rows(con, f"SELECT max(attempt) FROM {s}.runs WHERE run_id = $1", (record.run_id,))[0]
        attempt = int(previous or 0) + 1
        self._check_jump(con, record)
        held = record.held
        untouched = ("series_status", "forecasts", "accuracy") if held else ()
        keep_vetted = record.on_failure == "keep-previous"
        for table in (*RUN_TABLES, "runs"):
            if table in untouched or (table == "forecasts" and keep_vetted):
                continue
            column = "recorded_by" if table == "accuracy" else "run_id"
            execute(con, f"DELETE FROM {s}.{quote(table)} WHERE {quote(column)} = $1", (record.run_id,))
        if not held:
            execute(con, f"DELETE FROM {s}.vintages WHERE job = $1 AND as_of = $2", (record.job, record.as_of))
        columns = table_columns(con, self.layout.schema)
        for table in RUN_TABLES:
            if table in untouched or table == "series_status":
                continue  # series_status is written from the loaded models rows
            if table == "models":
                self._load(con, table, staged, record, columns)
                if not held:
                    self._insert_status(con, staged, record)
                    fault_point("series_status")
            elif table == "forecasts":
                if keep_vetted:  # uses this attempt's models rows, loaded above
                    self._delete_forecasts_keeping_vetted(con, record)
                self._load(con, table, staged, record, columns)
            elif table == "accuracy":
                self._record_accuracy(con, staged, record, columns)
            else:
                self._load(con, table, staged, record, columns)
            fault_point(table)
        self._insert_run(con, record, attempt, columns)
        fault_point("runs")
        if not held:
            self.insert_rows(con, "vintages", {
                "job": [record.job], "as_of": [record.as_of], "run_id": [record.run_id], "attempt": [attempt],
                "published_at": [_utcnow()],
            }, columns)
            execute(con, f"DELETE FROM {s}.job_policy WHERE job = $1", (record.job,))
            self.insert_rows(con, "job_policy", {
                "job": [record.job], "frequency": [record.frequency], "stale_after_periods": [record.stale_after_periods],
            }, columns)
        fault_point("vintages")
        self._ensure_views(con, columns)
        return attempt

    def lock_schema(self, con: Any) -> None:
        """The schema's advisory lock (held to the end of the transaction): wait up to ``lock_wait`` seconds."""
        deadline = time.monotonic() + self.lock_wait
        sql = "SELECT pg_try_advisory_xact_lock($1::integer, hashtext($2))"
        while True:
            (got,) = fetch_rows(con, sql, (LOCK_CLASS, self.layout.schema))[0]
            if got:
                return
            if time.monotonic() >= deadline:
                break
            time.sleep(min(0.2, max(0.0, deadline - time.monotonic())))
        holder = fetch_rows(
            con,
            "SELECT l.pid, a.application_name, a.usename FROM pg_locks AS l LEFT JOIN pg_stat_activity AS a ON a.pid = l.pid "
            "WHERE l.locktype = 'advisory' AND l.granted AND l.classid::bigint = ($1::bigint & 4294967295) "
            "AND l.objid::bigint = (hashtext($2)::bigint & 4294967295) LIMIT 1",
            (LOCK_CLASS, self.layout.schema),
        )
        who = f"server process {holder[0][0]}" + (f", role {holder[0][2]}" if holder and holder[0][2] else "") if holder else "another session"
        raise PublishError(
            f"another arflow run is publishing to {self._where()} ({who}); waited publish.lock_wait_seconds = "
            f"{self.lock_wait:g}; nothing was published by this run, retry when that run finishes"
        )

    def _check_schema(self, con: Any, present: dict[str, dict[str, str]]) -> tuple[list[str], list[tuple[str, str, str]]]:
        """The layout and ownership checks of the DuckDB target, on PostgreSQL's catalogue."""
        layout = self.layout
        where = self._where()
        status = present.get("series_status")
        if status is not None:
            keys = [c for c in status if c not in STATUS_FIXED]
            period_type = _PERIOD_TYPES.get(status.get("as_of", ""), status.get("as_of", "?"))
            check_layout_match(where, keys, period_type, layout)
        expected = {t: [(c, formatted(typ)) for c, typ in cols] for t, cols in expected_columns(layout).items()}
        recorded: dict[str, set[str]] = {}
        if MARKER_TABLE in present:
            rows = fetch_rows(con, f"SELECT table_name, array_to_string(columns, ',') FROM {self._schema}.{MARKER_TABLE}")
            recorded = {str(t).lower(): set(str(c).split(",")) for t, c in rows}
        return check_owned_tables(where, DDL_FILES, expected, present, recorded, _LEVEL_TYPES)

    def _ensure_tables(self, con: Any, labels: tuple[str, ...], version: str) -> None:
        self._version = version
        s = self._schema
        present = table_columns(con, self.layout.schema)
        if rename_old_columns(con, self.layout.schema, present):
            present = table_columns(con, self.layout.schema)
        missing, new_columns = self._check_schema(con, present)
        execute(con, f"CREATE SCHEMA IF NOT EXISTS {s}")
        execute(con, render_pg_sql(MARKER_FILE, self.layout))
        marked = {str(r[0]) for r in fetch_rows(con, f"SELECT table_name FROM {s}.{MARKER_TABLE}")}
        for name in DDL_FILES:
            if name in missing:
                execute(con, render_pg_sql(name, self.layout))
        for table, column, kind in new_columns:
            execute(con, f"ALTER TABLE {s}.{quote(table)} ADD COLUMN {quote(column)} {kind}")
        expected = expected_columns(self.layout)
        now = _utcnow()
        for name in DDL_FILES:
            cols = ",".join(c.lower() for c, _ in expected[name])
            if name in missing or name not in marked:
                execute(con, f"INSERT INTO {s}.{MARKER_TABLE} VALUES ($1, $2, 'arflow', $3, string_to_array($4, ','), $5, "
                           "string_to_array($6, ','))",
                      (name, now, self._version, ",".join(self.layout.keys), self.layout.period_type, cols))
            elif any(t == name for t, _, _ in new_columns):
                execute(con, f"UPDATE {s}.{MARKER_TABLE} SET columns = string_to_array($1, ',') WHERE table_name = $2", (cols, name))
        present = table_columns(con, self.layout.schema)
        check_coverage_levels(self._where(), present.get("forecasts", {}), labels)
        for table, prefixes in COVERAGE_COLUMNS.items():
            have = present.get(table, {})
            kind = "boolean" if table == "accuracy" else "double precision"
            for label in labels:
                for prefix in prefixes:
                    col = f"{prefix}_{label}"
                    if col not in have:
                        execute(con, f"ALTER TABLE {s}.{quote(table)} ADD COLUMN {quote(col)} {kind}")

    def _check_jump(self, con: Any, record: RunRecord) -> None:
        """The far-ahead guard again, inside the transaction (the job checked it before fitting)."""
        if record.jump_limit is None:
            return
        (latest,) = fetch_rows(con, f"SELECT max(as_of) FROM {self._schema}.vintages WHERE job = $1", (record.job,))[0]
        check_jump(record, latest)

    # -- rows ----------------------------------------------------------------------
    def _load(self, con: Any, table: str, staged: Any, record: RunRecord, columns: dict[str, dict[str, str]]) -> None:
        """Bulk-load the staged rows of ``table`` (one binary COPY per staged part)."""
        have = columns[table]
        for part in _parts(staged, table):
            names = [c for c in part.column_names if c in have and c != "run_id"]
            if not names or part.num_rows == 0:
                continue
            data = part.select(names)
            data = data.append_column("run_id", pa.array([record.run_id] * data.num_rows, pa.string()))
            self._send(con, table, data, have)

    def _send(self, con: Any, table: str, data: pa.Table, have: dict[str, str]) -> None:
        fields = [pa.field(n, arrow_type(have[n])) for n in data.column_names]
        try:
            data = data.cast(pa.schema(fields))
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError) as exc:
            raise PublishError(f"the run's {table} rows do not fit {self._where()} ({exc}); nothing was published") from None
        cur = con.cursor()
        try:
            cur.adbc_ingest(table, data, mode="append", db_schema_name=self.layout.schema)
        finally:
            cur.close()

    def insert_rows(self, con: Any, table: str, values: dict[str, list[Any]], columns: dict[str, dict[str, str]]) -> None:
        have = columns[table]
        fields = [pa.field(n, arrow_type(have[n])) for n in values]
        self._send(con, table, pa.table({n: pa.array(v, f.type) for (n, v), f in zip(values.items(), fields)}), have)

    def _insert_status(self, con: Any, staged: Any, record: RunRecord) -> None:
        """series_status from the loaded models rows; failed_gates and warnings (not in models) from the staged rows."""
        s = self._schema
        keys = [quote(k) for k in self.layout.keys]
        key_list = ", ".join(keys)
        extra_cols, extra_sel, join = "", "", ""
        if self._load_status_extras(con, staged):
            on = " AND ".join(f"x.{k} = m.{k}" for k in keys)
            extra_cols, extra_sel = ", failed_gates, warnings", ", x.failed_gates::jsonb, x.warnings"
            join = f" LEFT JOIN arflow_status_extras AS x ON {on}"
        execute(
            con,
            f"INSERT INTO {s}.series_status (run_id, job, as_of, {key_list}, decision, on_failure, reasons{extra_cols}) "
            f"SELECT m.run_id, $2, $3::{pg_type(self.layout.period_type)}, {', '.join('m.' + k for k in keys)}, m.decision, "
            f"$4, m.reasons{extra_sel} FROM {s}.models AS m{join} WHERE m.run_id = $1",
            (record.run_id, record.job, record.as_of, record.on_failure),
        )

    def _load_status_extras(self, con: Any, staged: Any) -> bool:
        """Stage each series' failed gates (as JSON text) and warnings in a temporary table; False when none."""
        parts = [p for p in _parts(staged, "models") if "failed_gates" in p.column_names or "warnings" in p.column_names]
        if not parts:
            return False
        keys = [quote(k) for k in self.layout.keys]
        key_defs = ", ".join(f"{k} {pg_type(t)}" for k, t in zip(keys, self.layout.key_types))
        execute(con, "DROP TABLE IF EXISTS arflow_status_extras")
        execute(con, f"CREATE TEMPORARY TABLE arflow_status_extras ({key_defs}, failed_gates text, warnings text[]) "
                     "ON COMMIT DROP")
        types = {k: arrow_type(formatted(t)) for k, t in zip(self.layout.keys, self.layout.key_types)}
        cur = con.cursor()
        try:
            for part in parts:
                n = part.num_rows
                gates = (failed_gates_json(part.column("failed_gates")) if "failed_gates" in part.column_names
                         else pa.nulls(n, pa.string()))
                warnings = part.column("warnings") if "warnings" in part.column_names else pa.nulls(n, pa.list_(pa.string()))
                data = pa.table({**{k: part.column(k).cast(types[k]) for k in self.layout.keys},
                                 "failed_gates": gates, "warnings": warnings.cast(pa.list_(pa.string()))})
                cur.adbc_ingest("arflow_status_extras", data, mode="append", temporary=True)
        finally:
            cur.close()
        return True

    def _delete_forecasts_keeping_vetted(self, con: Any, record: RunRecord) -> None:
        """An earlier attempt's forecasts go, except those of series this attempt quarantines (keep-previous)."""
        s = self._schema
        same = " AND ".join(f"m.{quote(k)} = f.{quote(k)}" for k in self.layout.keys)
        execute(
            con,
            f"DELETE FROM {s}.forecasts AS f WHERE f.run_id = $1 AND NOT EXISTS "
            f"(SELECT 1 FROM {s}.models AS m WHERE m.run_id = $1 AND m.decision <> 'published' AND {same})",
            (record.run_id,),
        )

    def _record_accuracy(self, con: Any, staged: Any, record: RunRecord, columns: dict[str, dict[str, str]]) -> None:
        """Score earlier published vintages of this job against the actuals this run saw (once each)."""
        s = self._schema
        earlier = fetch_rows(con, f"SELECT 1 FROM {s}.vintages WHERE job = $1 AND as_of < $2 LIMIT 1", (record.job, record.as_of))
        parts = list(_parts(staged, "actuals"))
        if not earlier or not parts:
            return
        keys = [quote(k) for k in self.layout.keys]
        key_defs = ", ".join(f"{k} {pg_type(t)}" for k, t in zip(keys, self.layout.key_types))
        period_t = pg_type(self.layout.period_type)
        execute(con, f"CREATE TEMPORARY TABLE arflow_actuals ({key_defs}, period {period_t}, value double precision) ON COMMIT DROP")
        temp = {k: formatted(t) for k, t in zip(self.layout.keys, self.layout.key_types)}
        temp.update(period=formatted(self.layout.period_type), value="double precision")
        cur = con.cursor()
        try:
            for part in parts:
                data = part.select([*self.layout.keys, "period", "value"])
                data = data.cast(pa.schema([pa.field(n, arrow_type(temp[n])) for n in data.column_names]))
                cur.adbc_ingest("arflow_actuals", data, mode="append", temporary=True)
        finally:
            cur.close()
        on = " AND ".join(f"a.{k} = f.{k}" for k in keys)
        same = " AND ".join(f"x.{k} = f.{k}" for k in keys)
        fc = columns["forecasts"]
        labels = [lab for lab in sorted(c[len("covered_"):] for c in columns["accuracy"] if c.startswith("covered_"))
                  if f"lower_{lab}" in fc and f"upper_{lab}" in fc]
        covered_cols = "".join(f", {quote('covered_' + lab)}" for lab in labels)
        covered = "".join(
            f", CASE WHEN f.{quote('lower_' + lab)} IS NULL THEN NULL "
            f"ELSE a.value BETWEEN f.{quote('lower_' + lab)} AND f.{quote('upper_' + lab)} END"
            for lab in labels
        )
        execute(
            con,
            f"""
            INSERT INTO {s}.accuracy (forecast_run_id, job, {', '.join(keys)}, period, step, forecast, actual, error, abs_pct_error,
                                      recorded_by{covered_cols})
            SELECT f.run_id, v.job, {', '.join('f.' + k for k in keys)}, f.period, f.step, f.forecast,
                   a.value, a.value - f.forecast,
                   CASE WHEN a.value <> 0 THEN abs((a.value - f.forecast) / a.value) END,
                   $1{covered}
            FROM {s}.forecasts AS f
            JOIN {s}.vintages AS v ON v.run_id = f.run_id AND v.job = $2 AND v.as_of < $3
            JOIN arflow_actuals AS a ON {on} AND a.period = f.period
            WHERE a.value IS NOT NULL AND a.value NOT IN ('NaN'::float8, 'Infinity'::float8, '-Infinity'::float8)
              AND NOT EXISTS (
                  SELECT 1 FROM {s}.accuracy AS x WHERE x.forecast_run_id = f.run_id AND x.period = f.period AND {same}
              )
            """,
            (record.run_id, record.job, record.as_of),
        )

    def _insert_run(self, con: Any, record: RunRecord, attempt: int, columns: dict[str, dict[str, str]]) -> None:
        values = {"run_id": record.run_id, **runs_row(record, attempt)}
        self.insert_rows(con, "runs", {k: [v] for k, v in values.items()}, columns)

    def _ensure_views(self, con: Any, columns: dict[str, dict[str, str]]) -> None:
        """(Re)create the views when their text changed (new coverage columns): a no-op on most runs.

        Columns are only ever added at the end, so ``CREATE OR REPLACE`` keeps
        the grants on the views; only a view whose columns moved is dropped
        and recreated (default privileges then give dashboards their SELECT).
        """
        forecast_cols = tuple(c for c in columns["forecasts"] if c != "run_id")
        labels = tuple(sorted(c[len("covered_"):] for c in columns["accuracy"] if c.startswith("covered_")))
        for name, sql in (
            (VIEW_FILE, render_pg_sql(VIEW_FILE, self.layout, forecast_columns=forecast_cols)),
            (ACCURACY_VIEW, render_pg_sql(ACCURACY_VIEW, self.layout, labels)),
            (STATUS_VIEW, render_pg_sql(STATUS_VIEW, self.layout)),
        ):
            stamp = "arflow " + hashlib.sha256(sql.encode()).hexdigest()[:16]
            found = fetch_rows(
                con,
                "SELECT obj_description(c.oid, 'pg_class') FROM pg_class AS c JOIN pg_namespace AS n ON n.oid = c.relnamespace "
                "WHERE n.nspname = $1 AND c.relname = $2 AND c.relkind = 'v'",
                (self.layout.schema, name),
            )
            if found and found[0][0] == stamp:
                continue
            cur = con.cursor()
            try:
                cur.execute("SAVEPOINT arflow_view")
                try:
                    cur.execute(sql)
                except driver_errors() as exc:
                    if sqlstate(exc) != "42P16":  # the view's columns changed place: drop and create
                        raise
                    cur.execute("ROLLBACK TO SAVEPOINT arflow_view")
                    cur.execute(f"DROP VIEW {self._schema}.{quote(name)}")
                    cur.execute(sql)
                cur.execute("RELEASE SAVEPOINT arflow_view")
                cur.execute(f"COMMENT ON VIEW {self._schema}.{quote(name)} IS '{stamp}'")
            finally:
                cur.close()


class PostgresPublication:
    """A run written inside an open transaction: :meth:`commit` makes it visible, :meth:`abort` drops it."""

    def __init__(self, target: PostgresTarget, con: Any, guard: _Interruptible, attempt: int) -> None:
        self._target = target
        self._con = con
        self._guard = guard
        self.attempt = attempt
        self._done = False

    def commit(self) -> int:
        """COMMIT; returns the vintage's attempt number."""
        if self._done:
            raise PublishError("this publication was already committed or aborted")
        hold_signals()  # from here a stop signal waits: a committed run exits with its real status
        try:
            self._con.commit()
        except driver_errors() as exc:
            release_signals()
            self.abort()
            if lost_connection(exc):
                raise PublishError(
                    f"the connection to {self._target.address.describe()} was lost at COMMIT ({detail(exc)}); the run is "
                    "either fully published or not at all: check the runs table (arflow vintages) and re-run if it is missing"
                ) from None
            raise self._target.error_for(exc, "commit to") from None
        except BaseException:
            release_signals()
            self.abort()
            raise
        self._finish(rollback=False)
        fault_point("commit")
        return self.attempt

    def abort(self) -> None:
        """Roll back (idempotent; a no-op after commit)."""
        if self._done:
            return
        self._finish(rollback=True)

    def _finish(self, rollback: bool) -> None:
        self._done = True
        unwatch_connection(self._guard)
        if rollback:
            rollback_close(self._con)
        else:
            _close(self._con)


# -- helpers ---------------------------------------------------------------------------

def _labels_of(record: RunRecord) -> tuple[str, ...]:
    from ..settings import coverage_label

    return tuple(coverage_label(c) for c in record.coverage)


def _parts(staged: Any, table: str) -> Iterator[pa.Table]:
    """The staged rows of ``table``, one Arrow table per staged part (bounded memory)."""
    if hasattr(staged, "files"):
        for f in staged.files(table):
            yield pq.read_table(f)
        return
    if hasattr(staged, "batches"):
        for batch in staged.batches(table):
            yield pa.Table.from_batches([batch]) if isinstance(batch, pa.RecordBatch) else batch
        return
    frame = staged.get(table) if isinstance(staged, dict) else None  # frames in memory (tests, the library call)
    if frame is not None and getattr(frame, "height", 0):
        yield frame.to_arrow()


def table_columns(con: Any, schema: str) -> dict[str, dict[str, str]]:
    """table -> {column: format_type} of the ordinary tables in ``schema`` (in column order)."""
    rows = fetch_rows(
        con,
        "SELECT c.relname, a.attname, format_type(a.atttypid, a.atttypmod) FROM pg_attribute AS a "
        "JOIN pg_class AS c ON c.oid = a.attrelid JOIN pg_namespace AS n ON n.oid = c.relnamespace "
        "WHERE n.nspname = $1 AND c.relkind IN ('r', 'p') AND a.attnum > 0 AND NOT a.attisdropped "
        "ORDER BY c.relname, a.attnum",
        (schema,),
    )
    out: dict[str, dict[str, str]] = {}
    for table, column, typ in rows:
        out.setdefault(str(table), {})[str(column)] = str(typ)
    return out


def execute(con: Any, sql: str, params: tuple[Any, ...] | None = None) -> None:
    cur = con.cursor()
    try:
        cur.execute(sql, params) if params else cur.execute(sql)
    finally:
        cur.close()


def fetch_rows(con: Any, sql: str, params: tuple[Any, ...] | None = None) -> list[tuple[Any, ...]]:
    cur = con.cursor()
    try:
        cur.execute(sql, params) if params else cur.execute(sql)
        table = cur.fetch_arrow_table()
    finally:
        cur.close()
    cols = [c.to_pylist() for c in table.columns]
    return list(zip(*cols)) if cols else []


def _close(con: Any) -> None:
    try:
        con.close()
    except Exception:  # noqa: BLE001 - a dropped connection has nothing left to close
        pass


def rollback_close(con: Any) -> None:
    try:
        con.rollback()
    except Exception:  # noqa: BLE001
        pass
    _close(con)


def _utcnow() -> dt.datetime:
    return dt.datetime.now(dt.timezone.utc).replace(tzinfo=None)


def failed_gates_json(column: pa.ChunkedArray | pa.Array) -> pa.Array:
    """A list-of-struct column as JSON text per row (jsonb on the server); non-finite numbers become null."""
    import json
    import math

    def clean(value: Any) -> Any:
        return None if isinstance(value, float) and not math.isfinite(value) else value

    out: list[str | None] = []
    for row in column.to_pylist():
        if row is None:
            out.append(None)
        elif not row:
            out.append("[]")
        else:
            out.append(json.dumps([None if g is None else {k: clean(v) for k, v in g.items()} for g in row],
                                  allow_nan=False))
    return pa.array(out, pa.string())


def rename_old_columns(con: Any, schema: str, present: dict[str, dict[str, str]]) -> list[str]:
    """Rename, in place, the columns an earlier release named otherwise (inside the publishing transaction)."""
    done: list[str] = []
    s = quote(schema)
    for table, pairs in RENAMED_COLUMNS.items():
        have = list(present.get(table, {}))
        for old, new in pairs:
            for column in have:
                if column == old or (old.endswith("_") and column.startswith(old)):
                    target = new + column[len(old):]
                    if target in have:
                        continue
                    execute(con, f"ALTER TABLE {s}.{quote(table)} RENAME COLUMN {quote(column)} TO {quote(target)}")
                    if MARKER_TABLE in present:
                        execute(con, f"UPDATE {s}.{MARKER_TABLE} SET columns = array_replace(columns, $1, $2) "
                                     "WHERE table_name = $3", (column, target, table))
                    done.append(f"{table}.{column} -> {target}")
    return done
