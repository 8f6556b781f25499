"""Vintages of a job in its target: list them, and remove one atomically.

A vintage is one as-of of one job (run id ``"<job>@<as_of>"``). Its rows sit
in every run table of the DuckDB target (and, when configured, in the Delta
tables of the lakehouse). :func:`remove_vintage` deletes all of them in one
transaction (the lakehouse: one publication, see
:mod:`arflow.warehouse.delta_target`) and records who removed what and when in
the table ``vintage_removals``; the views then show the previous vintage
again, as if the removed one had never run.
"""

from __future__ import annotations

import datetime as dt
import getpass
import json
import os
import socket
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import duckdb

from ..errors import PublishError, SettingsError, one_line
from ..results import RUN_TABLES
from ..version import arflow_version
from .contract import TableLayout
from .duckdb_source import is_lock_error, lock_message, open_duckdb, parse_vintage
from .duckdb_target import open_target, render_sql
from .identifiers import quote

#: every table holding a vintage's rows, with the column naming its run (accuracy twice: scores of
#: this vintage's forecasts, and scores of earlier vintages that this run recorded)
VINTAGE_COLUMNS: tuple[tuple[str, str], ...] = (
    *((t, "forecast_run_id" if t == "accuracy" else "run_id") for t in RUN_TABLES), ("accuracy", "recorded_by"), ("runs", "run_id"), ("vintages", "run_id"),
)
AUDIT_TABLE = "vintage_removals"


@dataclass(frozen=True)
class VintageInfo:
    """One vintage of a job as the target holds it."""

    as_of: Any
    run_id: str
    attempts: int
    status: str  # ok | alarm | held (the latest attempt's)
    series_total: int
    series_published: int
    series_quarantined: int
    visible: int  # series of this vintage shown by published_forecasts now
    published_at: dt.datetime | None  # None when the vintage never changed the view (held)
    current: bool  # the job's latest vintage in the view


@dataclass(frozen=True)
class RemovalReport:
    """What :func:`remove_vintage` removed (or would remove, with ``dry_run``)."""

    job: str
    as_of: Any
    run_id: str
    rows: dict[str, int]
    dry_run: bool
    removed_by: str
    lakehouse_rows: int = 0
    notes: tuple[str, ...] = field(default_factory=tuple)

    @property
    def total_rows(self) -> int:
        return sum(self.rows.values())


def os_user() -> str:
    """The operating-system user running arflow (for the audit trail)."""
    try:
        return getpass.getuser()
    except (KeyError, OSError):
        return f"uid {os.getuid()}" if hasattr(os, "getuid") else "unknown"


def _iso(value: Any) -> str:
    return value.isoformat() if isinstance(value, (dt.date, dt.datetime)) else str(value)


def _has_table(con: duckdb.DuckDBPyConnection, schema: str, table: str) -> bool:
    (n,) = con.execute(
        "SELECT count(*) FROM information_schema.tables WHERE table_schema = ? AND table_name = ?", [schema, table]
    ).fetchone() or (0,)
    return bool(n)


def _period_type(con: duckdb.DuckDBPyConnection, schema: str) -> str | None:
    row = con.execute(
        "SELECT data_type FROM information_schema.columns WHERE table_schema = ? AND table_name = 'runs' "
        "AND column_name = 'as_of'", [schema],
    ).fetchone()
    return str(row[0]).upper() if row else None


def _read_only(database: Path) -> duckdb.DuckDBPyConnection | None:
    """A read-only connection, or None when the file does not exist."""
    if not database.exists():
        return None
    try:
        return open_duckdb(str(database), read_only=True)
    except duckdb.Error as exc:
        if is_lock_error(exc):
            raise PublishError(f"target {lock_message(database)}") from None
        raise PublishError(f"cannot open target database {database} ({one_line(exc)}); check publish.database") from None


# ------------------------------------------------------------------------------------ list

def list_vintages(spec: Any) -> list[VintageInfo]:
    """The job's vintages, oldest first (DuckDB or PostgreSQL target; a lakehouse-only job reads the commit markers)."""
    pub = spec.publish
    if getattr(pub, "postgres", None) is not None:
        from . import postgres_vintages

        return postgres_vintages.list_vintages(spec, VintageInfo)
    if pub.database is None:
        return _list_lakehouse(spec)
    con = _read_only(pub.database)
    if con is None:
        return []
    s = quote(pub.schema)
    try:
        if not _has_table(con, pub.schema, "runs"):
            return []
        view = _has_view(con, pub.schema)
        visible = (
            f"LEFT JOIN (SELECT run_id, count(*) AS n FROM {s}.published_forecasts WHERE step = 1 GROUP BY run_id) AS p "
            "ON p.run_id = r.run_id" if view else ""
        )
        rows = con.execute(
            f"""
            SELECT r.as_of, r.run_id, r.attempt, r.status, r.series_total, r.series_published, r.series_quarantined,
                   {'coalesce(p.n, 0)' if view else '0'}, v.published_at
            FROM {s}.runs AS r
            LEFT JOIN {s}.vintages AS v ON v.run_id = r.run_id
            {visible}
            WHERE r.job = ?
            ORDER BY r.as_of
            """,
            [spec.name],
        ).fetchall()
        (current,) = con.execute(f"SELECT max(as_of) FROM {s}.vintages WHERE job = ?", [spec.name]).fetchone() or (None,)
    except duckdb.Error as exc:
        raise PublishError(f"cannot read vintages from {pub.database} ({one_line(exc)})") from None
    finally:
        con.close()
    return [
        VintageInfo(r[0], r[1], int(r[2]), r[3], int(r[4]), int(r[5]), int(r[6]), int(r[7]), r[8], r[0] == current)
        for r in rows
    ]


def _has_view(con: duckdb.DuckDBPyConnection, schema: str) -> bool:
    (n,) = con.execute(
        "SELECT count(*) FROM duckdb_views() WHERE schema_name = ? AND view_name = 'published_forecasts'", [schema]
    ).fetchone() or (0,)
    return bool(n)


def _list_lakehouse(spec: Any) -> list[VintageInfo]:
    from .delta_target import lake_vintages

    pub = spec.publish
    return [VintageInfo(v.as_of, v.run_id, v.attempts, v.status, v.series_total, v.series_published,
                        v.series_quarantined, v.visible, v.published_at, v.current)
            for v in lake_vintages(pub.lakehouse, pub.schema, spec.name, pub.lakehouse_options)]


# ------------------------------------------------------------------------------------ remove

def remove_vintage(spec: Any, as_of: Any, *, dry_run: bool = False, user: str | None = None) -> RemovalReport:
    """Remove one vintage of the job from every table of its target(s), atomically, with an audit row.

    DuckDB: one transaction (deletes, then the ``vintage_removals`` row).
    Lakehouse: the removal is prepared first (new files for the small tables,
    nothing visible), the DuckDB transaction commits, then the lakehouse
    commits (its partitions of the vintage dropped, ``published_forecasts``
    rebuilt, an audit row); if the DuckDB part fails the lakehouse is untouched.
    """
    pub = spec.publish
    who = user or os_user()
    if getattr(pub, "postgres", None) is not None:
        if pub.lakehouse is not None:
            raise SettingsError("retract does not yet remove a vintage from PostgreSQL and a lakehouse together; "
                                "remove it with a job file naming one of them at a time")
        from . import postgres_vintages

        return postgres_vintages.remove_vintage(spec, as_of, dry_run=dry_run, user=who, parse=parse_vintage,
                                                report=RemovalReport, vintage_columns=VINTAGE_COLUMNS, version=arflow_version())
    rows: dict[str, int] = {}
    notes: list[str] = []
    con = None
    value: Any = None
    run_id = ""
    lake_pending: Any = None
    lake_rows_total = 0
    attempts: int | None = None
    try:
        if pub.database is not None:
            con = _read_only(pub.database) if dry_run else (open_target(pub.database) if pub.database.exists() else None)
            if con is None or not _has_table(con, pub.schema, "runs"):
                raise PublishError(f"{pub.database} holds no vintages of job {spec.name}; nothing to remove")
            ptype = _period_type(con, pub.schema) or "DATE"
            value = parse_vintage(as_of, ptype)
            run_id, attempts = _find_run(con, pub.schema, spec.name, value)
            if not dry_run:
                con.execute("BEGIN TRANSACTION")
            rows = _delete_rows(con, pub.schema, run_id, dry_run)
        if pub.lakehouse is not None:
            from .delta_target import lake_period_type, lake_vintages, prepare_removal, removal_counts

            ptype = lake_period_type(pub.lakehouse, pub.schema, pub.lakehouse_options)
            lvalue = parse_vintage(as_of, ptype or "DATE")
            known = [v for v in lake_vintages(pub.lakehouse, pub.schema, spec.name, pub.lakehouse_options) if v.as_of == lvalue]
            if not known and pub.database is None:
                raise PublishError(f"lakehouse {pub.lakehouse} has no vintage {_iso(lvalue)} of job {spec.name}; see arflow vintages")
            if known:
                value, run_id = lvalue, known[0].run_id
                if dry_run:
                    lake_rows = removal_counts(pub.lakehouse, pub.schema, run_id, pub.lakehouse_options)
                    lake_rows_total = sum(lake_rows.values())
                    if pub.database is None:
                        rows = lake_rows
                else:
                    lake_pending, lake_rows = prepare_removal(pub.lakehouse, pub.schema, spec.name, lvalue, who,
                                                              socket.gethostname(), arflow_version(), pub.lakehouse_options)
                    lake_rows_total = sum(lake_rows.values())
                    if pub.database is None:
                        rows = lake_rows
        if con is not None and not dry_run:
            _audit(con, pub.schema, spec.name, value, run_id, attempts, rows, who)
            con.execute("COMMIT")
    except BaseException as exc:
        if con is not None and not dry_run:
            try:
                con.execute("ROLLBACK")
            except duckdb.Error:
                pass
        if lake_pending is not None:
            lake_pending.abort()
        if isinstance(exc, duckdb.Error):
            raise PublishError(f"removing the vintage failed and was rolled back ({one_line(exc)}); nothing changed") from None
        raise
    finally:
        if con is not None:
            con.close()
    if lake_pending is not None:
        lake_pending.commit()
    return RemovalReport(spec.name, value, run_id, rows, dry_run, who, lake_rows_total, tuple(notes))


def _find_run(con: duckdb.DuckDBPyConnection, schema: str, job: str, value: Any) -> tuple[str, int | None]:
    s = quote(schema)
    row = con.execute(f"SELECT run_id, attempt FROM {s}.runs WHERE job = ? AND as_of = ?", [job, value]).fetchone()
    if row is None:
        row = con.execute(f"SELECT run_id, attempt FROM {s}.vintages WHERE job = ? AND as_of = ?", [job, value]).fetchone()
    if row is None:
        known = [_iso(r[0]) for r in con.execute(
            f"SELECT DISTINCT as_of FROM {s}.runs WHERE job = ? ORDER BY as_of DESC LIMIT 5", [job]).fetchall()]
        listing = ", ".join(known) if known else "none"
        raise SettingsError(f"job {job} has no vintage {_iso(value)} (latest vintages: {listing}); see arflow vintages")
    return str(row[0]), (int(row[1]) if row[1] is not None else None)


def _delete_rows(con: duckdb.DuckDBPyConnection, schema: str, run_id: str, dry_run: bool) -> dict[str, int]:
    s = quote(schema)
    rows: dict[str, int] = {}
    for table, column in VINTAGE_COLUMNS:
        if not _has_table(con, schema, table):
            continue
        where = f"FROM {s}.{quote(table)} WHERE {quote(column)} = ?"
        (n,) = con.execute(f"SELECT count(*) {where}", [run_id]).fetchone() or (0,)
        label = "accuracy (recorded by it)" if column == "recorded_by" else table
        rows[label] = int(n)
        if not dry_run and n:
            con.execute(f"DELETE {where}", [run_id])
    return rows


def _audit(
    con: duckdb.DuckDBPyConnection, schema: str, job: str, value: Any, run_id: str, attempts: int | None,
    rows: dict[str, int], who: str,
) -> None:
    period_type = _period_type(con, schema) or "DATE"
    con.execute(render_sql(AUDIT_TABLE, TableLayout(schema, ("k",), ("VARCHAR",), period_type)))
    con.execute(
        f"INSERT INTO {quote(schema)}.{AUDIT_TABLE} VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
        [_utcnow(), who, socket.gethostname(), job, value, run_id, attempts,
         json.dumps(rows, sort_keys=True), arflow_version()],
    )


def _utcnow() -> dt.datetime:
    return dt.datetime.now(dt.timezone.utc).replace(tzinfo=None)
