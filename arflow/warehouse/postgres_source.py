"""Read a job's series from PostgreSQL: a table or the user's query, in chunks of whole series.

Everything the source runs happens inside one ``READ ONLY`` transaction at
``REPEATABLE READ`` (one snapshot: the checks, the counts and every chunk see
the same rows) with ``statement_timeout`` set, so a job file can never change
the warehouse it reads and a runaway query ends with a one-line error.

Chunks: the series keys at or before the as-of are listed once (ordered by
key, text keys in byte order like DuckDB, so chunks are the same on every
run); each chunk is one statement over a key range, streamed as Arrow and
ordered by key on the client. Each chunk statement stays within the timeout,
and the client holds one chunk at a time.
"""

from __future__ import annotations

import re
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

import polars as pl
import pyarrow as pa

from ..errors import SchemaError, SettingsError, SourceAccessError, SourceError
from ..runtime import fault_point
from .checks import check_step_frequency, column_type, count_and_check_rows, period_labels
from .contract import SourceLayout, SourceStats
from .duckdb_source import SourceCalendar, describe_row, parse_as_of_text
from .identifiers import quote, quote_qualified
from .key_ranges import range_predicate, range_starts, ranges
from .postgres_connection import PgAddress, connect, detail, driver_errors, lost_connection, sqlstate

#: default [source] statement_timeout_seconds
DEFAULT_STATEMENT_TIMEOUT = 600.0

#: PostgreSQL type name (pg_type.typname) -> arflow's type name (DuckDB's, used by every target's DDL)
_KEY_TYPES = {"text": "VARCHAR", "varchar": "VARCHAR", "bpchar": "VARCHAR", "name": "VARCHAR", "int2": "SMALLINT",
              "int4": "INTEGER", "int8": "BIGINT", "bool": "BOOLEAN", "date": "DATE"}
_INTEGER = {"int2", "int4", "int8"}
_VALUE_TYPES = {"int2": "SMALLINT", "int4": "INTEGER", "int8": "BIGINT", "float4": "FLOAT", "float8": "DOUBLE",
                "numeric": "DECIMAL"}
_NUMERIC = _INTEGER | {"float4", "float8", "numeric"}
_READABLE = {"int2": "smallint", "int4": "integer", "int8": "bigint", "float4": "real", "float8": "double precision",
             "bpchar": "character", "timestamptz": "timestamp with time zone", "bool": "boolean"}


@dataclass(frozen=True)
class PostgresSourceSpec:
    """``[source]`` for PostgreSQL: the URL, exactly one of ``table`` / ``query``, the columns."""

    postgres: PgAddress
    keys: tuple[str, ...]
    period: str
    value: str
    table: tuple[str, ...] | None = None
    query: str | None = None
    statement_timeout: float = DEFAULT_STATEMENT_TIMEOUT

    def describe(self) -> str:
        what = ".".join(self.table) if self.table else "query"
        return f"{self.postgres.describe()} ({what})"


def _type_name(field: pa.Field) -> str:
    meta = field.metadata or {}
    raw = meta.get(b"POSTGRESQL:type") or meta.get(b"ADBC:postgresql:typname")
    if raw:
        return raw.decode()
    return str(field.type)


class PostgresSource:
    """A read-only view of the job's PostgreSQL source; use as a context manager.

    ``spec``: a :class:`PostgresSourceSpec` or the job file's ``SourceSpec``
    with ``postgres`` set (the same attribute names).
    """

    def __init__(self, spec: Any, frequency: str) -> None:
        self.spec = spec
        self.frequency = frequency
        self._con: Any = None
        self._layout: SourceLayout | None = None
        self._calendar: SourceCalendar | None = None

    @classmethod
    def from_spec(cls, source: Any, frequency: str) -> "PostgresSource":
        """The source of a job file's ``[source]`` with ``postgres`` set."""
        return cls(source, frequency)

    def describe(self) -> str:
        return self.spec.describe()

    # -- opening -------------------------------------------------------------
    def __enter__(self) -> "PostgresSource":
        self._con = connect(self.spec.postgres, "source", SourceError, autocommit=True)
        try:
            cur = self._con.cursor()
            cur.execute("BEGIN TRANSACTION ISOLATION LEVEL REPEATABLE READ READ ONLY")
            cur.execute(f"SET LOCAL statement_timeout = {int(self.spec.statement_timeout * 1000)}")
            cur.execute("SET LOCAL idle_in_transaction_session_timeout = 0")
            cur.close()
        except driver_errors() as exc:
            self.close()
            raise SourceError(f"cannot start a read-only transaction on {self.spec.postgres.describe()} ({detail(exc)})") from None
        fault_point("source-open")
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        if self._con is not None:
            try:
                cur = self._con.cursor()
                cur.execute("ROLLBACK")
                cur.close()
            except Exception:  # noqa: BLE001 - closing must not mask the error that closed it
                pass
            try:
                self._con.close()
            except Exception:  # noqa: BLE001
                pass
            self._con = None

    # -- SQL -----------------------------------------------------------------
    def _relation_sql(self) -> str:
        spec = self.spec
        if spec.table is not None:
            return quote_qualified(spec.table)
        assert spec.query is not None
        text = spec.query.strip().rstrip(";").rstrip()
        if ";" in _strip_literals(text):
            raise SettingsError("source.query must be exactly one SELECT statement (no ';' separated statements, no writes)")
        return f"(\n{text}\n)"

    def _from(self) -> str:
        return f"{self._relation_sql()} AS arflow_source"

    def _run(self, sql: str, params: tuple[Any, ...] | None = None) -> pa.Table:
        assert self._con is not None, "source is not open"
        cur = self._con.cursor()
        try:
            cur.execute(sql, params) if params else cur.execute(sql)
            return cur.fetch_arrow_table()
        except driver_errors() as exc:
            raise self._error(exc) from None
        finally:
            cur.close()

    def _rows(self, sql: str, params: tuple[Any, ...] | None = None) -> list[tuple[Any, ...]]:
        table = self._run(sql, params)
        cols = [c.to_pylist() for c in table.columns]
        return list(zip(*cols)) if cols else []

    def _error(self, exc: BaseException) -> SourceError | SettingsError:
        state = sqlstate(exc) or ""
        spec = self.spec
        where = spec.postgres.describe()
        if state == "57014":
            return SourceError(
                f"reading the source took longer than source.statement_timeout_seconds = {spec.statement_timeout:g} and was "
                f"cancelled ({where}); make the query cheaper (an index on the keys and period helps) or raise the limit"
            )
        if lost_connection(exc):
            return SourceError(f"the connection to the source {where} was lost ({detail(exc)}); nothing was published, re-run the job")
        if state == "25006":
            return SourceAccessError(
                f"the source query tried to change the database ({detail(exc)}); a source is read in a read-only transaction, "
                "use a plain SELECT"
            )
        if state == "42501":
            return SourceError(
                f"role {spec.postgres.user} may not read the source ({detail(exc)}); GRANT USAGE on its schema and SELECT on it "
                "to that role"
            )
        if state == "42P01" and spec.table is not None:
            return SourceError(
                f"source table {'.'.join(spec.table)} not found in {where}; check source.table (tables there: {self._known_tables()})"
            )
        if state.startswith("42") and spec.query is not None:
            if state == "42601":
                return SettingsError(f"source.query does not parse ({detail(exc)}); fix the SQL")
            return SourceError(f"source.query refers to something that does not exist or does not fit ({detail(exc)}); fix the query")
        return SourceError(f"reading the source failed ({detail(exc)}); check [source] in the job file")

    def _known_tables(self) -> str:
        try:
            names = [f"{s}.{t}" for s, t in self._rows_quiet(
                "SELECT table_schema, table_name FROM information_schema.tables "
                "WHERE table_schema NOT IN ('pg_catalog', 'information_schema') ORDER BY 1, 2 LIMIT 9")]
        except Exception:  # noqa: BLE001
            names = []
        return (", ".join(names[:8]) + (" ..." if len(names) > 8 else "")) if names else "none"

    def _rows_quiet(self, sql: str) -> list[tuple[Any, ...]]:
        """A catalogue query after an error: the failed transaction is restarted first (it only reads)."""
        cur = self._con.cursor()
        try:
            cur.execute("ROLLBACK")
            cur.execute("BEGIN TRANSACTION ISOLATION LEVEL REPEATABLE READ READ ONLY")
            cur.execute(f"SET LOCAL statement_timeout = {int(self.spec.statement_timeout * 1000)}")
            cur.execute(sql)
            table = cur.fetch_arrow_table()
        finally:
            cur.close()
        cols = [c.to_pylist() for c in table.columns]
        return list(zip(*cols)) if cols else []

    # -- checks --------------------------------------------------------------
    def layout(self) -> SourceLayout:
        """Check that the key, period and value columns exist with usable types."""
        if self._layout is not None:
            return self._layout
        schema = self._run(f"SELECT * FROM {self._from()} LIMIT 0").schema
        columns = tuple((f.name, _type_name(f)) for f in schema)
        spec = self.spec

        def find(col: str, role: str) -> str:
            return column_type(columns, col, role)

        key_types = []
        for k in spec.keys:
            typ = find(k, "source.keys")
            if typ not in _KEY_TYPES:
                raise SchemaError(
                    f"key column {k!r} has type {_READABLE.get(typ, typ)}; expected text, integer, boolean or date "
                    f"(cast it in a [source] query, e.g. {k}::text)"
                )
            key_types.append(_KEY_TYPES[typ])
        ptyp = find(spec.period, "source.period")
        if ptyp == "date":
            period_type = "DATE"
        elif ptyp == "timestamp":
            period_type = "TIMESTAMP"
        elif ptyp in _INTEGER:
            period_type = "BIGINT"
        else:
            raise SchemaError(
                f"period column {spec.period!r} has type {_READABLE.get(ptyp, ptyp)}; expected date, timestamp (without time "
                f"zone) or an integer (cast it in a [source] query, e.g. {spec.period}::date)"
            )
        check_step_frequency(period_type, self.frequency, spec.period, ptyp)
        vtyp = find(spec.value, "source.value")
        if vtyp not in _NUMERIC:
            raise SchemaError(
                f"value column {spec.value!r} has type {_READABLE.get(vtyp, vtyp)}; expected a numeric column "
                f"(fix the data or cast it in a [source] query, e.g. {spec.value}::double precision)"
            )
        named = tuple((n, _READABLE.get(t, t)) for n, t in columns)
        self._layout = SourceLayout(tuple(key_types), period_type, _VALUE_TYPES.get(vtyp, vtyp.upper()), named)
        return self._layout

    def check_rows(self) -> int:
        """Row count; the row checks of :mod:`arflow.warehouse.checks` (with a few offending rows as examples)."""
        spec = self.spec
        return count_and_check_rows(self._rows, self.example_rows, self._from(), spec.keys, spec.period, spec.value,
                                    where="source.table / source.query")

    def period_expr(self) -> str:
        """SQL for the period column as arflow's period type."""
        return f"CAST({quote(self.spec.period)} AS {self.layout().period_type})"

    _period_expr = period_expr  # the name the job's as-of guard uses for DuckDB sources

    def latest_period(self) -> Any:
        return self._rows(f"SELECT max({self.period_expr()}) FROM {self._from()}")[0][0]

    def parse_as_of(self, text: Any) -> Any:
        """Turn a ``--as-of`` string into a value of the period column's type (as the DuckDB source does)."""
        return parse_as_of_text(text, self.layout().period_type, self.spec.period)

    def calendar(self) -> SourceCalendar:
        """How the source labels its periods (weekday of weekly labels, period starts or ends)."""
        if self._calendar is not None:
            return self._calendar
        period = self.period_expr()
        latest = self.latest_period()
        last_day = "(date_trunc('month', p) + interval '1 month - 1 day')::date = p"
        ends = {"month": last_day, "quarter": f"{last_day} AND extract(month FROM p)::int % 3 = 0",
                "year": "extract(month FROM p)::int = 12 AND extract(day FROM p)::int = 31"}
        weekday, anchor = period_labels(
            self.frequency,
            lambda: self._rows(f"SELECT (extract(isodow FROM p)::int - 1) AS wd, count(*) AS n FROM (SELECT {period} AS p "
                               f"FROM {self._from()}) AS x GROUP BY wd ORDER BY n DESC, wd"),
            lambda wd: self.example_rows(f"extract(isodow FROM {period})::int - 1 <> {wd}"),
            lambda freq: self._rows(
                f"SELECT bool_and({ends[freq]}) FROM (SELECT DISTINCT CAST({period} AS date) AS p FROM {self._from()}) AS x"
            )[0][0],
        )
        self._calendar = SourceCalendar(self.frequency, self.layout().period_type, latest, weekday, anchor)
        return self._calendar

    def place_as_of(self, text: Any) -> tuple[Any, Any]:
        """``(value, given)``: the as-of moved onto the source's calendar label, and the parsed value."""
        given = self.parse_as_of(text)
        whole_month = isinstance(text, str) and re.fullmatch(r"\d{4}-\d{2}", text.strip()) is not None
        return self.calendar().place(given, whole_month), given

    def example_rows(self, condition: str, limit: int = 3) -> str:
        """A few rows matching ``condition`` as ``key=..., key=... at period`` text (for error messages)."""
        keys = [quote(k) for k in self.spec.keys]
        rows = self._rows(
            f"SELECT {', '.join(keys)}, {self.period_expr()} FROM {self._from()} WHERE {condition} "
            f"ORDER BY {', '.join(self._ordered(keys))}, {len(keys) + 1} LIMIT {int(limit)}"
        ) if keys else []
        return "; ".join(describe_row(self.spec.keys, r[:-1], r[-1]) for r in rows) or "(none)"

    def _ordered(self, keys: list[str]) -> list[str]:
        """Key expressions ordered as DuckDB orders them (text by bytes, not by the database's collation)."""
        types = self.layout().key_types
        return [f'{k} COLLATE "C"' if t == "VARCHAR" else k for k, t in zip(keys, types)]

    def stats(self, as_of: Any) -> SourceStats:
        """Rows, series and the first period at or before ``as_of``."""
        keys = ", ".join(quote(k) for k in self.spec.keys)
        rows, series, first = self._rows(  # a grouped count: hashes, where count(DISTINCT (keys)) sorts
            f"SELECT coalesce(sum(n), 0), count(*), min(f) FROM (SELECT count(*) AS n, min({self.period_expr()}) AS f "
            f"FROM {self._from()} WHERE {self.period_expr()} <= $1 GROUP BY {keys}) AS per_series",
            (as_of,),
        )[0]
        return SourceStats(int(rows), int(series), first)

    def chunks(self, as_of: Any, chunk_series: int) -> Iterator[pl.DataFrame]:
        """Rows at or before ``as_of``, in chunks of ``chunk_series`` whole series ordered by key.

        One statement lists the series keys (small); then one statement per
        chunk reads that key range's rows (a plain scan, no server-side sort
        or aggregate: measured several times faster than ``array_agg`` per
        series), streamed as Arrow and ordered by key on the client.
        """
        spec = self.spec
        key_cols = list(spec.keys)
        keys = [quote(k) for k in key_cols]
        ordered = self._ordered(keys)
        period = self.period_expr()
        pcol, vcol = quote(spec.period), quote(spec.value)
        listing = self._run(
            f"SELECT {', '.join(keys)} FROM (SELECT DISTINCT {', '.join(keys)} FROM {self._from()} WHERE {period} <= $1) AS d "
            f"ORDER BY {', '.join(ordered)}",
            (as_of,),
        )
        if listing.num_rows == 0:
            return
        starts = range_starts(listing, chunk_series)
        for low, high in ranges(starts):
            params: list[Any] = [as_of, *low, *(high or ())]
            bounds = range_predicate(ordered, first=2, upper=high is not None)
            sql = (
                f"SELECT {', '.join(keys)}, {period} AS {pcol}, CAST({vcol} AS double precision) AS {vcol} "
                f"FROM {self._from()} WHERE {period} <= $1 AND {bounds}"
            )
            table = self._run(sql, tuple(params))
            frame = pl.from_arrow(_plain(table))
            assert isinstance(frame, pl.DataFrame)
            if frame.height:
                # whole series, ordered by key (text by bytes, as DuckDB); a series' rows keep their scan order
                yield frame.sort(key_cols, maintain_order=True)


def _plain(table: pa.Table) -> pa.Table:
    """Drop the driver's per-field metadata (polars does not need it)."""
    return table.replace_schema_metadata(None).cast(pa.schema([pa.field(f.name, f.type) for f in table.schema]))


_LITERAL = re.compile(r"'(?:[^']|'')*'|\"(?:[^\"]|\"\")*\"|--[^\n]*|/\*.*?\*/", re.DOTALL)


def _strip_literals(sql: str) -> str:
    """``sql`` without string literals, quoted identifiers and comments (to look for a ';' between statements)."""
    return _LITERAL.sub(" ", sql)
