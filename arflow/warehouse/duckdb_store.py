"""Publish one run to a DuckDB warehouse in a single transaction.

Tables are created from the ``arflow.sql`` DDL files on first use. A run's
rows go in with bulk Arrow inserts between ``BEGIN`` and ``COMMIT``; any error
(or a kill) before ``COMMIT`` leaves the warehouse exactly as it was.

The run id is deterministic, ``"<job>@<as_of>"``: re-running a vintage deletes
and rewrites that vintage's rows inside the same transaction (``runs.attempt``
counts the attempts), so a repeated run gives identical published rows and
no duplicates, while other vintages stay for audit.
"""

from __future__ import annotations

import datetime as dt
import json
import os
import sys
import time
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from string import Template
from typing import Any

import duckdb
import polars as pl

from ..errors import PublishError
from .duckdb_source import first_line, is_lock_error, lock_message
from .identifiers import quote

#: Tables written per run, in insert order (the fault hook names these).
RUN_TABLES = ("series_status", "models", "gates", "residual_acf", "forecasts")
DDL_FILES = ("runs", "vintages", "series_status", "models", "gates", "residual_acf", "forecasts")
VIEW_FILE = "published_forecasts"
_STATUS_FIXED = ("run_id", "job", "as_of", "decision", "on_failure")


def run_id_for(job: str, as_of: Any) -> str:
    """The deterministic id of a job's vintage."""
    text = as_of.isoformat() if isinstance(as_of, (dt.date, dt.datetime)) else str(as_of)
    return f"{job}@{text}"


@dataclass(frozen=True)
class TableLayout:
    """What the output tables are templated by: schema, key columns and types, period type."""

    schema: str
    keys: tuple[str, ...]
    key_types: tuple[str, ...]
    period_type: str


@dataclass(frozen=True)
class RunRecord:
    """The ``runs`` row of one run (``attempt`` is set by the store)."""

    run_id: str
    job: str
    as_of: Any
    started_at: dt.datetime
    finished_at: dt.datetime
    status: str
    series_total: int
    series_published: int
    series_quarantined: int
    quarantine_share: float
    on_failure: str
    frequency: str
    horizon: int
    coverage: tuple[float, ...]
    source: str
    config_sha256: str
    arflow_version: str
    reason_counts: dict[str, int] = field(default_factory=dict)


def _fault_point(name: str) -> None:
    """Test-only hooks, inside the transaction after writing ``name``.

    ``ARFLOW_TEST_FAIL_AFTER=name`` raises; ``ARFLOW_TEST_PAUSE_AFTER=name``
    prints a marker line on stderr and waits (at most 60 s) until the file
    named by ``ARFLOW_TEST_RESUME_FILE`` exists.
    """
    if os.environ.get("ARFLOW_TEST_FAIL_AFTER") == name:
        raise RuntimeError(f"test fault injected after writing {name}")
    if os.environ.get("ARFLOW_TEST_PAUSE_AFTER") == name:
        sys.stderr.write(f"arflow-test: paused after {name}\n")
        sys.stderr.flush()
        resume = os.environ.get("ARFLOW_TEST_RESUME_FILE")
        deadline = time.monotonic() + 60.0
        while time.monotonic() < deadline and not (resume and Path(resume).exists()):
            time.sleep(0.02)


def load_sql(name: str) -> str:
    """Text of ``sql/<name>.sql`` shipped as package data ``arflow.sql``."""
    return resources.files("arflow.sql").joinpath(f"{name}.sql").read_text(encoding="utf-8")


def render_sql(name: str, layout: TableLayout) -> str:
    """Fill a DDL template with quoted identifiers and whitelisted types only."""
    keys = [quote(k) for k in layout.keys]
    return Template(load_sql(name)).substitute(
        schema=quote(layout.schema),
        period_type=layout.period_type,
        key_defs=",\n    ".join(f"{k} {t} NOT NULL" for k, t in zip(keys, layout.key_types)),
        key_list=", ".join(keys),
        p_key_list=", ".join(f"p.{k}" for k in keys),
        key_join=" AND ".join(f"p.{k} = l.{k}" for k in keys),
        f_key_join=" AND ".join(f"f.{k} = v.{k}" for k in keys),
    )


def _open(database: Path, read_only: bool = False) -> duckdb.DuckDBPyConnection:
    if not database.parent.is_dir():
        raise PublishError(f"folder {database.parent} of publish.database does not exist; create it or fix the path")
    try:
        return duckdb.connect(str(database), read_only=read_only)
    except duckdb.Error as exc:
        if is_lock_error(exc):
            raise PublishError(f"target {lock_message(database)}") from None
        raise PublishError(f"cannot open target database {database} ({first_line(exc)}); check publish.database") from None


def _existing_layout(con: duckdb.DuckDBPyConnection, schema: str) -> tuple[list[str], str] | None:
    rows = con.execute(
        "SELECT column_name, data_type FROM information_schema.columns "
        "WHERE table_schema = ? AND table_name = 'series_status' ORDER BY ordinal_position",
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
    if existing is None:
        return
    keys, period_type = existing
    if [k.lower() for k in keys] != [k.lower() for k in layout.keys]:
        raise PublishError(
            f"schema {layout.schema} in {database} holds results keyed by ({', '.join(keys)}), this job's keys are "
            f"({', '.join(layout.keys)}); publish this job to another schema with [publish] schema"
        )
    if period_type != layout.period_type:
        raise PublishError(
            f"schema {layout.schema} in {database} holds {period_type} periods, this job's are {layout.period_type}; "
            "publish this job to another schema with [publish] schema"
        )


def check_target(database: Path, layout: TableLayout) -> str:
    """Read-only look at the target for ``validate`` and dry runs; returns a status note."""
    if not database.exists():
        return "will be created"
    try:
        con = duckdb.connect(str(database), read_only=True)
    except duckdb.Error as exc:
        if is_lock_error(exc):
            return "in use by another process right now (not checked)"
        raise PublishError(f"cannot open target database {database} ({first_line(exc)}); check publish.database") from None
    try:
        check_layout(con, layout, database)
        return "tables exist" if _existing_layout(con, layout.schema) else "tables will be created"
    finally:
        con.close()


class DuckDBStore:
    """Writes runs to ``database`` under ``layout.schema``."""

    def __init__(self, database: Path, layout: TableLayout) -> None:
        self.database = database
        self.layout = layout
        self._schema = quote(layout.schema)

    def describe(self) -> str:
        return f"{self.database} (schema {self.layout.schema}, view {self.layout.schema}.published_forecasts)"

    def publish(
        self,
        record: RunRecord,
        *,
        models: pl.DataFrame,
        gates: pl.DataFrame,
        residual_acf: pl.DataFrame,
        forecasts: pl.DataFrame,
        coverage_labels: tuple[str, ...],
    ) -> int:
        """Write one run atomically; returns the attempt number of this vintage."""
        con = _open(self.database)
        try:
            con.execute("BEGIN TRANSACTION")
            self._ensure_tables(con, coverage_labels)
            (previous,) = con.execute(
                f"SELECT max(attempt) FROM {self._schema}.runs WHERE run_id = ?", [record.run_id]
            ).fetchone() or (None,)
            attempt = int(previous or 0) + 1
            for table in (*RUN_TABLES, "runs"):
                con.execute(f"DELETE FROM {self._schema}.{quote(table)} WHERE run_id = ?", [record.run_id])
            con.execute(f"DELETE FROM {self._schema}.vintages WHERE job = ? AND as_of = ?", [record.job, record.as_of])
            status = models.select(*self.layout.keys, "decision").with_columns(
                pl.lit(record.job).alias("job"), pl.lit(record.on_failure).alias("on_failure")
            ) if models.height else pl.DataFrame()
            frames = {"series_status": status, "models": models, "gates": gates, "residual_acf": residual_acf, "forecasts": forecasts}
            for table in RUN_TABLES:
                self._insert(con, table, frames[table], record)
                _fault_point(table)
            self._insert_run(con, record, attempt)
            _fault_point("runs")
            con.execute(
                f"INSERT INTO {self._schema}.vintages VALUES (?, ?, ?, ?, ?)",
                [record.job, record.as_of, record.run_id, attempt, record.finished_at],
            )
            _fault_point("vintages")
            con.execute(render_sql(VIEW_FILE, self.layout))
            con.execute("COMMIT")
            return attempt
        except BaseException as exc:
            try:
                con.execute("ROLLBACK")
            except duckdb.Error:
                pass
            if isinstance(exc, duckdb.Error):
                raise PublishError(
                    f"publishing to {self.database} failed and was rolled back ({first_line(exc)}); earlier results are unchanged"
                ) from None
            raise
        finally:
            con.close()

    def _ensure_tables(self, con: duckdb.DuckDBPyConnection, coverage_labels: tuple[str, ...]) -> None:
        check_layout(con, self.layout, self.database)
        con.execute(f"CREATE SCHEMA IF NOT EXISTS {self._schema}")
        for name in DDL_FILES:
            con.execute(render_sql(name, self.layout))
        have = self._columns(con, "forecasts")
        for label in coverage_labels:
            for side in ("lower", "upper"):
                col = f"{side}_{label}"
                if col not in have:
                    con.execute(f"ALTER TABLE {self._schema}.forecasts ADD COLUMN {quote(col)} DOUBLE")

    def _columns(self, con: duckdb.DuckDBPyConnection, table: str) -> set[str]:
        rows = con.execute(
            "SELECT column_name FROM information_schema.columns WHERE table_schema = ? AND table_name = ?",
            [self.layout.schema, table],
        ).fetchall()
        return {r[0] for r in rows}

    def _insert(self, con: duckdb.DuckDBPyConnection, table: str, frame: pl.DataFrame, record: RunRecord) -> None:
        if frame.height == 0:
            return
        frame = frame.with_columns(pl.lit(record.run_id).alias("run_id"))
        if table == "series_status":
            frame = frame.with_columns(pl.lit(record.as_of).alias("as_of"))
        have = self._columns(con, table)
        cols = [c for c in frame.columns if c in have]
        con.register("arflow_stage", frame.select(cols).to_arrow())
        try:
            col_list = ", ".join(quote(c) for c in cols)
            con.execute(f"INSERT INTO {self._schema}.{quote(table)} BY NAME SELECT {col_list} FROM arflow_stage")
        finally:
            con.unregister("arflow_stage")

    def _insert_run(self, con: duckdb.DuckDBPyConnection, record: RunRecord, attempt: int) -> None:
        duration = (record.finished_at - record.started_at).total_seconds()
        values = {
            "run_id": record.run_id,
            "job": record.job,
            "as_of": record.as_of,
            "attempt": attempt,
            "started_at": record.started_at,
            "finished_at": record.finished_at,
            "duration_seconds": duration,
            "status": record.status,
            "series_total": record.series_total,
            "series_published": record.series_published,
            "series_quarantined": record.series_quarantined,
            "quarantine_share": record.quarantine_share,
            "reason_counts": json.dumps(record.reason_counts, sort_keys=True),
            "on_failure": record.on_failure,
            "frequency": record.frequency,
            "horizon": record.horizon,
            "coverage": list(record.coverage),
            "source": record.source,
            "config_sha256": record.config_sha256,
            "arflow_version": record.arflow_version,
        }
        cols = ", ".join(quote(c) for c in values)
        marks = ", ".join("?" for _ in values)
        con.execute(f"INSERT INTO {self._schema}.runs ({cols}) VALUES ({marks})", list(values.values()))
