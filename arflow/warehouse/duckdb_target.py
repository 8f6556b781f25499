"""The DuckDB warehouse target: one run published in a single transaction.

Tables are created from the ``sql/duckdb`` DDL files on first use. A run's
rows go in with bulk inserts from the staged Parquet parts between ``BEGIN``
and ``COMMIT``: :meth:`DuckDBTarget.prepare` does everything up to ``COMMIT``
on an open transaction, the returned :class:`DuckDBPending` commits or rolls
back. Any error (or a kill) before ``COMMIT`` leaves the warehouse exactly as
it was.

The run id is deterministic, ``"<job>@<as_of>"``: re-running a vintage deletes
and rewrites that vintage's rows inside the same transaction (``runs.attempt``
counts the attempts), so a repeated run gives identical published rows and
no duplicates, while other vintages stay for audit.
"""

from __future__ import annotations

import datetime as dt
import os
import re
import tempfile
from importlib import resources
from pathlib import Path
from string import Template
from typing import Any

import duckdb

from ..errors import PublishError, one_line
from ..results import ACTUALS, RUN_TABLES, SERIES_STATUS
from ..runtime import fault_point, hold_signals, release_signals, unwatch_connection, watch_connection
from ..settings import coverage_label
from ..version import arflow_version
from .contract import (
    COVERAGE_COLUMNS, DATABASE_ORDER, RENAMED_COLUMNS, RunRecord, TableLayout, check_coverage_levels, check_jump,
    check_layout_match, check_owned_tables, column_difference, runs_row,
)
from .duckdb_source import engine_config, is_lock_error, lock_message, open_duckdb
from .identifiers import key_fragments, quote
from .stage import StagedRun

#: DDL files, in creation order: the run log, the vintages, the run tables, the expiry policy, the removal audit
DDL_FILES = ("runs", "vintages", *RUN_TABLES, "job_policy", "vintage_removals")
VIEW_FILE = "published_forecasts"
ACCURACY_VIEW = "accuracy_by_horizon"
STATUS_VIEW = "latest_series_status"
_STATUS_FIXED = ("run_id", "job", "as_of", "decision", "on_failure", "reasons", "failed_gates", "warnings")


def load_sql(name: str) -> str:
    """Text of ``sql/duckdb/<name>.sql`` (DuckDB dialect) shipped as package data ``arflow.sql.duckdb``."""
    return resources.files("arflow.sql.duckdb").joinpath(f"{name}.sql").read_text(encoding="utf-8")


def render_sql(name: str, layout: TableLayout, coverage_labels: tuple[str, ...] = ()) -> str:
    """Fill a DDL template with quoted identifiers and whitelisted types only."""
    keys = [quote(k) for k in layout.keys]
    hit_rates = "".join(
        f",\n       avg(CASE WHEN {quote('covered_' + lab)} THEN 1.0 ELSE 0.0 END) AS {quote('hit_rate_' + lab)}"
        for lab in coverage_labels
    )
    return Template(load_sql(name)).substitute(
        hit_rates=hit_rates,
        schema=quote(layout.schema),
        period_type=layout.period_type,
        key_defs=",\n    ".join(f"{k} {t} NOT NULL" for k, t in zip(keys, layout.key_types)),
        age=_age_sql(layout.period_type),
        **key_fragments(keys),
    )


def _age_sql(period_type: str) -> str:
    """SQL for whole periods from a kept vintage (``v.as_of``) to the job's latest vintage."""
    if period_type == "BIGINT":
        return "(v.arflow_latest__ - v.as_of)"
    diff = "date_diff('{unit}', v.as_of, v.arflow_latest__)"
    return (
        "CASE v.arflow_frequency__ "
        + " ".join(f"WHEN '{u}' THEN {diff.format(unit=u)}" for u in ("day", "month", "quarter", "year"))
        + f" WHEN 'week' THEN {diff.format(unit='day')} // 7 END"
    )


def open_target(database: Path, read_only: bool = False) -> duckdb.DuckDBPyConnection:
    if not database.parent.is_dir():
        raise PublishError(f"folder {database.parent} of publish.database does not exist; create it or fix the path")
    try:
        return open_duckdb(str(database), read_only=read_only, config=engine_config())
    except duckdb.Error as exc:
        if is_lock_error(exc):
            raise PublishError(f"target {lock_message(database)}") from None
        raise PublishError(f"cannot open target database {database} ({one_line(exc)}); check publish.database") from None


def _existing_layout(con: duckdb.DuckDBPyConnection, schema: str) -> tuple[list[str], str] | None:
    rows = con.execute(
        "SELECT column_name, data_type FROM information_schema.columns "
        "WHERE lower(table_schema) = lower(?) AND table_name = 'series_status' ORDER BY ordinal_position",
        [schema],
    ).fetchall()
    if not rows:
        return None
    keys = [c for c, _ in rows if c not in _STATUS_FIXED]
    period_type = next(t for c, t in rows if c == "as_of")
    return keys, str(period_type).upper()


def check_layout(con: duckdb.DuckDBPyConnection, layout: TableLayout, database: Path) -> None:
    """Refuse to mix jobs with different keys or period types in one schema."""
    existing = _existing_layout(con, layout.schema)
    if existing is not None:
        check_layout_match(f"schema {layout.schema} in {database}", *existing, layout)


def check_target(database: Path, layout: TableLayout) -> str:
    """Read-only look at the target for ``validate`` and dry runs; returns a status note.

    Raises :class:`PublishError` when a run could not write there (missing or
    read-only folder or file) or the schema is not one arflow can write into.
    """
    check_writable(database)
    if not database.exists():
        return "will be created"
    try:
        # the source's settings: a source in the same file is then the same database instance
        con = open_duckdb(str(database), read_only=True, config=engine_config())
    except duckdb.Error as exc:
        if is_lock_error(exc):
            return f"in use by another process right now (not checked: {_lock_holder(exc)})"
        raise PublishError(f"cannot open target database {database} ({one_line(exc)}); check publish.database") from None
    try:
        check_layout(con, layout, database)
        check_ownership(con, layout, database)
        return "tables exist" if _existing_layout(con, layout.schema) else "tables will be created"
    finally:
        con.close()


# -- ownership of the target schema -------------------------------------------------------

#: The marker table: one row per table arflow created in the schema (``sql/layout_marker.sql``).
MARKER_TABLE = "arflow_tables"
MARKER_FILE = "layout_marker"
#: At most this many coverage levels: each adds columns to three tables for good.
#: Columns of the run's staged frames that are not table columns (``actuals`` carries keys, period, value).
_STAGED_COLUMNS = ("period", "value")
_PROBE_SCHEMA = "arflow_probe"
_PROBE_KEY = "arflow_probe_key"
_COVERAGE_TYPES = {"forecasts": "DOUBLE", "backtests": "DOUBLE", "accuracy": "BOOLEAN"}


def _expected_columns(layout: TableLayout) -> dict[str, list[tuple[str, str]]]:
    """table -> [(column, type)] as the DDL files create them for ``layout`` (an in-memory probe)."""
    return _expected_cached(layout.keys, layout.key_types, layout.period_type)


_EXPECTED: dict[tuple, dict[str, list[tuple[str, str]]]] = {}


def _expected_cached(keys: tuple[str, ...], key_types: tuple[str, ...], period_type: str) -> dict[str, list[tuple[str, str]]]:
    cache_key = (keys, key_types, period_type)
    if cache_key not in _EXPECTED:
        probe = TableLayout(_PROBE_SCHEMA, keys, key_types, period_type)
        con = duckdb.connect(":memory:")
        try:
            con.execute(f"CREATE SCHEMA {quote(_PROBE_SCHEMA)}")
            for name in (*DDL_FILES, MARKER_FILE):
                con.execute(render_sql(name, probe))
            con.execute(render_sql(VIEW_FILE, probe))
            con.execute(render_sql(ACCURACY_VIEW, probe))
            con.execute(render_sql(STATUS_VIEW, probe))
            rows = con.execute(
                "SELECT table_name, column_name, data_type FROM information_schema.columns "
                "WHERE table_schema = ? ORDER BY table_name, ordinal_position",
                [_PROBE_SCHEMA],
            ).fetchall()
        finally:
            con.close()
        out: dict[str, list[tuple[str, str]]] = {}
        for table, column, typ in rows:
            out.setdefault(str(table), []).append((str(column), str(typ).upper()))
        _EXPECTED[cache_key] = out
    return _EXPECTED[cache_key]


def expected_columns(layout: TableLayout) -> dict[str, list[tuple[str, str]]]:
    """table -> [(column, DuckDB type)] as arflow defines it for ``layout`` (other targets map the types)."""
    return _expected_columns(layout)


def output_columns() -> frozenset[str]:
    """Lower-cased names of every column of arflow's tables and views, read off the DDL files.

    A key column may not use one of these names (nor a coverage prefix, see
    :func:`output_column_prefixes`): the key columns are copied into every result table.
    """
    tables = _expected_cached((_PROBE_KEY,), ("VARCHAR",), "DATE")
    names = {c.lower() for t, cols in tables.items() if t != MARKER_TABLE for c, _ in cols if c != _PROBE_KEY}
    return frozenset(names | set(_STAGED_COLUMNS))


def output_column_prefixes() -> tuple[str, ...]:
    """Prefixes of the per-coverage-level columns (``lower_80``, ``hit_rate_95``, ``covered_80``, ...)."""
    return tuple(f"{p}_" for prefixes in COVERAGE_COLUMNS.values() for p in prefixes) + ("coverage_",)


def _table_columns(con: duckdb.DuckDBPyConnection, schema: str) -> dict[str, dict[str, str]]:
    """table (lower-cased) -> {column (lower-cased): type} of the base tables in ``schema`` (any case)."""
    rows = con.execute(
        "SELECT c.table_name, c.column_name, c.data_type FROM information_schema.columns AS c "
        "JOIN information_schema.tables AS t ON t.table_schema = c.table_schema AND t.table_name = c.table_name "
        "WHERE lower(c.table_schema) = lower(?) AND t.table_type = 'BASE TABLE'",
        [schema],
    ).fetchall()
    out: dict[str, dict[str, str]] = {}
    for table, column, typ in rows:
        out.setdefault(str(table).lower(), {})[str(column).lower()] = str(typ).upper()
    return out


def check_ownership(
    con: duckdb.DuckDBPyConnection, layout: TableLayout, database: Path
) -> tuple[list[str], list[tuple[str, str, str]]]:
    """Refuse a schema whose arflow-named tables arflow did not create, or whose columns were altered.

    Returns the arflow tables still to be created and the (table, column,
    type) columns this arflow version defines that the schema's tables never
    had (to be added). A schema written before the marker table existed is
    adopted when every table has exactly the columns arflow would create.
    """
    expected = _expected_columns(layout)
    present = _table_columns(con, layout.schema)
    ours = [t for t in DDL_FILES if t in present]
    recorded: dict[str, set[str]] = {}
    if MARKER_TABLE in present:
        recorded = {str(t).lower(): {str(c).lower() for c in cols} for t, cols in con.execute(
            f"SELECT table_name, columns FROM {quote(layout.schema)}.{MARKER_TABLE}").fetchall()}
    elif ours and _all_match(ours, expected, present):
        recorded = {t: set(present[t]) for t in ours}
    return check_owned_tables(f"schema {layout.schema} in {database}", DDL_FILES, expected, present, recorded, _COVERAGE_TYPES)


def rename_old_columns(con: duckdb.DuckDBPyConnection, schema: str) -> list[str]:
    """Rename, in place, the columns an earlier release named otherwise (inside the publishing transaction)."""
    done: list[str] = []
    s = quote(schema)
    marker = con.execute(
        "SELECT count(*) FROM information_schema.tables WHERE lower(table_schema) = lower(?) AND table_name = ?",
        [schema, MARKER_TABLE]).fetchone()[0]
    for table, pairs in RENAMED_COLUMNS.items():
        have = [r[0] for r in con.execute(
            "SELECT column_name FROM information_schema.columns WHERE lower(table_schema) = lower(?) AND table_name = ?",
            [schema, table]).fetchall()]
        for old, new in pairs:
            for column in have:
                if column == old or (old.endswith("_") and column.startswith(old)):
                    target = new + column[len(old):]
                    if target in have:
                        continue
                    con.execute(f"ALTER TABLE {s}.{quote(table)} RENAME COLUMN {quote(column)} TO {quote(target)}")
                    if marker:
                        con.execute(f"UPDATE {s}.{MARKER_TABLE} SET columns = list_transform(columns, lambda c: "
                                    f"CASE WHEN c = ? THEN ? ELSE c END) WHERE table_name = ?", [column, target, table])
                    done.append(f"{table}.{column} -> {target}")
    return done


def _all_match(tables: list[str], expected: dict, present: dict) -> bool:
    return len(tables) == len(DDL_FILES) and all(
        column_difference(expected[t], present[t], t, None, _COVERAGE_TYPES) == (None, []) for t in tables)


def _lock_holder(exc: BaseException) -> str:
    """'held by <program> (PID n)' from DuckDB's lock error, or a generic phrase."""
    m = re.search(r"lock is held in (.+?) \(PID (\d+)\)", str(exc))
    return f"held by {m.group(1)} (PID {m.group(2)})" if m else "held by another process"


def check_writable(database: Path) -> None:
    """Raise a one-line :class:`PublishError` when a run could not write ``database``."""
    folder = database.parent
    if not folder.is_dir():
        raise PublishError(f"folder {folder} of publish.database does not exist; create it or fix the path")
    if database.exists() and not database.is_file():
        raise PublishError(f"publish.database {database} is not a file; fix the path")
    if database.exists() and not os.access(database, os.W_OK):
        raise PublishError(f"target database {database} is read-only; make it writable or publish elsewhere")
    try:  # DuckDB writes a .wal file next to the database
        fd, probe = tempfile.mkstemp(prefix=".arflow-write-probe-", dir=folder)
        os.close(fd)
        os.unlink(probe)
    except OSError as exc:
        raise PublishError(
            f"folder {folder} of publish.database is not writable ({exc.strerror or exc}); "
            "make it writable or publish elsewhere"
        ) from None


def preflight_target(database: Path) -> None:
    """Before reading or fitting anything: the target is writable and no other program holds it.

    Opens the database for writing for a moment (and closes it), so a program
    holding it (a dashboard, a notebook, another run) is named now rather than
    after all the compute. The schema itself is checked by :func:`check_target`.
    """
    check_writable(database)
    if not database.exists():
        return
    try:
        duckdb.connect(str(database), config=engine_config()).close()
    except duckdb.Error as exc:
        if is_lock_error(exc):
            raise PublishError(
                f"target database {database} is in use by another process ({_lock_holder(exc)}: a dashboard, "
                "a notebook or another arflow run); close it or retry when it finishes; nothing was computed"
            ) from None
        raise PublishError(f"cannot open target database {database} ({one_line(exc)}); check publish.database") from None


class DuckDBTarget:
    """Publishes runs to the DuckDB file ``database`` under ``layout.schema`` (``[publish] database``)."""

    commit_order = DATABASE_ORDER

    def __init__(self, database: Path, layout: TableLayout) -> None:
        self.database = Path(database)
        self.layout = layout
        self._schema = quote(layout.schema)

    @classmethod
    def from_spec(cls, publish: Any, layout: TableLayout) -> "DuckDBTarget":
        """The target of ``[publish] database`` (``publish``: a ``PublishSpec``)."""
        return cls(publish.database, layout)

    def describe(self) -> str:
        return f"{self.database} (schema {self.layout.schema}, view {self.layout.schema}.published_forecasts)"

    def preflight(self) -> None:
        preflight_target(self.database)

    def check_layout(self) -> str:
        return check_target(self.database, self.layout)

    def latest_vintage(self, job: str) -> Any | None:
        """The job's latest vintage in ``vintages`` (None when none, or the file is locked by another process)."""
        if not self.database.exists():
            return None
        try:
            con = open_duckdb(str(self.database), read_only=True)
        except duckdb.Error as exc:
            if is_lock_error(exc):
                return None  # reported by the target checks; the transaction checks the far-ahead guard again
            raise PublishError(f"cannot open target database {self.database} ({one_line(exc)}); check publish.database") from None
        try:
            (n,) = con.execute(
                "SELECT count(*) FROM information_schema.tables WHERE table_schema = ? AND table_name = 'vintages'",
                [self.layout.schema],
            ).fetchone() or (0,)
            if not n:
                return None
            (value,) = con.execute(
                f"SELECT max(as_of) FROM {self._schema}.vintages WHERE job = ?", [job]
            ).fetchone() or (None,)
            return value
        finally:
            con.close()

    def publish(self, record: RunRecord, staged: StagedRun) -> int:
        """:meth:`prepare` and commit in one call; returns the attempt number of this vintage."""
        return self.prepare(record, staged).commit()

    def prepare(self, record: RunRecord, staged: StagedRun) -> "DuckDBPending":
        """Write one run inside an open transaction, everything but ``COMMIT``.

        The run's rows come from the staged Parquet parts; ``actuals`` (keys,
        period, value) let the run record, once, how earlier published vintages
        fared (table ``accuracy``).
        """
        coverage_labels = tuple(coverage_label(c) for c in record.coverage)
        tables = _StagedRelations(staged)
        con = open_target(self.database)
        watch_connection(con)  # a stop signal before COMMIT interrupts the running statement (then rolls back)
        pending = DuckDBPending(self.database, con)
        try:
            con.execute("BEGIN TRANSACTION")
            self._ensure_tables(con, coverage_labels)
            (previous,) = con.execute(
                f"SELECT max(attempt) FROM {self._schema}.runs WHERE run_id = ?", [record.run_id]
            ).fetchone() or (None,)
            pending.attempt = attempt = int(previous or 0) + 1
            self._check_jump(con, record)
            self._delete_attempt(con, tables, record)
            self._insert_tables(con, tables, record, coverage_labels)
            self._insert_run(con, record, attempt)
            fault_point("runs")
            if not record.held:
                con.execute(
                    f"INSERT INTO {self._schema}.vintages VALUES (?, ?, ?, ?, ?)",
                    [record.job, record.as_of, record.run_id, attempt, record.finished_at],
                )
                self._write_policy(con, record)
            fault_point("vintages")
            con.execute(render_sql(VIEW_FILE, self.layout))
            con.execute(render_sql(ACCURACY_VIEW, self.layout, self._labels(con)))
            con.execute(render_sql(STATUS_VIEW, self.layout))
        except BaseException as exc:
            pending.abort()
            if isinstance(exc, duckdb.Error):
                raise pending.failed(exc) from None
            raise
        return pending

    def _untouched(self, record: RunRecord) -> tuple[str, ...]:
        """A held run replaces the vintage's records but not what the view reads (series_status, forecasts)."""
        return (SERIES_STATUS, "forecasts", "accuracy") if record.held else ()

    def _delete_attempt(self, con: duckdb.DuckDBPyConnection, tables: "_StagedRelations", record: RunRecord) -> None:
        """Remove an earlier attempt's rows of this vintage (keep-previous keeps quarantined series' forecasts)."""
        for table in (*RUN_TABLES, "runs"):
            if table in self._untouched(record):
                continue
            if table == "forecasts" and record.on_failure == "keep-previous":
                self._delete_forecasts_keeping_vetted(con, tables, record)
                continue
            column = "recorded_by" if table == "accuracy" else "run_id"
            con.execute(f"DELETE FROM {self._schema}.{quote(table)} WHERE {column} = ?", [record.run_id])
        if not record.held:
            con.execute(f"DELETE FROM {self._schema}.vintages WHERE job = ? AND as_of = ?", [record.job, record.as_of])

    def _insert_tables(
        self, con: duckdb.DuckDBPyConnection, tables: "_StagedRelations", record: RunRecord, coverage_labels: tuple[str, ...]
    ) -> None:
        for table in RUN_TABLES:
            if table in self._untouched(record):
                pass
            elif table == SERIES_STATUS:
                self._insert_status(con, tables, record)
            elif table == "accuracy":
                self._record_accuracy(con, tables, record, coverage_labels)
            else:
                self._insert(con, table, tables, record)
            fault_point(table)

    def _delete_forecasts_keeping_vetted(
        self, con: duckdb.DuckDBPyConnection, tables: "_StagedRelations", record: RunRecord
    ) -> None:
        """Delete an earlier attempt's forecasts of this vintage, except for series this attempt quarantines.

        Under keep-previous those rows stay (the view shows them as stale), so
        a bad re-run never loses a forecast that was vetted.
        """
        s = self._schema
        models = tables.relation(con, "models")
        if models is None:
            con.execute(f"DELETE FROM {s}.forecasts WHERE run_id = ?", [record.run_id])
            return
        same = " AND ".join(f"m.{quote(k)} = {s}.forecasts.{quote(k)}" for k in self.layout.keys)
        con.execute(
            f"DELETE FROM {s}.forecasts WHERE run_id = ? AND NOT EXISTS "
            f"(SELECT 1 FROM {models} AS m WHERE m.decision <> 'published' AND {same})",
            [record.run_id],
        )

    def _check_jump(self, con: duckdb.DuckDBPyConnection, record: RunRecord) -> None:
        """The far-ahead guard again, inside the transaction (the job checked it before fitting)."""
        if record.jump_limit is None:
            return
        (latest,) = con.execute(
            f"SELECT max(as_of) FROM {self._schema}.vintages WHERE job = ?", [record.job]
        ).fetchone() or (None,)
        check_jump(record, latest)

    def _write_policy(self, con: duckdb.DuckDBPyConnection, record: RunRecord) -> None:
        """The job's row of ``job_policy`` (what the view's expiry rule reads)."""
        con.execute(f"DELETE FROM {self._schema}.job_policy WHERE job = ?", [record.job])
        con.execute(
            f"INSERT INTO {self._schema}.job_policy VALUES (?, ?, ?)",
            [record.job, record.frequency, record.stale_after_periods],
        )

    def _ensure_tables(self, con: duckdb.DuckDBPyConnection, coverage_labels: tuple[str, ...]) -> None:
        check_layout(con, self.layout, self.database)
        rename_old_columns(con, self.layout.schema)
        missing, new_columns = check_ownership(con, self.layout, self.database)
        con.execute(f"CREATE SCHEMA IF NOT EXISTS {self._schema}")
        con.execute(render_sql(MARKER_FILE, self.layout))
        marked = {str(r[0]) for r in con.execute(f"SELECT table_name FROM {self._schema}.{MARKER_TABLE}").fetchall()}
        for name in DDL_FILES:
            con.execute(render_sql(name, self.layout))
        for table, column, kind in new_columns:  # defined by this arflow version after the table was made
            con.execute(f"ALTER TABLE {self._schema}.{quote(table)} ADD COLUMN {quote(column)} {kind}")
        expected = _expected_columns(self.layout)
        for name in DDL_FILES:
            columns = [c.lower() for c, _ in expected[name]]
            if name in missing or name not in marked:  # created now, or adopted from a schema that matched exactly
                con.execute(
                    f"INSERT INTO {self._schema}.{MARKER_TABLE} VALUES (?, ?, ?, ?, ?, ?, ?)",
                    [name, dt.datetime.now(dt.timezone.utc).replace(tzinfo=None), "arflow", arflow_version(),
                     list(self.layout.keys), self.layout.period_type, columns],
                )
            elif any(t == name for t, _, _ in new_columns):
                con.execute(f"UPDATE {self._schema}.{MARKER_TABLE} SET columns = ? WHERE table_name = ?", [columns, name])
        check_coverage_levels(f"schema {self.layout.schema} in {self.database}", self._columns(con, "forecasts"),
                              coverage_labels)
        for table, prefixes in COVERAGE_COLUMNS.items():
            have = self._columns(con, table)
            kind = "BOOLEAN" if table == "accuracy" else "DOUBLE"
            for label in coverage_labels:
                for prefix in prefixes:
                    col = f"{prefix}_{label}"
                    if col not in have:
                        con.execute(f"ALTER TABLE {self._schema}.{quote(table)} ADD COLUMN {quote(col)} {kind}")

    def _labels(self, con: duckdb.DuckDBPyConnection) -> tuple[str, ...]:
        return tuple(sorted(c[len("covered_"):] for c in self._columns(con, "accuracy") if c.startswith("covered_")))

    def _columns(self, con: duckdb.DuckDBPyConnection, table: str) -> set[str]:
        rows = con.execute(
            "SELECT column_name FROM information_schema.columns WHERE lower(table_schema) = lower(?) AND table_name = ?",
            [self.layout.schema, table],
        ).fetchall()
        return {r[0] for r in rows}

    def _insert(self, con: duckdb.DuckDBPyConnection, table: str, tables: "_StagedRelations", record: RunRecord) -> None:
        source = tables.relation(con, table)
        if source is None:
            return
        have = self._columns(con, table)
        cols = [c for c in tables.columns(table) if c in have and c != "run_id"]
        col_list = ", ".join(quote(c) for c in cols)
        con.execute(
            f"INSERT INTO {self._schema}.{quote(table)} BY NAME SELECT ? AS run_id, {col_list} FROM {source}",
            [record.run_id],
        )

    def _insert_status(self, con: duckdb.DuckDBPyConnection, tables: "_StagedRelations", record: RunRecord) -> None:
        source = tables.relation(con, "models")
        if source is None:
            return
        keys = ", ".join(quote(k) for k in self.layout.keys)
        have = set(tables.columns("models"))
        extra = "".join(f", {c}" for c in ("reasons", "failed_gates", "warnings") if c in have)
        con.execute(
            f"INSERT INTO {self._schema}.series_status BY NAME "
            f"SELECT ? AS run_id, ? AS job, ? AS as_of, {keys}, decision{extra}, ? AS on_failure FROM {source}",
            [record.run_id, record.job, record.as_of, record.on_failure],
        )

    def _record_accuracy(
        self, con: duckdb.DuckDBPyConnection, tables: "_StagedRelations", record: RunRecord, coverage_labels: tuple[str, ...]
    ) -> None:
        """Score earlier published vintages of this job against the actuals this run saw (once each)."""
        source = tables.relation(con, ACTUALS)
        if source is None:
            return
        s = self._schema
        keys = [quote(k) for k in self.layout.keys]
        on = " AND ".join(f"a.{k} = f.{k}" for k in keys)
        same = " AND ".join(f"x.{k} = f.{k}" for k in keys)
        value = quote(tables.value_column)
        period = quote(tables.period_column)
        labels = [lab for lab in self._labels(con) if {f"lower_{lab}", f"upper_{lab}"} <= self._columns(con, "forecasts")]
        covered = "".join(
            f", CASE WHEN f.{quote('lower_' + lab)} IS NULL THEN NULL "
            f"ELSE a.{value} BETWEEN f.{quote('lower_' + lab)} AND f.{quote('upper_' + lab)} END AS {quote('covered_' + lab)}"
            for lab in labels
        )
        con.execute(
            f"""
            INSERT INTO {s}.accuracy BY NAME
            SELECT f.run_id AS forecast_run_id, v.job, {', '.join('f.' + k for k in keys)}, f.period, f.step, f.forecast,
                   a.{value} AS actual, a.{value} - f.forecast AS error,
                   CASE WHEN a.{value} <> 0 THEN abs((a.{value} - f.forecast) / a.{value}) END AS abs_pct_error,
                   ? AS recorded_by{covered}
            FROM {s}.forecasts AS f
            JOIN {s}.vintages AS v ON v.run_id = f.run_id AND v.job = ? AND v.as_of < ?
            JOIN {source} AS a ON {on} AND a.{period} = f.period
            WHERE a.{value} IS NOT NULL AND isfinite(a.{value})
              AND NOT EXISTS (
                  SELECT 1 FROM {s}.accuracy AS x WHERE x.forecast_run_id = f.run_id AND x.period = f.period AND {same}
              )
            """,
            [record.run_id, record.job, record.as_of],
        )

    def _insert_run(self, con: duckdb.DuckDBPyConnection, record: RunRecord, attempt: int) -> None:
        values = {"run_id": record.run_id, **runs_row(record, attempt)}
        cols = ", ".join(quote(c) for c in values)
        marks = ", ".join("?" for _ in values)
        con.execute(f"INSERT INTO {self._schema}.runs ({cols}) VALUES ({marks})", list(values.values()))


class DuckDBPending:
    """A run written inside an open DuckDB transaction: :meth:`commit` or :meth:`abort` it."""

    def __init__(self, database: Path, con: duckdb.DuckDBPyConnection) -> None:
        self.database = database
        self.attempt = 0
        self._con: duckdb.DuckDBPyConnection | None = con

    def failed(self, exc: BaseException) -> PublishError:
        return PublishError(
            f"publishing to {self.database} failed and was rolled back ({one_line(exc)}); earlier results are unchanged"
        )

    def commit(self) -> int:
        """``COMMIT``: the run becomes visible; returns the vintage's attempt number."""
        con = self._con
        assert con is not None, "publication already finished"
        try:
            hold_signals()  # from here a stop signal waits: a committed run exits with its real status
            con.execute("COMMIT")
            fault_point("commit")
        except BaseException as exc:
            release_signals()
            self.abort()
            if isinstance(exc, duckdb.Error):
                raise self.failed(exc) from None
            raise
        self._close()
        return self.attempt

    def abort(self) -> None:
        """``ROLLBACK`` (idempotent; nothing to do after a commit)."""
        con = self._con
        if con is None:
            return
        try:
            con.execute("ROLLBACK")
        except duckdb.Error:
            pass
        self._close()

    def _close(self) -> None:
        con, self._con = self._con, None
        if con is not None:
            unwatch_connection(con)
            con.close()


def _literal(text: str) -> str:
    return "'" + text.replace("'", "''") + "'"


class _StagedRelations:
    """A staged run's tables as FROM-clause expressions DuckDB streams inside the transaction."""

    value_column = "value"
    period_column = "period"

    def __init__(self, staged: StagedRun) -> None:
        self.staged = staged

    def columns(self, table: str) -> list[str]:
        return self.staged.columns(table)

    def relation(self, con: duckdb.DuckDBPyConnection, table: str) -> str | None:
        """A FROM-clause expression for ``table`` (None when the run has no such rows)."""
        files = self.staged.files(table)
        if not files:
            return None
        return f"read_parquet([{', '.join(_literal(f) for f in files)}], union_by_name = true)"
