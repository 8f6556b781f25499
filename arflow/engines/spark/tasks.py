"""What one Spark task computes, and how its results travel back to the driver.

The protocol, one bucket of whole series per task:

1. the task hands its rows to :func:`arflow.run.forecast_frame` (the same call
   the local engine makes per chunk) and, for a job, keeps the recent actuals;
2. it returns every result table as Arrow IPC pieces in one binary column of
   rows ``(bucket, task, part, seq, series, seconds, data)``, plus an
   ``__as_of`` row, a ``__task`` row with its counts and timing, or a single
   ``__error`` row carrying an arflow error's class name and message;
3. the driver collects only those rows (never the raw data) with
   ``toArrow()`` and decodes them into one :class:`BucketResult` per bucket.
"""

from __future__ import annotations

import os
import time
from dataclasses import dataclass
from typing import Any

import polars as pl
import pyarrow as pa

from ... import errors
from ...errors import ArflowError, SourceError, one_line
from ...results import ForecastRun
from ...run import forecast_frame, recent_actuals
from ...settings import Settings
from .bucketing import bucket_labels, bucketed
from .session import best_effort

BUCKET = "__arflow_bucket"
#: Result pieces are cut to about this many bytes each (one binary value per piece).
PIECE_BYTES = 32 << 20
OUT_SCHEMA = "bucket int, task int, part string, seq int, series long, seconds double, data binary"
OUT_ARROW = pa.schema([
    ("bucket", pa.int32()), ("task", pa.int32()), ("part", pa.string()), ("seq", pa.int32()),
    ("series", pa.int64()), ("seconds", pa.float64()), ("data", pa.binary()),
])
ERROR, AS_OF, TASK, ACTUALS = "__error", "__as_of", "__task", "__actuals"

#: Test hook: the bucket index whose Spark task raises (set by tests, read on the driver).
_TEST_FAIL_BUCKET: int | None = None


@dataclass(frozen=True)
class TaskJob:
    """What each Spark task needs (pickled to the executors with the task function)."""

    keys: tuple[str, ...]
    period: str
    value: str
    settings: Settings
    as_of: Any
    labels: tuple[int, ...]
    fail_bucket: int | None = None
    #: periods of actuals to return per bucket (the job's accuracy tracking), None for none
    actuals_window: int | None = None


def task_job(
    keys: tuple[str, ...], period: str, value: str, settings: Settings, as_of: Any, buckets: int,
    actuals_window: int | None = None,
) -> TaskJob:
    """The task description for ``buckets`` buckets (the test fault hook is read here, on the driver)."""
    return TaskJob(tuple(keys), period, value, settings, as_of, tuple(bucket_labels(buckets)), _TEST_FAIL_BUCKET,
                   actuals_window)


# ---------------------------------------------------------------------------- in the task


def ipc_pieces(table: pa.Table) -> list[bytes]:
    """A table as Arrow IPC streams of at most about PIECE_BYTES each (an empty table keeps its schema)."""
    rows = table.num_rows
    per = max(1, int(rows * PIECE_BYTES / max(table.nbytes, 1))) if rows else 1
    options = pa.ipc.IpcWriteOptions(compression="lz4")
    out = []
    for offset in range(0, max(rows, 1), per):
        sink = pa.BufferOutputStream()
        with pa.ipc.new_stream(sink, table.schema, options=options) as writer:
            writer.write_table(table.slice(offset, per))
        out.append(sink.getvalue().to_pybytes())
    return out


def fit_bucket(job: TaskJob, table: pa.Table) -> pa.Table:
    """One Spark task: all rows of one bucket of whole series -> its result rows (see the module docstring)."""
    from pyspark import TaskContext

    started = time.perf_counter()
    ctx = TaskContext.get()
    task = ctx.partitionId() if ctx is not None else -1
    label = table.column(BUCKET)[0].as_py() if table.num_rows else job.labels[0]
    bucket = job.labels.index(label)
    if job.fail_bucket is not None and job.fail_bucket == bucket:
        raise RuntimeError(f"arflow test fault injected in the Spark task of bucket {bucket}")
    data = table.drop_columns([BUCKET])
    try:
        run = forecast_frame(data, list(job.keys), job.period, job.value, job.settings, job.as_of,
                             workers=1)  # Spark's tasks are the parallelism
    except ArflowError as exc:
        rows = [(bucket, task, ERROR, 0, 0, 0.0, f"{type(exc).__name__}\n{exc}".encode())]
    else:
        rows = _result_rows(job, bucket, task, data, run)
        rows.append((bucket, task, TASK, 0, run.series_total, time.perf_counter() - started, None))
    cols = list(zip(*rows))
    return pa.Table.from_arrays([pa.array(c, type=f.type) for c, f in zip(cols, OUT_ARROW)], schema=OUT_ARROW)


def _result_rows(job: TaskJob, bucket: int, task: int, data: pa.Table, run: ForecastRun) -> list[tuple]:
    """Every result table (and the actuals, the as-of label) of a bucket as IPC piece rows."""
    tables = {name: frame.to_arrow() for name, frame in run.tables().items() if frame is not None}
    if job.actuals_window is not None:
        tables[ACTUALS] = recent_actuals(data, list(job.keys), job.period, job.value, job.actuals_window).to_arrow()
    tables[AS_OF] = pl.DataFrame({"as_of": [run.as_of]}).to_arrow()
    return [(bucket, task, name, seq, 0, 0.0, blob)
            for name, table in tables.items() for seq, blob in enumerate(ipc_pieces(table))]


def _task_function(job: TaskJob) -> Any:
    def fit(table: pa.Table) -> pa.Table:
        return fit_bucket(job, table)

    return fit


# ---------------------------------------------------------------------------- on the driver


@dataclass(frozen=True)
class SparkStats:
    """How the work spread: tasks, buckets and series per task, and where the time went."""

    buckets: int
    tasks: int
    series_per_task: tuple[int, ...]
    task_seconds: tuple[float, ...]
    spark_seconds: float
    decode_seconds: float

    def describe(self, master: str) -> str:
        spt = self.series_per_task
        spread = f"{min(spt):,}" if min(spt) == max(spt) else f"{min(spt):,} to {max(spt):,}"
        return (
            f"engine spark ({master}): {self.tasks} task(s) over {self.buckets} bucket(s), {spread} series per task; "
            f"Spark job {self.spark_seconds:.1f} s (core in tasks {max(self.task_seconds):.1f} s at most), "
            f"collect and decode {self.decode_seconds:.1f} s"
        )


@dataclass(frozen=True)
class BucketResult:
    """One bucket's results and (for a job) its recent actuals."""

    run: ForecastRun
    actuals: pl.DataFrame | None


@dataclass(frozen=True)
class BucketResults:
    """Every bucket's results, in bucket order, and how the work spread."""

    buckets: list[BucketResult]
    stats: SparkStats


def run_buckets(data: Any, job: TaskJob) -> BucketResults:
    """Run the core per bucket inside Spark and bring the results (not the rows) to the driver.

    ``data`` is a Spark DataFrame with the key, period and value columns only.
    """
    grouped = bucketed(data, job.keys, job.labels, BUCKET).groupBy(BUCKET).applyInArrow(
        _task_function(job), schema=OUT_SCHEMA
    )
    clock = time.perf_counter()
    result = _collect(grouped, data.sparkSession)
    spark_seconds = time.perf_counter() - clock
    clock = time.perf_counter()
    _raise_task_error(result)
    buckets, per_task = _decode(result, job.settings)
    stats = SparkStats(
        buckets=len(job.labels),
        tasks=len(per_task),
        series_per_task=tuple(per_task[t][0] for t in sorted(per_task)) or (0,),
        task_seconds=tuple(per_task[t][1] for t in sorted(per_task)) or (0.0,),
        spark_seconds=spark_seconds,
        decode_seconds=time.perf_counter() - clock,
    )
    return BucketResults(buckets, stats)


def _collect(grouped: Any, spark: Any) -> pa.Table:
    """``toArrow()`` of the task results; a stop signal cancels this run's tasks, a failed task is one line."""
    tag = f"arflow-{os.getpid()}-{time.monotonic_ns()}"
    best_effort(spark, "addTag", tag)
    try:
        return grouped.toArrow()
    except KeyboardInterrupt:  # Ctrl-C / SIGTERM: stop this run's tasks, leave other work in the session alone
        best_effort(spark, "interruptTag", tag)
        raise
    except Exception as exc:  # noqa: BLE001 - any failed task, lost executor, ...
        raise SourceError(
            f"the Spark job failed ({one_line(exc)}); nothing was published; see the Spark log, then re-run"
        ) from None
    finally:
        best_effort(spark, "removeTag", tag)


def _raise_task_error(result: pa.Table) -> None:
    """Re-raise the first (lowest bucket) arflow error a task reported, as its own class."""
    found = sorted(
        (b, d) for b, p, d in zip(result.column("bucket").to_pylist(), result.column("part").to_pylist(),
                                  result.column("data").to_pylist()) if p == ERROR
    )
    if found:
        kind, _, message = found[0][1].decode().partition("\n")
        cls = getattr(errors, kind, None)
        raise (cls if isinstance(cls, type) and issubclass(cls, ArflowError) else SourceError)(message)


def _decode(result: pa.Table, settings: Settings) -> tuple[list[BucketResult], dict[int, tuple[int, float]]]:
    """Per bucket (in bucket order) its results; per task (series, seconds)."""
    pieces: dict[int, dict[str, list[tuple[int, pa.Table]]]] = {}
    per_task: dict[int, tuple[int, float]] = {}
    data = result.column("data")
    for i, (b, task, part, seq, series, seconds) in enumerate(zip(*(result.column(c).to_pylist() for c in (
            "bucket", "task", "part", "seq", "series", "seconds")))):
        if part == TASK:
            have = per_task.get(task, (0, 0.0))
            per_task[task] = (have[0] + series, have[1] + seconds)
            continue
        pieces.setdefault(b, {}).setdefault(part, []).append((seq, pa.ipc.open_stream(data[i].as_buffer()).read_all()))
    out = []
    for b in sorted(pieces):
        frames = {}
        for name, seq_tables in pieces[b].items():
            tables = [t for _, t in sorted(seq_tables, key=lambda st: st[0])]
            frames[name] = pl.from_arrow(pa.concat_tables(tables) if len(tables) > 1 else tables[0])
        as_of = frames.pop(AS_OF)["as_of"][0]
        actuals = frames.pop(ACTUALS, None)
        out.append(BucketResult(ForecastRun.from_tables(frames, as_of=as_of, settings=settings), actuals))
    return out, per_task
