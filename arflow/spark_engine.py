"""The Spark edge: run a job's statistical core inside Spark, on buckets of whole series.

This is the only module that imports pyspark, and it does so lazily, so
arflow works without the ``spark`` extra until a job asks for
``[source] engine = "spark"`` (or :func:`arflow.forecast` is given a Spark
DataFrame).

How a run goes:

1. The source (a Spark table or Parquet path) is checked like the DuckDB
   path checks its source, with the same one-line errors: the column names
   and types go through :class:`~arflow.warehouse.duckdb_source.DuckDBSource`
   (on a zero-row Parquet file with the Spark schema), and one Spark
   aggregation counts rows, NULL keys and NULL periods.
2. Each series is hash-bucketed by its keys into ``B`` buckets (``B`` =
   ``[spark] partitions``, by default one per 10,000 series (or per
   ``run.chunk_series`` if smaller) and at least Spark's default parallelism). The rows are repartitioned into ``B``
   partitions by bucket so that each task holds exactly one bucket of many
   whole series, and ``groupBy(bucket).applyInArrow`` hands each bucket to
   :func:`arflow.api.forecast` as a pyarrow Table -- the same call the DuckDB
   path makes per chunk. The core never imports Spark; no pandas conversion
   happens (pyspark only checks that pandas is importable).
3. Each task returns its result tables as Arrow IPC streams in a binary
   column; the driver collects those results (never the raw rows) with
   ``toArrow()`` and hands one :class:`~arflow.api.ForecastRun` per bucket to
   the job, which publishes them in one transaction as usual.

Why the numbers equal the DuckDB path's: order selection, unit-root tests,
diagnostics, forecasts and gates are all per series, so which other series
share a chunk does not change a series' results. The one gate that looks
across series, ``gates.series_fdr`` (Benjamini-Hochberg over all series of a
run), is refused with the Spark engine.
"""

from __future__ import annotations

import importlib.util
import os
import sys
import tempfile
import time
import warnings
from dataclasses import dataclass, fields
from functools import reduce
from pathlib import Path
from typing import Any

import numpy as np
import polars as pl
import pyarrow as pa
import pyarrow.parquet as pq

from . import api, errors
from .errors import ArflowError, SchemaError, SettingsError, SourceError
from .settings import Settings
from .warehouse.contract import SourceLayout, SourceStats
from .warehouse.duckdb_source import DuckDBSource

#: the project's own distribution name (the import package and command stay ``arflow``)
INSTALL_HINT = "pip install 'arflow-gated[spark]'"
BUCKET = "__arflow_bucket"
#: Result pieces are cut to about this many bytes each (one binary value per piece).
PIECE_BYTES = 32 << 20
_OUT_SCHEMA = "bucket int, task int, part string, seq int, series long, seconds double, data binary"
_OUT_ARROW = pa.schema([
    ("bucket", pa.int32()), ("task", pa.int32()), ("part", pa.string()), ("seq", pa.int32()),
    ("series", pa.int64()), ("seconds", pa.float64()), ("data", pa.binary()),
])
SERIES_FDR_MESSAGE = (
    'gates.series_fdr adjusts p-values across all series of a run, which engine = "spark" does not support; '
    "leave series_fdr out, or run this job with the DuckDB engine"
)

#: Test hook: the bucket index whose Spark task raises (set by tests, read on the driver).
_TEST_FAIL_BUCKET: int | None = None


# ------------------------------------------------------------------------------ pyspark, session


def require_pyspark() -> None:
    """Raise a one-line error unless pyspark 4 (and the pandas it checks for) can be imported."""
    try:
        import pyspark
    except ImportError:
        raise SettingsError(
            f'[source] engine = "spark" needs the spark extra, which is not installed; install it with: {INSTALL_HINT}'
        ) from None
    major = int(str(pyspark.__version__).split(".")[0])
    if major < 4:
        raise SettingsError(
            f'engine = "spark" needs pyspark 4.0 or later (found {pyspark.__version__}); upgrade with: pip install -U \'arflow-gated[spark]\''
        )
    # pyspark warns about pandas versions before Arrow UDFs; arflow never converts to pandas
    warnings.filterwarnings("ignore", message="PySpark does not yet fully support pandas", category=FutureWarning)
    if importlib.util.find_spec("pandas") is None:
        raise SettingsError(
            'engine = "spark" needs pandas importable (pyspark checks for it before any Arrow UDF, though arflow passes '
            "Arrow only); install it with: pip install 'pyspark[sql]>=4.0'"
        )


def _one_line(exc: BaseException) -> str:
    """A short one-line description of a Spark/Py4J error (the Python worker's own last line if any)."""
    text = str(exc).strip()
    lines = [ln.strip() for ln in text.splitlines() if ln.strip()]
    if not lines:
        return type(exc).__name__
    if "Traceback" in text:  # a Python worker error: its last line names the exception
        tail = [ln for ln in lines if not ln.startswith(("at ", "File ", "^", "~"))]
        return " ".join(tail[-1].split())[:300]
    return " ".join(lines[0].split())[:300]


def start_session(options: Any = None) -> tuple[Any, bool]:
    """The active SparkSession, or a new one from ``[spark]``; returns (session, started_here)."""
    require_pyspark()
    from pyspark.sql import SparkSession

    active = SparkSession.getActiveSession()
    if active is not None:
        return active, False
    master = getattr(options, "master", None)
    builder = SparkSession.builder.appName("arflow").config("spark.ui.showConsoleProgress", "false")
    if master is None and "PYSPARK_GATEWAY_PORT" not in os.environ:  # not under spark-submit
        master = "local[*]"
    if master is not None:
        builder = builder.master(master)
        if master.startswith("local"):
            # local workers must run this interpreter (which has arflow and pyarrow)
            if not os.environ.get("PYSPARK_PYTHON"):
                os.environ["PYSPARK_PYTHON"] = sys.executable
    for key, value in getattr(options, "config", ()) or ():
        builder = builder.config(key, value)
    try:
        spark = builder.getOrCreate()
    except Exception as exc:  # noqa: BLE001 - Java missing, bad master, ...
        raise SourceError(
            f"cannot start Spark ({_one_line(exc)}); check that Java 17+ is installed (JAVA_HOME) and spark.master is right"
        ) from None
    try:
        spark.sparkContext.setLogLevel("ERROR")  # a session arflow starts: errors only on stderr
    except Exception:  # noqa: BLE001
        pass
    return spark, True


# ------------------------------------------------------------------------------------ bucketing


def _murmur3_long(values: np.ndarray, seed: int = 42) -> np.ndarray:
    """Spark's ``hash()`` of BIGINT values (Murmur3 x86 32-bit, seed 42), vectorised."""
    m = np.uint64(0xFFFFFFFF)
    v = values.astype(np.int64).view(np.uint64)

    def rotl(x: np.ndarray, r: int) -> np.ndarray:
        return ((x << np.uint64(r)) | (x >> np.uint64(32 - r))) & m

    def mix_k1(k: np.ndarray) -> np.ndarray:
        k = (k * np.uint64(0xCC9E2D51)) & m
        k = rotl(k, 15)
        return (k * np.uint64(0x1B873593)) & m

    def mix_h1(h: np.ndarray, k: np.ndarray) -> np.ndarray:
        h = h ^ k
        h = rotl(h, 13)
        return (h * np.uint64(5) + np.uint64(0xE6546B64)) & m

    h = np.full(v.shape, np.uint64(seed))
    h = mix_h1(h, mix_k1(v & m))
    h = mix_h1(h, mix_k1((v >> np.uint64(32)) & m))
    h = h ^ np.uint64(8)
    h = h ^ (h >> np.uint64(16))
    h = (h * np.uint64(0x85EBCA6B)) & m
    h = h ^ (h >> np.uint64(13))
    h = (h * np.uint64(0xC2B2AE35)) & m
    h = h ^ (h >> np.uint64(16))
    return h.astype(np.uint32).view(np.int32).astype(np.int64)


def bucket_labels(n: int) -> list[int]:
    """``n`` BIGINT labels; label ``i`` lands in partition ``i`` of ``repartition(n, label)``.

    Spark's hash partitioner puts a row in ``pmod(hash(label), n)``. Choosing
    labels that hash to 0..n-1 gives each of the ``n`` tasks exactly one bucket.
    """
    labels = np.full(n, -1, dtype=np.int64)
    start, width = 0, 8 * n + 64
    while (labels < 0).any():
        cand = np.arange(start, start + width, dtype=np.int64)
        part = np.mod(_murmur3_long(cand), n)
        _, first = np.unique(part, return_index=True)
        for p, idx in zip(np.unique(part), first):
            if labels[p] < 0:
                labels[p] = cand[idx]
        start += width
    return labels.tolist()


# ------------------------------------------------------------------------------------ the task


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


def _run_frames(run: api.ForecastRun) -> dict[str, pl.DataFrame]:
    """Every result table of a run (models, gates, residual_acf, forecasts and any later ones such as backtests)."""
    return {f.name: getattr(run, f.name) for f in fields(run) if isinstance(getattr(run, f.name), pl.DataFrame)}


def _ipc_pieces(table: pa.Table) -> list[bytes]:
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
    """One Spark task: all rows of one bucket of whole series -> its result tables as IPC pieces."""
    from pyspark import TaskContext

    started = time.perf_counter()
    ctx = TaskContext.get()
    task = ctx.partitionId() if ctx is not None else -1
    label = table.column(BUCKET)[0].as_py() if table.num_rows else job.labels[0]
    bucket = job.labels.index(label)
    if job.fail_bucket is not None and job.fail_bucket == bucket:
        raise RuntimeError(f"arflow test fault injected in the Spark task of bucket {bucket}")
    rows: list[tuple] = []
    data = table.drop_columns([BUCKET])
    try:
        run = api.forecast(
            data, keys=list(job.keys), period=job.period, value=job.value, settings=job.settings, as_of=job.as_of,
        )
    except ArflowError as exc:
        rows.append((bucket, task, "__error", 0, 0, 0.0, f"{type(exc).__name__}\n{exc}".encode()))
    else:
        frames = _run_frames(run)
        if job.actuals_window is not None:
            from .job import _actuals  # the DuckDB path's own rule for the rows kept as actuals

            frames["__actuals"] = _actuals(pl.from_arrow(data), list(job.keys), job.period, job.value, job.actuals_window)
        for name, frame in frames.items():
            for seq, blob in enumerate(_ipc_pieces(frame.to_arrow())):
                rows.append((bucket, task, name, seq, 0, 0.0, blob))
        as_of = pl.DataFrame({"as_of": [run.as_of]}).to_arrow()
        rows.append((bucket, task, "__as_of", 0, 0, 0.0, _ipc_pieces(as_of)[0]))
        rows.append((bucket, task, "__task", 0, run.series_total, time.perf_counter() - started, None))
    cols = list(zip(*rows))
    return pa.Table.from_arrays([pa.array(c, type=f.type) for c, f in zip(cols, _OUT_ARROW)], schema=_OUT_ARROW)


def _task_function(job: TaskJob):
    def fit(table: pa.Table) -> pa.Table:
        return fit_bucket(job, table)

    return fit


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
class BucketResults:
    """Per bucket (in bucket order): the run, its as-of label and (job path) its actuals; plus the stats."""

    runs: list[api.ForecastRun]
    as_ofs: list[Any]
    actuals: list[pl.DataFrame | None]
    stats: SparkStats


def run_buckets(data: Any, job: TaskJob) -> BucketResults:
    """Run ``api.forecast`` per bucket inside Spark and bring the results (not the rows) to the driver.

    ``data`` is a Spark DataFrame with the key, period and value columns only.
    """
    from pyspark.sql import functions as F

    n = len(job.labels)
    index = F.pmod(F.xxhash64(*[F.col(k) for k in job.keys]), F.lit(n)).cast("int")
    label = F.element_at(F.array(*[F.lit(v).cast("long") for v in job.labels]), index + 1)
    bucketed = data.withColumn(BUCKET, label).repartition(n, BUCKET)
    grouped = bucketed.groupBy(BUCKET).applyInArrow(_task_function(job), schema=_OUT_SCHEMA)
    clock = time.perf_counter()
    spark = data.sparkSession
    tag = f"arflow-{os.getpid()}-{time.monotonic_ns()}"
    _call(spark, "addTag", tag)
    try:
        result = grouped.toArrow()
    except KeyboardInterrupt:  # Ctrl-C / SIGTERM: stop this run's tasks, leave other work in the session alone
        _call(spark, "interruptTag", tag)
        raise
    except Exception as exc:  # noqa: BLE001 - any failed task, lost executor, ...
        raise SourceError(
            f"the Spark job failed ({_one_line(exc)}); nothing was published; see the Spark log, then re-run"
        ) from None
    finally:
        _call(spark, "removeTag", tag)
    spark_seconds = time.perf_counter() - clock
    clock = time.perf_counter()
    buckets = result.column("bucket").to_pylist()
    tasks = result.column("task").to_pylist()
    parts = result.column("part").to_pylist()
    seqs = result.column("seq").to_pylist()
    series = result.column("series").to_pylist()
    seconds = result.column("seconds").to_pylist()
    data_col = result.column("data")
    errors_found = sorted((b, data_col[i].as_py()) for i, (b, p) in enumerate(zip(buckets, parts)) if p == "__error")
    if errors_found:
        kind, _, message = errors_found[0][1].decode().partition("\n")
        cls = getattr(errors, kind, None)
        raise (cls if isinstance(cls, type) and issubclass(cls, ArflowError) else SourceError)(message)
    pieces: dict[int, dict[str, list[tuple[int, pa.Table]]]] = {}
    per_task_series: dict[int, int] = {}
    per_task_seconds: dict[int, float] = {}
    for i, (b, p) in enumerate(zip(buckets, parts)):
        if p == "__task":
            per_task_series[tasks[i]] = per_task_series.get(tasks[i], 0) + series[i]
            per_task_seconds[tasks[i]] = per_task_seconds.get(tasks[i], 0.0) + seconds[i]
            continue
        table = pa.ipc.open_stream(data_col[i].as_buffer()).read_all()
        pieces.setdefault(b, {}).setdefault(p, []).append((seqs[i], table))
    runs, as_ofs, actuals = [], [], []
    for b in sorted(pieces):
        frames = {}
        for name, seq_tables in pieces[b].items():
            tables = [t for _, t in sorted(seq_tables, key=lambda st: st[0])]
            frame = pl.from_arrow(pa.concat_tables(tables) if len(tables) > 1 else tables[0])
            frames[name] = frame
        as_ofs.append(frames.pop("__as_of")["as_of"][0])
        actuals.append(frames.pop("__actuals", None))
        kwargs = {f.name: frames.get(f.name) for f in fields(api.ForecastRun) if f.name not in ("as_of", "settings")}
        runs.append(api.ForecastRun(**kwargs, as_of=as_ofs[-1], settings=job.settings))
    stats = SparkStats(
        buckets=n,
        tasks=len(per_task_series),
        series_per_task=tuple(per_task_series[t] for t in sorted(per_task_series)) or (0,),
        task_seconds=tuple(per_task_seconds[t] for t in sorted(per_task_seconds)) or (0.0,),
        spark_seconds=spark_seconds,
        decode_seconds=time.perf_counter() - clock,
    )
    return BucketResults(runs, as_ofs, actuals, stats)


def _call(spark: Any, method: str, *args: Any) -> None:
    """Best effort session call (job tags are missing on some session kinds)."""
    try:
        getattr(spark, method)(*args)
    except Exception:  # noqa: BLE001
        pass


def _default_parallelism(spark: Any) -> int:
    try:
        return int(spark.sparkContext.defaultParallelism)
    except Exception:  # noqa: BLE001 - e.g. Spark Connect has no SparkContext
        return 2


#: Default series per Spark task (bucket). Measured with bench/spark_overhead.py on 2 cores at
#: 100,000 series: buckets of 3,000 to 12,500 series took about the same time, two buckets of
#: 50,000 about 1.7x as long (a huge group is sorted, spilled and concatenated as one table).
SERIES_PER_TASK = 10_000


def _bucket_count(spark: Any, series: int, chunk_series: int, partitions: int | None) -> int:
    """``[spark] partitions``, else one bucket per ``min(chunk_series, SERIES_PER_TASK)`` series, at least the parallelism."""
    if partitions is not None:
        return partitions
    per = min(chunk_series, SERIES_PER_TASK)
    return max(1, min(max(series, 1), max(-(-series // per), _default_parallelism(spark))))


def _master(spark: Any) -> str:
    try:
        return str(spark.conf.get("spark.master"))
    except Exception:  # noqa: BLE001
        return "spark"


# -------------------------------------------------------------------------------------- schema


def _arrow_schema(spark_schema: Any, wanted: set[str]) -> pa.Schema:
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


# ---------------------------------------------------------------------------------- the source


class SparkSource:
    """A job's Spark source with the interface the job uses of ``DuckDBSource``; use as a context manager."""

    def __init__(self, spec: Any) -> None:
        if spec.settings.gates.series_fdr is not None:
            raise SettingsError(SERIES_FDR_MESSAGE)
        self.spec = spec
        self.src = spec.source
        self.options = spec.spark
        self.frequency = spec.settings.frequency
        self.notes: list[str] = []
        self.timings: dict[str, float] = {}
        self.run_stats: SparkStats | None = None
        #: per bucket, the rows the job keeps as actuals (for scoring earlier vintages)
        self.actuals: list[pl.DataFrame | None] = []
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
                raise SourceError(f"cannot read source table {name} ({_one_line(exc)}); check source.table") from None
        try:
            return self.spark.read.parquet(src.parquet)
        except AnalysisException as exc:
            text = str(exc)
            if "PATH_NOT_FOUND" in text or "UNABLE_TO_INFER_SCHEMA" in text:
                raise SourceError(f"no parquet files match {src.parquet}; check source.parquet in the job file") from None
            raise SourceError(f"cannot read parquet {src.parquet} ({_one_line(exc)}); check the files") from None

    def _run_spark(self, what: Any) -> Any:
        try:
            return what()
        except ArflowError:
            raise
        except Exception as exc:  # noqa: BLE001
            raise SourceError(f"reading the source failed ({_one_line(exc)}); check [source] in the job file") from None

    # -- checks, with the DuckDB path's messages --------------------------------------------
    def layout(self) -> SourceLayout:
        """Column names and types, checked by the DuckDB path's own rules (same one-line errors)."""
        if self._duck is None:
            src = self.src
            wanted = {c.lower() for c in (*src.keys, src.period, src.value)}
            schema = _arrow_schema(self.df.schema, wanted)
            self._tmp = tempfile.TemporaryDirectory(prefix="arflow-spark-")
            path = Path(self._tmp.name) / "schema.parquet"
            pq.write_table(schema.empty_table(), path)
            from dataclasses import replace

            spec = replace(src, database=None, parquet=str(path), table=None, query=None, engine="duckdb")
            self._duck = DuckDBSource(spec, self.frequency).__enter__()
        return self._duck.layout()

    def _period(self) -> Any:
        from pyspark.sql import functions as F

        return _period_column(F, self.src.period, self.layout().period_type)

    def check_rows(self) -> int:
        """Row count; rejects an empty source and rows with NULL keys or periods (same messages as DuckDB)."""
        from pyspark.sql import functions as F

        src = self.src
        period = self._period()
        null_key = reduce(lambda a, b: a | b, [F.col(k).isNull() for k in src.keys])
        clock = time.perf_counter()
        row = self._run_spark(lambda: self.df.agg(
            F.count(F.lit(1)),
            F.sum(F.when(null_key, 1).otherwise(0)),
            F.sum(F.when(F.col(src.period).isNull(), 1).otherwise(0)),
            F.max(period),
            F.count_distinct(*[F.col(k) for k in src.keys]),
            F.min(period),
        ).first())
        self.timings["checks"] = self.timings.get("checks", 0.0) + time.perf_counter() - clock
        total, null_keys, null_periods, latest = row[0], row[1] or 0, row[2] or 0, row[3]
        if total == 0:
            raise SourceError("the source has no rows; check source.table / source.query (or the parquet files)")
        if null_keys:
            raise SourceError(
                f"the source has {null_keys} row(s) with a NULL key ({', '.join(src.keys)}); "
                "filter them out or fill them in with a [source] query"
            )
        if null_periods:
            raise SourceError(
                f"the source has {null_periods} row(s) with a NULL period ({src.period}); "
                "filter them out with a [source] query"
            )
        self._checked = (int(total), latest, int(row[4]), row[5])
        return int(total)

    def latest_period(self) -> Any:
        if self._checked is None:
            self.check_rows()
        assert self._checked is not None
        return self._checked[1]

    def parse_as_of(self, text: Any) -> Any:
        self.layout()
        assert self._duck is not None
        return self._duck.parse_as_of(text)

    def _rows_to(self, as_of: Any) -> Any:
        from pyspark.sql import functions as F

        return self.df.where(self._period() <= _literal(F, as_of, self.layout().period_type))

    def stats(self, as_of: Any) -> SourceStats:
        """Rows, series and the first period at or before ``as_of``."""
        from pyspark.sql import functions as F

        if self._checked is not None and as_of == self._checked[1]:  # every row: counted by check_rows already
            return SourceStats(self._checked[0], self._checked[2], self._checked[3])
        clock = time.perf_counter()
        row = self._run_spark(lambda: self._rows_to(as_of).agg(
            F.count(F.lit(1)), F.count_distinct(*[F.col(k) for k in self.src.keys]), F.min(self._period())
        ).first())
        self.timings["checks"] = self.timings.get("checks", 0.0) + time.perf_counter() - clock
        return SourceStats(int(row[0]), int(row[1]), row[2])

    # -- the work -------------------------------------------------------------------------------
    def task_count(self, series: int, chunk_series: int) -> int:
        """Buckets (= tasks) for ``series`` series (see :func:`_bucket_count`)."""
        return _bucket_count(self.spark, series, chunk_series, getattr(self.options, "partitions", None))

    def forecast_chunks(self, as_of: Any, n_tasks: int, series: int, emit: Any) -> list[api.ForecastRun]:
        """Fit every series in Spark tasks; one ForecastRun per bucket (same numbers as the DuckDB path)."""
        from pyspark.sql import functions as F

        src = self.src
        data = self._rows_to(as_of).select(
            *[F.col(k) for k in src.keys], self._period().alias(src.period), F.col(src.value).cast("double").alias(src.value)
        )
        settings = self.spec.settings
        window = 2 * max(settings.forecast.horizon, settings.backtest.horizon or 0)
        job = TaskJob(tuple(src.keys), src.period, src.value, settings, as_of,
                      tuple(bucket_labels(n_tasks)), _TEST_FAIL_BUCKET, window)
        results = run_buckets(data, job)
        runs, stats = results.runs, results.stats
        self.actuals = results.actuals
        self.run_stats = stats
        self.timings["spark_job"] = stats.spark_seconds
        self.timings["decode"] = stats.decode_seconds
        done = 0
        for i, run in enumerate(runs, 1):
            done += run.series_total
            emit({"event": "chunk", "chunk": i, "chunks": len(runs), "series_done": done, "series_total": series})
        master = _master(self.spark)
        emit({
            "event": "spark", "master": master, "buckets": stats.buckets, "tasks": stats.tasks,
            "series_per_task": list(stats.series_per_task), "task_seconds": [round(s, 3) for s in stats.task_seconds],
            "timings": {k: round(v, 3) for k, v in self.timings.items()},
        })
        self.notes.append(stats.describe(master))
        return runs


# -------------------------------------------------------------------------------- the Python API


def forecast_spark_frame(
    frame: Any,
    *,
    keys: list[str],
    period: str,
    value: str,
    settings: Settings,
    as_of: Any = None,
    partitions: int | None = None,
) -> api.ForecastRun:
    """:func:`arflow.forecast` on a Spark DataFrame: same checks, same results, computed by Spark tasks."""
    require_pyspark()
    from pyspark.sql import functions as F

    from .frames import to_panel_inputs

    if settings.gates.series_fdr is not None:
        raise SettingsError(SERIES_FDR_MESSAGE)
    if not keys:
        raise SchemaError("no key columns given; name at least one column that identifies a series")
    # column checks: the polars path's own, on a zero-row table with this schema
    wanted = {c.lower() for c in (*keys, period, value)}
    empty = _arrow_schema(frame.schema, wanted).empty_table()
    try:
        to_panel_inputs(empty, keys, period, value, settings.frequency)
    except SourceError as exc:
        if type(exc) is not SourceError:  # a SchemaError: a column is missing
            raise
    spark = frame.sparkSession
    try:
        row = frame.agg(
            F.count(F.lit(1)), F.count_distinct(*[F.col(k) for k in keys]), F.max(F.col(period))
        ).first()
    except Exception as exc:  # noqa: BLE001
        raise SourceError(f"reading the Spark DataFrame failed ({_one_line(exc)})") from None
    if row[0] == 0:
        raise SourceError("the source returned no rows; check the table, query or as-of period")
    if as_of is None:
        as_of = row[2]
    n = _bucket_count(spark, int(row[1]), 50_000, partitions)
    from pyspark.sql.types import TimestampType

    period_col = F.col(period)
    if isinstance(frame.schema[period].dataType, TimestampType):
        period_col = period_col.cast("timestamp_ntz").alias(period)  # wall-clock time, as the job path reads it
    data = frame.select(*[F.col(k) for k in keys], period_col, F.col(value))
    job = TaskJob(tuple(keys), period, value, settings, as_of, tuple(bucket_labels(n)), _TEST_FAIL_BUCKET)
    results = run_buckets(data, job)
    runs, as_ofs = results.runs, results.as_ofs
    frames = {}
    for name in _run_frames(runs[0]):
        parts = [f for f in (_run_frames(r).get(name) for r in runs) if f is not None and f.width]
        merged = pl.concat([p for p in parts if p.height] or parts[:1], how="diagonal_relaxed")
        frames[name] = merged.sort(keys, maintain_order=True) if merged.height else merged
    kwargs = {f.name: frames.get(f.name) for f in fields(api.ForecastRun) if f.name not in ("as_of", "settings")}
    return api.ForecastRun(**kwargs, as_of=as_ofs[0], settings=settings)


def is_spark_frame(frame: Any) -> bool:
    """True for a Spark DataFrame (duck-typed: pyspark is not imported)."""
    return type(frame).__module__.startswith("pyspark.") and hasattr(frame, "sparkSession") and hasattr(frame, "groupBy")


__all__ = ["SparkSource", "forecast_spark_frame", "is_spark_frame", "require_pyspark", "start_session", "bucket_labels"]
