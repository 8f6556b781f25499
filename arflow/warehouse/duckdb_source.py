"""Read a job's source through DuckDB: a table, the user's query, or parquet files.

The source is opened read-only (parquet through an in-memory database),
checked up front (columns, types, NULL keys, emptiness) with one-line
errors, then streamed as Arrow ordered by keys and period and cut into
chunks of whole series.

The connection is a sandbox (:func:`lock_down`): once open it can read the
source database, or exactly the Parquet files the job names, and nothing
else. DuckDB's own settings do it: external access off (no other files, no
folder listings, no ``COPY``/``ATTACH``/``EXPORT``, no network, no Python
objects by name), no extension installing or loading, and the configuration
locked for the session so a query cannot turn any of it back on.
"""

from __future__ import annotations

import datetime as dt
import glob
import os
import re
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

import duckdb
import numpy as np
import polars as pl

from ..errors import SchemaError, SettingsError, SourceAccessError, SourceError
from ..runtime import fault_point, unwatch_connection, watch_connection
from .identifiers import quote, quote_qualified

_INTEGER_TYPES = {"TINYINT", "SMALLINT", "INTEGER", "BIGINT", "UTINYINT", "USMALLINT", "UINTEGER", "UBIGINT", "HUGEINT", "UHUGEINT"}
_FLOAT_TYPES = {"FLOAT", "DOUBLE", "REAL"}
_TIMESTAMP_TYPES = {"TIMESTAMP", "TIMESTAMP_S", "TIMESTAMP_MS", "TIMESTAMP_NS", "DATETIME"}
#: Key column types the output tables can carry (used verbatim in DDL).
_KEY_TYPES = {"VARCHAR", "BOOLEAN", "DATE", "UUID"} | (_INTEGER_TYPES - {"HUGEINT", "UHUGEINT"})


#: DuckDB's working memory per connection. Grouping a large source by series
#: spills to a temporary folder past this, so a run's peak memory stays bounded
#: by the chunk size rather than by the warehouse size.
MEMORY_LIMIT = "512MB"


def engine_config() -> dict[str, str]:
    """DuckDB settings for arflow's connections: bounded memory, spilling to the system temp folder."""
    import tempfile

    return {"memory_limit": MEMORY_LIMIT, "temp_directory": tempfile.gettempdir() + "/arflow-duckdb-spill"}


#: settings applied in this order, after ``allowed_paths``; the last one locks them all
_SANDBOX_SETTINGS = (
    ("autoinstall_known_extensions", "false"),
    ("autoload_known_extensions", "false"),
    ("allow_community_extensions", "false"),
    ("enable_external_access", "false"),
    ("lock_configuration", "true"),
)


def _sql_literal(text: str) -> str:
    return "'" + text.replace("'", "''") + "'"


def lock_down(con: duckdb.DuckDBPyConnection, allowed_files: tuple[str, ...] = ()) -> None:
    """Close ``con`` to everything but its database and ``allowed_files``, for the rest of the session.

    DuckDB still spills to its own temp folder (set before this call).
    """
    if allowed_files:
        con.execute(f"SET allowed_paths = [{', '.join(_sql_literal(f) for f in allowed_files)}]")
    for name, value in _SANDBOX_SETTINGS:
        con.execute(f"SET {name} = {value}")


def access_message(exc: BaseException) -> str:
    """The one message for a source (its query, or a view in it) that reached outside the job's source."""
    return (
        f"the source tried to reach something outside the job's source ({first_line(exc)}); "
        "a source may read only its source.database or the source.parquet files, with no other files, "
        "folder listings, network or extensions"
    )


def lock_message(path: object) -> str:
    """The one message for a database held by another process."""
    return f"database {path} is in use by another process (another arflow run?); retry when it finishes"


def is_lock_error(exc: BaseException) -> bool:
    """True for DuckDB's 'could not set lock' error."""
    return isinstance(exc, duckdb.IOException) and "lock" in str(exc).lower()


def first_line(exc: BaseException) -> str:
    """The first line of an exception message, without the DuckDB error prefix."""
    text = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
    return re.sub(r"^[A-Za-z ]*Error: ", "", text)


@dataclass(frozen=True)
class SourceLayout:
    """Checked types of the source: DuckDB type names used in the output DDL."""

    key_types: tuple[str, ...]
    period_type: str  # DATE, TIMESTAMP or BIGINT
    value_type: str
    columns: tuple[tuple[str, str], ...]


class DuckDBSource:
    """A read-only view of the job's source; use as a context manager."""

    def __init__(self, source: Any, frequency: str) -> None:
        self.spec = source
        self.frequency = frequency
        self._con: duckdb.DuckDBPyConnection | None = None
        self._layout: SourceLayout | None = None

    # -- opening ---------------------------------------------------------
    def __enter__(self) -> "DuckDBSource":
        spec = self.spec
        if spec.database is not None:
            if not spec.database.is_file():
                raise SourceError(f"source database {spec.database} does not exist; check source.database in the job file")
            try:
                self._con = duckdb.connect(str(spec.database), read_only=True, config=engine_config())
            except duckdb.Error as exc:
                if is_lock_error(exc):
                    raise SourceError(lock_message(spec.database)) from None
                raise SourceError(f"cannot open source database {spec.database} ({first_line(exc)}); check it is a DuckDB file") from None
            self._lock_down(())
        else:
            files = tuple(sorted(f for f in glob.glob(spec.parquet, recursive=True) if not os.path.isdir(f)))
            if not files:
                raise SourceError(f"no parquet files match {spec.parquet}; check source.parquet in the job file")
            self._con = duckdb.connect(":memory:", config=engine_config())
            self._lock_down(files)
            listed = ", ".join(_sql_literal(f) for f in files)
            try:
                self._con.execute(f"CREATE VIEW source AS SELECT * FROM read_parquet([{listed}])")
            except duckdb.Error as exc:
                raise SourceError(f"cannot read parquet {spec.parquet} ({first_line(exc)}); check the files") from None
        watch_connection(self.con)  # a stop signal interrupts the statement running on it
        fault_point("source-open")
        return self

    def _lock_down(self, files: tuple[str, ...]) -> None:
        try:
            lock_down(self.con, files)
        except duckdb.Error:
            self.close()
            raise

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        if self._con is not None:
            unwatch_connection(self._con)
            self._con.close()
            self._con = None

    @property
    def con(self) -> duckdb.DuckDBPyConnection:
        assert self._con is not None, "source is not open"
        return self._con

    # -- SQL text ----------------------------------------------------------
    def _relation_sql(self) -> str:
        spec = self.spec
        if spec.table is not None:
            return quote_qualified(spec.table)
        if spec.query is None:
            return "source"
        try:
            statements = self.con.extract_statements(spec.query)
        except duckdb.Error as exc:
            raise SettingsError(f"source.query does not parse ({first_line(exc)}); fix the SQL") from None
        if len(statements) != 1 or statements[0].type != duckdb.StatementType.SELECT:
            raise SettingsError("source.query must be exactly one SELECT statement (no ';' separated statements, no writes)")
        text = spec.query.strip().rstrip(";").rstrip()
        return f"(\n{text}\n)"

    def _from(self) -> str:
        return f"{self._relation_sql()} AS arflow_source"

    def _sql(self, sql: str, params: list[Any] | None = None) -> list[tuple[Any, ...]]:
        try:
            return self.con.execute(sql, params or []).fetchall()
        except duckdb.CatalogException as exc:
            raise self._catalog_error(exc) from None
        except duckdb.PermissionException as exc:
            raise SourceAccessError(access_message(exc)) from None
        except duckdb.Error as exc:
            raise SourceError(f"reading the source failed ({first_line(exc)}); check [source] in the job file") from None

    def _catalog_error(self, exc: BaseException) -> SourceError:
        spec = self.spec
        if spec.table is not None:
            try:
                names = [f"{s}.{t}" for s, t in self.con.execute(
                    "SELECT schema_name, table_name FROM duckdb_tables() UNION ALL "
                    "SELECT schema_name, view_name FROM duckdb_views() WHERE NOT internal ORDER BY 1, 2"
                ).fetchall()]
            except duckdb.Error:
                names = []
            known = ", ".join(names[:8]) + (" ..." if len(names) > 8 else "") if names else "none"
            return SourceError(f"source table {'.'.join(spec.table)} not found in {spec.database}; check source.table (tables there: {known})")
        return SourceError(f"source.query refers to something that does not exist ({first_line(exc)}); fix the query")

    # -- checks ------------------------------------------------------------
    def layout(self) -> SourceLayout:
        """Check that the key, period and value columns exist with usable types."""
        if self._layout is not None:
            return self._layout
        rows = self._sql(f"DESCRIBE SELECT * FROM {self._from()}")
        columns = tuple((str(r[0]), str(r[1])) for r in rows)
        by_lower = {name.lower(): (name, typ) for name, typ in columns}
        spec = self.spec
        available = ", ".join(name for name, _ in columns) or "none"

        def find(col: str, role: str) -> str:
            if col.lower() not in by_lower:
                raise SchemaError(f"source has no column {col!r} (named as {role}); columns available: {available}")
            name, typ = by_lower[col.lower()]
            if name != col:
                raise SchemaError(f"source column is spelled {name!r}, the job file says {col!r} ({role}); use the exact spelling")
            return typ.upper()

        key_types = []
        for k in spec.keys:
            typ = find(k, "source.keys")
            if typ not in _KEY_TYPES:
                raise SchemaError(f"key column {k!r} has type {typ}; expected text, integer, boolean or date (cast it in a [source] query)")
            key_types.append(typ)
        ptyp = find(spec.period, "source.period")
        if ptyp == "DATE":
            period_type = "DATE"
        elif ptyp in _TIMESTAMP_TYPES:
            period_type = "TIMESTAMP"
        elif ptyp in _INTEGER_TYPES:
            period_type = "BIGINT"
        else:
            raise SchemaError(
                f"period column {spec.period!r} has type {ptyp}; expected DATE, TIMESTAMP or an integer "
                f"(cast it in a [source] query, e.g. CAST({spec.period} AS DATE))"
            )
        if period_type == "BIGINT" and self.frequency != "step":
            raise SchemaError(f"period column {spec.period!r} holds integers; set source.frequency = \"step\" for integer periods")
        if period_type != "BIGINT" and self.frequency == "step":
            raise SchemaError(f"source.frequency = \"step\" needs an integer period column, but {spec.period!r} is {ptyp}; use day/week/month/quarter/year")
        vtyp = find(spec.value, "source.value")
        if not (vtyp in _INTEGER_TYPES or vtyp in _FLOAT_TYPES or vtyp.startswith("DECIMAL")):
            raise SchemaError(
                f"value column {spec.value!r} has type {vtyp}; expected a numeric column "
                f"(fix the data or cast it in a [source] query, e.g. TRY_CAST({spec.value} AS DOUBLE))"
            )
        self._layout = SourceLayout(tuple(key_types), period_type, vtyp, columns)
        return self._layout

    def check_rows(self) -> int:
        """Row count; rejects an empty source and rows with NULL keys or periods."""
        spec = self.spec
        null_key = " OR ".join(f"{quote(k)} IS NULL" for k in spec.keys)
        total, null_keys, null_periods, values = self._sql(
            f"SELECT count(*), count(*) FILTER (WHERE {null_key}), count(*) FILTER (WHERE {quote(spec.period)} IS NULL), "
            f"count({quote(spec.value)}) FROM {self._from()}"
        )[0]
        if total == 0:
            raise SourceError("the source has no rows; check source.table / source.query (or the parquet files)")
        if values == 0:
            raise SourceError(
                f"the value column {spec.value} is NULL in all {total} row(s); check source.value or the [source] query"
            )
        if null_keys:
            raise SourceError(
                f"the source has {null_keys} row(s) with a NULL key ({', '.join(spec.keys)}); "
                "filter them out or fill them in with a [source] query"
            )
        if null_periods:
            raise SourceError(
                f"the source has {null_periods} row(s) with a NULL period ({spec.period}); "
                "filter them out with a [source] query"
            )
        return int(total)

    def latest_period(self) -> Any:
        """The latest period in the source."""
        return self._sql(f"SELECT max({self._period_expr()}) FROM {self._from()}")[0][0]

    def parse_as_of(self, text: Any) -> Any:
        """Turn a ``--as-of`` string into a value of the period column's type."""
        ptype = self.layout().period_type
        if not isinstance(text, str):
            return text
        text = text.strip()
        try:
            if ptype == "BIGINT":
                return int(text)
            if ptype == "DATE":
                if re.fullmatch(r"\d{4}-\d{2}", text):
                    text += "-01"
                return dt.date.fromisoformat(text)
            return dt.datetime.fromisoformat(text)
        except ValueError:
            want = {"BIGINT": "an integer period", "DATE": "a date like 2024-06-01", "TIMESTAMP": "a timestamp like 2024-06-01T00:00"}[ptype]
            raise SettingsError(f"--as-of {text!r} is not {want} (the period column {self.spec.period} is {ptype})") from None

    def _period_expr(self) -> str:
        return f"CAST({quote(self.spec.period)} AS {self.layout().period_type})"

    def stats(self, as_of: Any) -> tuple[int, int, Any]:
        """(rows, series, first period) at or before ``as_of``."""
        keys = ", ".join(quote(k) for k in self.spec.keys)
        rows, series, first = self._sql(
            f"SELECT count(*), count(DISTINCT ({keys})), min({self._period_expr()}) FROM {self._from()} WHERE {self._period_expr()} <= ?",
            [as_of],
        )[0]
        return int(rows), int(series), first

    def chunks(self, as_of: Any, chunk_series: int, batch_rows: int = 8_192) -> Iterator[pl.DataFrame]:
        """Rows at or before ``as_of``, grouped by series, in chunks of about ``chunk_series`` whole series.

        DuckDB groups the rows by key with a hash aggregate (``list()`` of
        periods and values per series) instead of sorting the whole table, and
        orders only the series (so chunks, and every number, are the same on
        every run); each chunk is expanded back to long rows, series by series.
        Rows within a series keep their scan order; the panel builder sorts a
        series' periods only when they are not already in order.
        """
        spec = self.spec
        key_cols = list(spec.keys)
        keys = ", ".join(quote(k) for k in key_cols)
        period = self._period_expr()
        pcol, vcol = quote(spec.period), quote(spec.value)
        sql = (
            f"SELECT {keys}, list({period}) AS {pcol}, list(CAST({vcol} AS DOUBLE)) AS {vcol} "
            f"FROM {self._from()} WHERE {period} <= ? GROUP BY {keys} ORDER BY {keys}"
        )
        try:
            relation = self.con.sql(sql, params=[as_of])
            # DuckDB 2 names it to_arrow_reader; 1.x had fetch_arrow_reader
            to_reader = getattr(relation, "to_arrow_reader", None) or relation.fetch_arrow_reader
            reader = to_reader(batch_rows)
            pending: list[pl.DataFrame] = []
            held = 0
            for batch in reader:
                frame = pl.from_arrow(batch)
                assert isinstance(frame, pl.DataFrame)
                if frame.height == 0:
                    continue
                start = 0
                while start < frame.height:
                    take = min(frame.height - start, chunk_series - held)
                    pending.append(frame.slice(start, take))
                    held += take
                    start += take
                    if held >= chunk_series:
                        yield pl.concat(pending).explode([spec.period, spec.value])
                        pending, held = [], 0
            if pending:
                yield pl.concat(pending).explode([spec.period, spec.value])
        except duckdb.PermissionException as exc:
            raise SourceAccessError(access_message(exc)) from None
        except duckdb.Error as exc:
            raise SourceError(f"reading the source failed ({first_line(exc)}); check [source] in the job file") from None
