"""A Spark table or Parquet path as a job's source, checked with the local sources' own rules and messages."""

from __future__ import annotations

import tempfile
import time
from dataclasses import replace
from functools import reduce
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.parquet as pq

from ...errors import ArflowError, SourceError, one_line
from ...warehouse.checks import RowCounts, check_row_counts
from ...warehouse.contract import SourceLayout, SourceStats
from ...warehouse.duckdb_source import DuckDBSource
from .session import start_session


def arrow_schema(spark_schema: Any, wanted: set[str]) -> pa.Schema:
    """The Arrow schema of the columns arflow reads (others as placeholders: only their names matter)."""
    from pyspark.sql.pandas.types import to_arrow_type
    from pyspark.sql.types import TimestampType

    out = []
    for f in spark_schema.fields:
        typ = pa.null()
        if f.name.lower() in wanted:
            if isinstance(f.dataType, TimestampType):
                typ = pa.timestamp("us")  # read as local wall-clock time, like a TIMESTAMP column
            else:
                try:
                    typ = to_arrow_type(f.dataType, timezone="UTC")
                except Exception:  # noqa: BLE001 - a type Arrow cannot carry: DuckDB will name it
                    typ = pa.binary()
        out.append(pa.field(f.name, typ))
    return pa.schema(out)


def _period_column(F: Any, period: str, period_type: str) -> Any:
    col = F.col(period)
    return {"DATE": col.cast("date"), "TIMESTAMP": col.cast("timestamp_ntz"), "BIGINT": col.cast("long")}[period_type]


def _literal(F: Any, value: Any, period_type: str) -> Any:
    if period_type == "BIGINT":
        return F.lit(int(value)).cast("long")
    text = value.isoformat() if hasattr(value, "isoformat") else str(value)
    return F.lit(text).cast("date" if period_type == "DATE" else "timestamp_ntz")


class SparkSource:
    """A job's Spark source (satisfies :class:`arflow.warehouse.contract.Source`); use as a context manager."""

    def __init__(self, spec: Any) -> None:
        self.src = spec.source
        self.options = spec.spark
        self.frequency = spec.settings.frequency
        self.timings: dict[str, float] = {}
        self.spark: Any = None
        self.df: Any = None
        self._owned = False
        self._tmp: tempfile.TemporaryDirectory | None = None
        self._duck: DuckDBSource | None = None
        self._checked: tuple[int, Any, int, Any] | None = None  # rows, latest period, series, first period

    def __enter__(self) -> "SparkSource":
        clock = time.perf_counter()
        self.spark, self._owned = start_session(self.options)
        self.timings["session"] = time.perf_counter() - clock
        try:
            self.df = self._read()
        except BaseException:
            self.close()
            raise
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        if self._duck is not None:
            self._duck.close()
            self._duck = None
        if self._tmp is not None:
            self._tmp.cleanup()
            self._tmp = None
        if self._owned and self.spark is not None:
            clock = time.perf_counter()
            self.spark.stop()
            self._owned = False
            self.timings["stop"] = time.perf_counter() - clock

    def _read(self) -> Any:
        from pyspark.errors import AnalysisException

        src = self.src
        if src.table is not None:
            name = ".".join(src.table)
            try:
                return self.spark.read.table(name)
            except AnalysisException as exc:
                if "TABLE_OR_VIEW_NOT_FOUND" in str(exc) or "not found" in str(exc).lower():
                    raise SourceError(
                        f"source table {name} not found in Spark's catalog; check source.table (or register the table or view first)"
                    ) from None
                raise SourceError(f"cannot read source table {name} ({one_line(exc)}); check source.table") from None
        try:
            return self.spark.read.parquet(src.parquet)
        except AnalysisException as exc:
            text = str(exc)
            if "PATH_NOT_FOUND" in text or "UNABLE_TO_INFER_SCHEMA" in text:
                raise SourceError(f"no parquet files match {src.parquet}; check source.parquet in the job file") from None
            raise SourceError(f"cannot read parquet {src.parquet} ({one_line(exc)}); check the files") from None

    def _run_spark(self, what: Any) -> Any:
        clock = time.perf_counter()
        try:
            return what()
        except ArflowError:
            raise
        except Exception as exc:  # noqa: BLE001
            raise SourceError(f"reading the source failed ({one_line(exc)}); check [source] in the job file") from None
        finally:
            self.timings["checks"] = self.timings.get("checks", 0.0) + time.perf_counter() - clock

    # -- checks, with the local sources' rules and messages -------------------------------
    def layout(self) -> SourceLayout:
        """Column names and types, checked by the DuckDB source's own rules (same one-line errors)."""
        if self._duck is None:
            src = self.src
            wanted = {c.lower() for c in (*src.keys, src.period, src.value)}
            schema = arrow_schema(self.df.schema, wanted)
            self._tmp = tempfile.TemporaryDirectory(prefix="arflow-spark-")
            path = Path(self._tmp.name) / "schema.parquet"
            pq.write_table(schema.empty_table(), path)
            spec = replace(src, database=None, parquet=str(path), table=None, query=None, engine="duckdb")
            self._duck = DuckDBSource(spec, self.frequency).__enter__()
        return self._duck.layout()

    def period_column(self) -> Any:
        """The period column cast to the checked period type."""
        from pyspark.sql import functions as F

        return _period_column(F, self.src.period, self.layout().period_type)

    def check_rows(self) -> int:
        """Row count; the row checks of :mod:`arflow.warehouse.checks` (same messages as every source)."""
        from pyspark.sql import functions as F

        src = self.src
        period = self.period_column()
        null_key = reduce(lambda a, b: a | b, [F.col(k).isNull() for k in src.keys])
        row = self._run_spark(lambda: self.df.agg(
            F.count(F.lit(1)),
            F.sum(F.when(null_key, 1).otherwise(0)),
            F.sum(F.when(F.col(src.period).isNull(), 1).otherwise(0)),
            F.max(period),
            F.count_distinct(*[F.col(k) for k in src.keys]),
            F.min(period),
            F.count(F.col(src.value)),
        ).first())
        counts = RowCounts(total=int(row[0]), values=int(row[6] or 0), null_keys=int(row[1] or 0),
                           null_periods=int(row[2] or 0))
        check_row_counts(counts, src.keys, src.period, src.value)
        self._checked = (counts.total, row[3], int(row[4]), row[5])
        return counts.total

    def latest_period(self) -> Any:
        if self._checked is None:
            self.check_rows()
        assert self._checked is not None
        return self._checked[1]

    def calendar(self) -> Any:
        """No calendar placement on Spark: an as-of is parsed as given."""
        return None

    def parse_as_of(self, text: Any) -> Any:
        self.layout()
        assert self._duck is not None
        return self._duck.parse_as_of(text)

    def place_as_of(self, text: Any) -> tuple[Any, Any]:
        """``(value, given)``: parsed as given (no calendar placement on Spark)."""
        value = self.parse_as_of(text)
        return value, value

    def example_rows_at(self, period: Any) -> None:
        """No example rows from Spark (it would cost another Spark job)."""
        return None

    def rows_to(self, as_of: Any) -> Any:
        """The rows at or before ``as_of``: keys, period (cast to its checked type) and value as double."""
        from pyspark.sql import functions as F

        src = self.src
        kept = self.df.where(self.period_column() <= _literal(F, as_of, self.layout().period_type))
        return kept.select(
            *[F.col(k) for k in src.keys], self.period_column().alias(src.period), F.col(src.value).cast("double").alias(src.value)
        )

    def stats(self, as_of: Any) -> SourceStats:
        """Rows, series and the first period at or before ``as_of``."""
        from pyspark.sql import functions as F

        if self._checked is not None and as_of == self._checked[1]:  # every row: counted by check_rows already
            return SourceStats(self._checked[0], self._checked[2], self._checked[3])
        src = self.src
        row = self._run_spark(lambda: self.rows_to(as_of).agg(
            F.count(F.lit(1)), F.count_distinct(*[F.col(k) for k in src.keys]), F.min(F.col(src.period))
        ).first())
        return SourceStats(int(row[0]), int(row[1]), row[2])
