"""``arflow.forecast`` on a Spark DataFrame: the same checks and results, computed by Spark tasks."""

from __future__ import annotations

from typing import Any

import polars as pl

from ...errors import SchemaError, SourceError, one_line
from ...frames import to_panel_inputs
from ...results import RESULT_TABLES, ForecastRun
from ...settings import Settings, refuse_series_fdr_on_spark
from .bucketing import bucket_count
from .session import require_pyspark
from .source import arrow_schema
from .tasks import BucketResult, run_buckets, task_job

#: series per bucket when a frame (not a job) is forecast
FRAME_CHUNK_SERIES = 50_000


def forecast_spark_frame(
    frame: Any, *, keys: list[str], period: str, value: str, settings: Settings, as_of: Any = None,
    partitions: int | None = None,
) -> ForecastRun:
    """:func:`arflow.forecast` on a Spark DataFrame: same checks, same results, computed by Spark tasks."""
    require_pyspark()
    refuse_series_fdr_on_spark(settings)
    if not keys:
        raise SchemaError("no key columns given; name at least one column that identifies a series")
    _check_columns(frame, keys, period, value, settings)
    rows, series, latest = _count(frame, keys, period)
    if rows == 0:
        raise SourceError("the source returned no rows; check the table, query or as-of period")
    n = bucket_count(frame.sparkSession, series, FRAME_CHUNK_SERIES, partitions)
    job = task_job(tuple(keys), period, value, settings, latest if as_of is None else as_of, n)
    return _merge(run_buckets(_selected(frame, keys, period, value), job).buckets, keys, settings)


def _check_columns(frame: Any, keys: list[str], period: str, value: str, settings: Settings) -> None:
    """The polars path's own column checks, on a zero-row table with this schema."""
    wanted = {c.lower() for c in (*keys, period, value)}
    empty = arrow_schema(frame.schema, wanted).empty_table()
    try:
        to_panel_inputs(empty, keys, period, value, settings.frequency)
    except SourceError as exc:
        if type(exc) is not SourceError:  # a SchemaError: a column is missing
            raise


def _count(frame: Any, keys: list[str], period: str) -> tuple[int, int, Any]:
    """(rows, series, latest period) of the frame."""
    from pyspark.sql import functions as F

    try:
        row = frame.agg(F.count(F.lit(1)), F.count_distinct(*[F.col(k) for k in keys]), F.max(F.col(period))).first()
    except Exception as exc:  # noqa: BLE001
        raise SourceError(f"reading the Spark DataFrame failed ({one_line(exc)})") from None
    return int(row[0]), int(row[1]), row[2]


def _selected(frame: Any, keys: list[str], period: str, value: str) -> Any:
    """Keys, period (a timestamp read as wall-clock time, as the job path reads it) and value."""
    from pyspark.sql import functions as F
    from pyspark.sql.types import TimestampType

    period_col = F.col(period)
    if isinstance(frame.schema[period].dataType, TimestampType):
        period_col = period_col.cast("timestamp_ntz").alias(period)
    return frame.select(*[F.col(k) for k in keys], period_col, F.col(value))


def _merge(buckets: list[BucketResult], keys: list[str], settings: Settings) -> ForecastRun:
    """One result from every bucket's, each table sorted by the keys."""
    frames = {}
    for name in RESULT_TABLES:
        parts = [f for f in (b.run.tables().get(name) for b in buckets) if f is not None and f.width]
        if not parts:
            continue
        merged = pl.concat([p for p in parts if p.height] or parts[:1], how="diagonal_relaxed")
        frames[name] = merged.sort(keys, maintain_order=True) if merged.height else merged
    return ForecastRun.from_tables(frames, as_of=buckets[0].run.as_of, settings=settings)
