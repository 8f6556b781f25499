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
import polars as pl

from ..errors import SchemaError, SettingsError, SourceAccessError, SourceError, one_line
from ..runtime import fault_point, unwatch_connection, watch_connection
from .checks import check_step_frequency, column_type, count_and_check_rows, period_labels
from .contract import SourceLayout, SourceStats, periods_between
from .identifiers import quote, quote_qualified
from .key_ranges import range_predicate, range_starts, ranges

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


def open_duckdb(database: str, read_only: bool = False, config: dict[str, str] | None = None) -> duckdb.DuckDBPyConnection:
    """``duckdb.connect`` with arflow's session settings: no progress bar.

    DuckDB prints a progress bar to standard output during statements that run
    for more than two seconds, into a library caller's output or a job's log.
    Both switches are per session (DuckDB refuses them in ``config``), so they
    are set here, before a source locks its configuration; the printing one
    as well because setting ``progress_bar_time`` turns the bar back on. A
    file this process already opened as a source (a job whose source and
    target are one file) shares the source's locked configuration: such a
    connection keeps DuckDB's default.
    """
    con = duckdb.connect(database, read_only=read_only, config=config or {})
    try:
        if not con.execute("SELECT current_setting('lock_configuration')").fetchone()[0]:
            con.execute("SET enable_progress_bar = false")
            con.execute("SET enable_progress_bar_print = false")
    except BaseException:
        con.close()
        raise
    return con


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
        f"the source tried to reach something outside the job's source ({one_line(exc)}); "
        "a source may read only its source.database or the source.parquet files, with no other files, "
        "folder listings, network or extensions"
    )


def lock_message(path: object) -> str:
    """The one message for a database held by another process."""
    return f"database {path} is in use by another process (another arflow run?); retry when it finishes"


def is_lock_error(exc: BaseException) -> bool:
    """True for DuckDB's 'could not set lock' error."""
    return isinstance(exc, duckdb.IOException) and "lock" in str(exc).lower()


#: largest |step| accepted as an as-of (period arithmetic stays far from the int64 limit)
STEP_LIMIT = 2**53


def normalise_as_of(value: Any, period_type: str) -> Any:
    """One value per vintage: UTC without a zone; DATE columns get a date, TIMESTAMP columns a datetime."""
    if isinstance(value, dt.datetime):
        if value.tzinfo is not None:
            value = value.astimezone(dt.timezone.utc).replace(tzinfo=None)
        return value.date() if period_type == "DATE" else value
    if isinstance(value, dt.date) and period_type == "TIMESTAMP":
        return dt.datetime(value.year, value.month, value.day)
    return value


def parse_as_of_text(text: Any, ptype: str, period_column: str) -> Any:
    """An ``--as-of`` value of a source whose period column ``period_column`` is of type ``ptype`` (normalised)."""
    if not isinstance(text, str):
        return normalise_as_of(text, ptype)
    text = text.strip()
    try:
        if ptype == "BIGINT":
            value = int(text)
            if abs(value) > STEP_LIMIT:
                raise SettingsError(
                    f"--as-of: as-of period {text[:40]} is out of range for integer periods "
                    f"(at most +-2**53 = {STEP_LIMIT}); use a period inside the source's range"
                )
            return value
        if re.fullmatch(r"\d{4}-\d{2}", text):
            text += "-01"
        if re.fullmatch(r"\d{4}-\d{2}-\d{2}", text):
            return normalise_as_of(dt.date.fromisoformat(text), ptype)
        return normalise_as_of(dt.datetime.fromisoformat(text.replace("z", "Z")), ptype)
    except (ValueError, OverflowError):
        want = {"BIGINT": "an integer period", "DATE": "a date like 2024-06-01", "TIMESTAMP": "a timestamp like 2024-06-01T00:00"}[ptype]
        raise SettingsError(f"--as-of {text[:40]!r} is not {want} (the period column {period_column} is {ptype})") from None


def parse_vintage(text: Any, period_type: str) -> Any:
    """A vintage as the user typed it, as a value of the target's period type (normalised like --as-of)."""
    if not isinstance(text, str):
        return normalise_as_of(text, period_type)
    raw = text.strip()
    try:
        if period_type == "BIGINT":
            return int(raw)
        if re.fullmatch(r"\d{4}-\d{2}", raw):
            raw += "-01"
        if re.fullmatch(r"\d{4}-\d{2}-\d{2}", raw):
            return normalise_as_of(dt.date.fromisoformat(raw), period_type)
        return normalise_as_of(dt.datetime.fromisoformat(raw), period_type)
    except (ValueError, OverflowError):
        raise SettingsError(f"--as-of {raw[:40]!r} is not a period like the target's ({period_type}); e.g. 2025-06-01") from None


def _cut(text: str, limit: int = 40) -> str:
    """Printable text, cut to ``limit`` characters (for error messages)."""
    clean = "".join(c if c.isprintable() else "?" for c in text)
    return clean if len(clean) <= limit else clean[: limit - 3] + "..."


def describe_row(keys: Any, key_values: Any, period: Any) -> str:
    """``zone=Z-01, region=north at 2025-08-06`` (short, printable)."""
    shown = ", ".join(f"{k}={_cut(str(v))}" for k, v in zip(keys, key_values))
    when = period.isoformat() if isinstance(period, (dt.date, dt.datetime)) else str(period)
    return f"{shown} at {when}"


def _month_end(year: int, month: int) -> dt.date:
    nxt = dt.date(year + month // 12, month % 12 + 1, 1)
    return nxt - dt.timedelta(days=1)


@dataclass(frozen=True)
class SourceCalendar:
    """How a source labels its periods: ``weekday`` (0 = Monday) of weekly labels, ``anchor`` start/end."""

    frequency: str
    period_type: str
    latest: Any
    weekday: int | None = None
    anchor: str = "start"

    def place(self, value: Any, whole_month: bool = False) -> Any:
        """``value`` moved onto the label of its period (see :meth:`DuckDBSource.place_as_of`)."""
        f = self.frequency
        if f == "step" or value is None:
            return value
        day = value.date() if isinstance(value, dt.datetime) else value
        if f == "day":
            pass  # a day's label is its date (a timestamp goes to its midnight)
        elif f == "week":
            day = day - dt.timedelta(days=(day.weekday() - (self.weekday or 0)) % 7)
        else:
            months = {"month": 1, "quarter": 3, "year": 12}[f]
            first = (day.month - 1) // months * months + 1
            if self.anchor == "start":
                day = dt.date(day.year, first, 1)
            else:
                if whole_month:  # YYYY-MM text: the whole month counts, so its last day
                    day = _month_end(day.year, day.month)
                end = _month_end(day.year, first + months - 1)
                if day != end:
                    prev = dt.date(day.year, first, 1) - dt.timedelta(days=1)
                    end = _month_end(prev.year, prev.month)
                day = end
        return dt.datetime(day.year, day.month, day.day) if self.period_type == "TIMESTAMP" else day

    def periods_between(self, earlier: Any, later: Any) -> int:
        """Whole periods from ``earlier`` to ``later`` on this calendar."""
        return periods_between(self.frequency, earlier, later)


class DuckDBSource:
    """A read-only view of the job's source; use as a context manager."""

    def __init__(self, source: Any, frequency: str) -> None:
        self.spec = source
        self.frequency = frequency
        self._con: duckdb.DuckDBPyConnection | None = None
        self._layout: SourceLayout | None = None
        self._calendar: SourceCalendar | None = None

    # -- opening ---------------------------------------------------------
    def __enter__(self) -> "DuckDBSource":
        try:
            self._open()
            watch_connection(self.con)  # a stop signal interrupts the statement running on it
            fault_point("source-open")
        except BaseException:
            self.close()  # nothing stays open (or watched) when opening fails part-way
            raise
        return self

    def _open(self) -> None:
        spec = self.spec
        if spec.database is not None:
            if not spec.database.is_file():
                raise SourceError(f"source database {spec.database} does not exist; check source.database in the job file")
            try:
                self._con = open_duckdb(str(spec.database), read_only=True, config=engine_config())
            except duckdb.Error as exc:
                if is_lock_error(exc):
                    raise SourceError(lock_message(spec.database)) from None
                raise SourceError(f"cannot open source database {spec.database} ({one_line(exc)}); check it is a DuckDB file") from None
            lock_down(self.con, ())
        else:
            files = tuple(sorted(f for f in glob.glob(spec.parquet, recursive=True) if not os.path.isdir(f)))
            if not files:
                raise SourceError(f"no parquet files match {spec.parquet}; check source.parquet in the job file")
            self._con = open_duckdb(":memory:", config=engine_config())
            lock_down(self.con, files)
            listed = ", ".join(_sql_literal(f) for f in files)
            try:
                self.con.execute(f"CREATE VIEW source AS SELECT * FROM read_parquet([{listed}])")
            except duckdb.Error as exc:
                raise SourceError(f"cannot read parquet {spec.parquet} ({one_line(exc)}); check the files") from None

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
            raise SettingsError(f"source.query does not parse ({one_line(exc)}); fix the SQL") from None
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
            raise SourceError(f"reading the source failed ({one_line(exc)}); check [source] in the job file") from None

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
        return SourceError(f"source.query refers to something that does not exist ({one_line(exc)}); fix the query")

    # -- checks ------------------------------------------------------------
    def layout(self) -> SourceLayout:
        """Check that the key, period and value columns exist with usable types."""
        if self._layout is not None:
            return self._layout
        rows = self._sql(f"DESCRIBE SELECT * FROM {self._from()}")
        columns = tuple((str(r[0]), str(r[1])) for r in rows)
        spec = self.spec

        def find(col: str, role: str) -> str:
            return column_type(columns, col, role).upper()

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
        check_step_frequency(period_type, self.frequency, spec.period, ptyp)
        vtyp = find(spec.value, "source.value")
        if not (vtyp in _INTEGER_TYPES or vtyp in _FLOAT_TYPES or vtyp.startswith("DECIMAL")):
            raise SchemaError(
                f"value column {spec.value!r} has type {vtyp}; expected a numeric column "
                f"(fix the data or cast it in a [source] query, e.g. TRY_CAST({spec.value} AS DOUBLE))"
            )
        self._layout = SourceLayout(tuple(key_types), period_type, vtyp, columns)
        return self._layout

    def check_rows(self) -> int:
        """Row count; the row checks of :mod:`arflow.warehouse.checks` (with a few offending rows as examples)."""
        spec = self.spec
        return count_and_check_rows(self._sql, self.example_rows, self._from(), spec.keys, spec.period, spec.value)

    def latest_period(self) -> Any:
        """The latest period in the source."""
        return self._sql(f"SELECT max({self._period_expr()}) FROM {self._from()}")[0][0]

    def parse_as_of(self, text: Any) -> Any:
        """Turn a ``--as-of`` string into a value of the period column's type.

        Normalised so that one vintage has one value (and one run id): a time
        zone is converted to UTC and dropped (``T00:00Z`` and ``T00:00`` are the
        same), a DATE column takes the date of a timestamp, and a TIMESTAMP
        column takes a bare date as its midnight. Placing the value on the
        source's calendar is :meth:`place_as_of`.
        """
        return parse_as_of_text(text, self.layout().period_type, self.spec.period)

    def calendar(self) -> "SourceCalendar":
        """How the source labels its periods (weekday of weekly labels, period starts or ends).

        Raises the calendar-alignment error ``run`` would raise (weekly labels
        on different weekdays), naming the count and a few example rows.
        """
        if self._calendar is not None:
            return self._calendar
        period = self._period_expr()
        latest = self.latest_period()
        ends = {"month": "p = last_day(p)", "quarter": "p = last_day(p) AND month(p) % 3 = 0",
                "year": "month(p) = 12 AND day(p) = 31"}
        weekday, anchor = period_labels(
            self.frequency,
            lambda: self._sql(f"SELECT isodow(p) - 1 AS wd, count(*) AS n FROM (SELECT {period} AS p FROM {self._from()}) "
                              "GROUP BY wd ORDER BY n DESC, wd"),
            lambda wd: self.example_rows(f"isodow({period}) - 1 <> {wd}"),
            lambda freq: self._sql(
                f"SELECT bool_and({ends[freq]}) FROM (SELECT DISTINCT CAST({period} AS DATE) AS p FROM {self._from()})"
            )[0][0],
        )
        self._calendar = SourceCalendar(self.frequency, self.layout().period_type, latest, weekday, anchor)
        return self._calendar

    def place_as_of(self, text: Any) -> tuple[Any, Any]:
        """``(value, given)``: the as-of moved onto the source's calendar label, and the parsed value as given.

        A week goes to the label of the week holding the date (2025-12-23 ->
        Monday 2025-12-22 for Monday-labelled weeks); a month, quarter or year
        to its first day, or, when the source labels periods by their last
        day, to the last label at or before the date (``YYYY-MM`` text means
        that month, so its last day).
        """
        given = self.parse_as_of(text)
        whole_month = isinstance(text, str) and re.fullmatch(r"\d{4}-\d{2}", text.strip()) is not None
        return self.calendar().place(given, whole_month), given

    def example_rows(self, condition: str, limit: int = 3, params: list[Any] | None = None) -> str:
        """A few rows matching ``condition`` as ``key=..., key=... at period`` text (for error messages)."""
        keys = [quote(k) for k in self.spec.keys]
        rows = self._sql(
            f"SELECT {', '.join(keys)}, {self._period_expr()} FROM {self._from()} WHERE {condition} "
            f"ORDER BY {', '.join(keys)}, 2 LIMIT {int(limit)}", params
        ) if keys else []
        return "; ".join(describe_row(self.spec.keys, r[:-1], r[-1]) for r in rows) or "(none)"

    def example_rows_at(self, period: Any) -> str:
        """A few rows at ``period`` (for the far-ahead guard's message)."""
        return self.example_rows(f"{self._period_expr()} = ?", params=[period])

    def _period_expr(self) -> str:
        return f"CAST({quote(self.spec.period)} AS {self.layout().period_type})"

    def stats(self, as_of: Any) -> SourceStats:
        """Rows, series and the first period at or before ``as_of``."""
        keys = ", ".join(quote(k) for k in self.spec.keys)
        rows, series, first = self._sql(
            f"SELECT count(*), count(DISTINCT ({keys})), min({self._period_expr()}) FROM {self._from()} WHERE {self._period_expr()} <= ?",
            [as_of],
        )[0]
        return SourceStats(int(rows), int(series), first)

    def history(self, series: list[tuple[Any, ...]], as_of: Any) -> pl.DataFrame:
        """The rows at or before ``as_of`` of a few series (key value tuples), as (keys, period, value), for reports."""
        spec = self.spec
        period = self._period_expr()
        if not series:
            return pl.DataFrame()
        wanted = pl.DataFrame([dict(zip(spec.keys, row)) for row in series])
        self.con.register("arflow_wanted", wanted.to_arrow())
        try:
            on = " AND ".join(f"s.{quote(k)} IS NOT DISTINCT FROM w.{quote(k)}" for k in spec.keys)
            rel = self.con.sql(
                f"SELECT {', '.join('s.' + quote(k) for k in spec.keys)}, {period.replace('CAST(', 'CAST(s.', 1)} AS period, "
                f"CAST(s.{quote(spec.value)} AS DOUBLE) AS value FROM (SELECT * FROM {self._from()}) AS s "
                f"SEMI JOIN arflow_wanted AS w ON {on} WHERE {period.replace('CAST(', 'CAST(s.', 1)} <= ? "
                f"ORDER BY {', '.join('s.' + quote(k) for k in spec.keys)}, period", params=[as_of])
            return pl.from_arrow(rel.to_arrow_table())  # type: ignore[return-value]
        except duckdb.Error as exc:
            raise SourceError(f"reading the source failed ({one_line(exc)}); check [source] in the job file") from None
        finally:
            self.con.unregister("arflow_wanted")

    def chunks(self, as_of: Any, chunk_series: int, batch_rows: int = 8_192) -> Iterator[pl.DataFrame]:
        """Rows at or before ``as_of``, in chunks of ``chunk_series`` whole series ordered by key.

        A table or Parquet source lists its series keys once, then reads each
        chunk with one plain scan over a key range (:mod:`.key_ranges`, the
        rule the PostgreSQL source follows too): the first chunk is ready
        after the listing, not after the whole table was grouped, and a table
        stored in key order lets DuckDB skip the row groups outside the range.
        A ``query`` source is run once (each range would run it again):
        DuckDB groups its rows by key with a hash aggregate (``list()`` of
        periods and values per series) and orders only the series. Either way
        a chunk holds the same series, so every number is the same; rows
        within a series keep their scan order and the panel builder sorts a
        series' periods only when they are not already in order.
        """
        if self.spec.query is not None:
            yield from self._grouped_chunks(as_of, chunk_series, batch_rows)
            return
        spec = self.spec
        key_cols = list(spec.keys)
        keys = [quote(k) for k in key_cols]
        period = self._period_expr()
        pcol, vcol = quote(spec.period), quote(spec.value)
        try:
            listing = self.con.sql(
                f"SELECT {', '.join(keys)} FROM (SELECT DISTINCT {', '.join(keys)} FROM {self._from()} "
                f"WHERE {period} <= $1) ORDER BY {', '.join(keys)}", params=[as_of],
            ).to_arrow_table()
            for low, high in ranges(range_starts(listing, chunk_series)):
                bounds = range_predicate(keys, first=2, upper=high is not None)
                table = self.con.sql(
                    f"SELECT {', '.join(keys)}, {period} AS {pcol}, CAST({vcol} AS DOUBLE) AS {vcol} "
                    f"FROM {self._from()} WHERE {period} <= $1 AND {bounds}", params=[as_of, *low, *(high or ())],
                ).to_arrow_table()
                frame = pl.from_arrow(table)
                assert isinstance(frame, pl.DataFrame)
                if frame.height:
                    yield frame.sort(key_cols, maintain_order=True)  # whole series together, in key order
        except duckdb.PermissionException as exc:
            raise SourceAccessError(access_message(exc)) from None
        except duckdb.Error as exc:
            raise SourceError(f"reading the source failed ({one_line(exc)}); check [source] in the job file") from None

    def _grouped_chunks(self, as_of: Any, chunk_series: int, batch_rows: int) -> Iterator[pl.DataFrame]:
        """The one-pass read of a ``query`` source: rows grouped per series by DuckDB, ordered by key."""
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
            raise SourceError(f"reading the source failed ({one_line(exc)}); check [source] in the job file") from None
