"""``arflow vintages`` and ``arflow retract`` on a PostgreSQL target.

Listing reads ``runs``, ``vintages`` and the view in one read-only
transaction. Removing a vintage takes the schema's advisory lock (a run
publishing there is waited for, like a second run), deletes the vintage's
rows from every run table and writes the ``vintage_removals`` audit row, in
one transaction: readers see the vintage until ``COMMIT`` and the previous
one right after.
"""

from __future__ import annotations

import datetime as dt
import json
import socket
from typing import Any

from ..errors import PublishError, SettingsError
from .contract import TableLayout
from .identifiers import quote
from .postgres_connection import connect, detail, driver_errors
from .postgres_target import PostgresTarget, execute, fetch_rows, rollback_close, table_columns


def _target(spec: Any) -> PostgresTarget:
    return PostgresTarget.from_spec(spec.publish, TableLayout(spec.publish.schema, spec.source.keys, (), ""))


def _period_type(columns: dict[str, dict[str, str]]) -> str:
    kind = columns.get("runs", {}).get("as_of", "date")
    return {"date": "DATE", "timestamp without time zone": "TIMESTAMP", "bigint": "BIGINT"}.get(kind, "DATE")


def list_vintages(spec: Any, info: type) -> list[Any]:
    """The job's vintages, oldest first, as ``info`` records (:class:`arflow.warehouse.vintages.VintageInfo`)."""
    target = _target(spec)
    s = quote(spec.publish.schema)
    con = connect(target.address, "target", PublishError)
    try:
        columns = table_columns(con, spec.publish.schema)
        if "runs" not in columns:
            return []
        rows = fetch_rows(
            con,
            f"""
            SELECT r.as_of, r.run_id, r.attempt, r.status, r.series_total, r.series_published, r.series_quarantined,
                   coalesce(p.n, 0), v.published_at
            FROM {s}.runs AS r
            LEFT JOIN {s}.vintages AS v ON v.run_id = r.run_id
            LEFT JOIN (SELECT run_id, count(*) AS n FROM {s}.published_forecasts WHERE step = 1 GROUP BY run_id) AS p
                   ON p.run_id = r.run_id
            WHERE r.job = $1
            ORDER BY r.as_of
            """,
            (spec.name,),
        )
        (current,) = fetch_rows(con, f"SELECT max(as_of) FROM {s}.vintages WHERE job = $1", (spec.name,))[0]
    except driver_errors() as exc:
        raise target.error_for(exc, "read") from None
    finally:
        rollback_close(con)
    return [info(r[0], r[1], int(r[2]), r[3], int(r[4]), int(r[5]), int(r[6]), int(r[7]), r[8], r[0] == current)
            for r in rows]


def remove_vintage(spec: Any, as_of: Any, *, dry_run: bool, user: str, parse: Any, report: type,
                   vintage_columns: tuple[tuple[str, str], ...], version: str) -> Any:
    """Remove one vintage from every table in one transaction (``report``: RemovalReport)."""
    target = _target(spec)
    s = quote(spec.publish.schema)
    con = connect(target.address, "target", PublishError)
    try:
        target.lock_schema(con)
        columns = table_columns(con, spec.publish.schema)
        if "runs" not in columns:
            raise PublishError(f"{target.describe()} holds no vintages of job {spec.name}; nothing to remove")
        value = parse(as_of, _period_type(columns))
        found = fetch_rows(con, f"SELECT run_id, attempt FROM {s}.runs WHERE job = $1 AND as_of = $2", (spec.name, value)) or \
            fetch_rows(con, f"SELECT run_id, attempt FROM {s}.vintages WHERE job = $1 AND as_of = $2", (spec.name, value))
        if not found:
            known = [r[0] for r in fetch_rows(con, f"SELECT DISTINCT as_of FROM {s}.runs WHERE job = $1 ORDER BY as_of DESC LIMIT 5",
                                          (spec.name,))]
            listing = ", ".join(k.isoformat() if hasattr(k, "isoformat") else str(k) for k in known) or "none"
            raise SettingsError(f"job {spec.name} has no vintage {value} (latest vintages: {listing}); see arflow vintages")
        run_id, attempts = str(found[0][0]), (int(found[0][1]) if found[0][1] is not None else None)
        rows: dict[str, int] = {}
        for table, column in vintage_columns:
            if table not in columns:
                continue
            (n,) = fetch_rows(con, f"SELECT count(*) FROM {s}.{quote(table)} WHERE {quote(column)} = $1", (run_id,))[0]
            rows["accuracy (recorded by it)" if column == "recorded_by" else table] = int(n)
            if not dry_run and n:
                execute(con, f"DELETE FROM {s}.{quote(table)} WHERE {quote(column)} = $1", (run_id,))
        if not dry_run:
            now = dt.datetime.now(dt.timezone.utc).replace(tzinfo=None)
            target.insert_rows(con, "vintage_removals", {
                "removed_at": [now], "removed_by": [user], "host": [socket.gethostname()], "job": [spec.name],
                "as_of": [value], "run_id": [run_id], "attempts": [attempts],
                "rows_removed": [json.dumps(rows, sort_keys=True)], "arflow_version": [version],
            }, columns)
            con.commit()
    except driver_errors() as exc:
        rollback_close(con)
        raise PublishError(f"removing the vintage from {target.describe()} failed and was rolled back ({detail(exc)}); "
                           "nothing changed") from None
    except BaseException:
        rollback_close(con)
        raise
    rollback_close(con)  # after COMMIT (or a dry run) this only closes
    return report(spec.name, value, run_id, rows, dry_run, user)
