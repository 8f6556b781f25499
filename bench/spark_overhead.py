"""Overhead of the Spark engine against the DuckDB path, on one machine, for the same job and data.

    python bench/spark_overhead.py                      # 100,000 series x 120 months, Spark local[2]
    python bench/spark_overhead.py --series 10000
    python bench/spark_overhead.py --series 100000 --master "local[2]" --partitions 4 --backtest

Builds a seeded warehouse (AR(1), seasonal AR and random-walk series,
monthly, one VARCHAR key) in a temporary folder, exports its table to Parquet
for Spark (Spark cannot read a DuckDB file), then runs ``arflow run JOB
--log-format json`` twice, each in a fresh process (interpreter, imports and,
for Spark, the JVM are part of the time):

* the DuckDB path: ``[source] database`` + ``table`` (the default engine);
* the Spark path: ``[source] engine = "spark"``, ``parquet`` = the export,
  ``[spark] master`` (default ``local[2]``), ``spark.driver.memory = 4g``.

Same model, gates, forecasts and publish target type for both (backtest off
unless ``--backtest``). Prints wall seconds, the Spark/DuckDB ratio, how the
work spread over Spark tasks (tasks, series per task) and where the Spark
path's time went: session start, the source checks (Spark jobs), the fitting
job (shuffle into buckets + the core inside the tasks), collecting and
decoding the results on the driver, and the publish. Both runs happen in the
same invocation, so their ratio is meaningful on a shared, noisy machine.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path


sys.path.insert(0, str(Path(__file__).resolve().parent))
from warehouse_scale import build_warehouse  # noqa: E402  (same seeded warehouse as the scale benchmark)

JOB = """\
[job]
name = "spark_bench"

[source]
{source}
keys = ["site"]
period = "period"
value = "value"
frequency = "month"

[model]
order = "auto"
max_order = 8
seasonal_lag = "auto"

[forecast]
horizon = 12
coverage = [0.8, 0.95]

[backtest]
enabled = {backtest}

[publish]
database = "{out}"

[run]
chunk_series = {chunk}
{spark}
"""


def build(db: Path, parquet: Path, G: int, T: int) -> None:
    """The seeded warehouse table ``readings`` (the scale benchmark's) and its Parquet export."""
    import duckdb

    build_warehouse(db, G, T)
    con = duckdb.connect(str(db))
    con.execute(f"COPY readings TO '{parquet}' (FORMAT parquet)")
    con.close()


def run(job: Path) -> dict:
    """``arflow run JOB --log-format json`` in a fresh process: wall seconds and its events."""
    t0 = time.perf_counter()
    proc = subprocess.run([sys.executable, "-m", "arflow", "run", str(job), "--log-format", "json"],
                          capture_output=True, text=True, env=dict(os.environ, PYSPARK_PYTHON=sys.executable))
    wall = time.perf_counter() - t0
    events = {}
    for line in proc.stdout.splitlines():
        if line.startswith("{"):
            event = json.loads(line)
            events[event["event"]] = event
    if proc.returncode not in (0, 4):
        raise SystemExit(f"arflow run {job} failed ({proc.returncode}): {proc.stderr.strip().splitlines()[-1:]}")
    return {"wall": wall, **events}


def floor(parquet: str, master: str, partitions: int) -> dict:
    """The Spark plumbing alone: the fitting job's read, bucketing, shuffle and hand-over to Python, no core."""
    import pyarrow as pa
    from pyspark.sql import functions as F

    from arflow import spark_engine as se
    from arflow.job_file import SparkOptions

    t0 = time.perf_counter()
    spark, _ = se.start_session(SparkOptions(master=master, config=(("spark.driver.memory", "4g"),)))
    session = time.perf_counter() - t0
    labels = se.bucket_labels(partitions)
    index = F.pmod(F.xxhash64(F.col("site")), F.lit(partitions)).cast("int")
    label = F.element_at(F.array(*[F.lit(v).cast("long") for v in labels]), index + 1)
    data = (spark.read.parquet(parquet).select("site", "period", F.col("value").cast("double").alias("value"))
            .withColumn(se.BUCKET, label).repartition(partitions, se.BUCKET))

    def rows(table: pa.Table) -> pa.Table:
        return pa.table({"n": pa.array([table.num_rows], pa.int64())})

    t1 = time.perf_counter()
    n = data.groupBy(se.BUCKET).applyInArrow(rows, schema="n long").toArrow().column("n").to_pylist()
    plumbing = time.perf_counter() - t1
    spark.stop()
    return {"session": session, "plumbing": plumbing, "rows": sum(n), "groups": len(n)}


def main() -> None:
    ap = argparse.ArgumentParser(description="Spark engine overhead against the DuckDB path")
    ap.add_argument("--series", type=int, default=100_000)
    ap.add_argument("--periods", type=int, default=120)
    ap.add_argument("--master", default="local[2]")
    ap.add_argument("--partitions", type=int, default=None, help="[spark] partitions (default: arflow's choice)")
    ap.add_argument("--chunk-series", type=int, default=50_000)
    ap.add_argument("--backtest", action="store_true", help="run the backtest too (both engines)")
    ap.add_argument("--floor-of", metavar="PARQUET", help=argparse.SUPPRESS)
    a = ap.parse_args()
    if a.floor_of:
        print(json.dumps(floor(a.floor_of, a.master, a.partitions or 2)))
        return
    with tempfile.TemporaryDirectory(prefix="arflow-spark-bench-") as tmp:
        d = Path(tmp)
        t0 = time.perf_counter()
        build(d / "warehouse.duckdb", d / "readings.parquet", a.series, a.periods)
        print(f"warehouse: {a.series:,} series x {a.periods} months built in {time.perf_counter() - t0:.1f}s")
        common = dict(backtest=str(a.backtest).lower(), chunk=a.chunk_series)
        spark_section = f'[spark]\nmaster = "{a.master}"\nconfig = {{ "spark.driver.memory" = "4g" }}\n'
        if a.partitions:
            spark_section += f"partitions = {a.partitions}\n"
        (d / "duck.toml").write_text(JOB.format(
            source=f'database = "{d / "warehouse.duckdb"}"\ntable = "readings"', out=d / "duck_out.duckdb", spark="", **common))
        (d / "spark.toml").write_text(JOB.format(
            source=f'engine = "spark"\nparquet = "{d / "readings.parquet"}"', out=d / "spark_out.duckdb",
            spark=spark_section, **common))
        duck = run(d / "duck.toml")
        spark = run(d / "spark.toml")
        tasks = spark.get("spark", {}).get("tasks", 2)
        out = subprocess.run([sys.executable, __file__, "--floor-of", str(d / "readings.parquet"), "--master", a.master,
                              "--partitions", str(tasks)], capture_output=True, text=True,
                             env=dict(os.environ, PYSPARK_PYTHON=sys.executable))
        plumbing = json.loads(out.stdout.strip().splitlines()[-1]) if out.returncode == 0 else None

    info = spark.get("spark", {})
    spt = info.get("series_per_task", [0])
    print(f"{'path':<14}{'wall s':>8}{'run s':>8}{'series':>10}{'published':>11}{'tasks':>7}{'series/task':>18}")
    for name, r, tasks, per in (("duckdb", duck, duck["finish"]["chunks"], "-"),
                                (f"spark {a.master}", spark, info.get("tasks", "?"),
                                 f"{min(spt):,}-{max(spt):,}" if min(spt) != max(spt) else f"{spt[0]:,}")):
        f = r["finish"]
        print(f"{name:<14}{r['wall']:>8.1f}{f['seconds']:>8.1f}{f['series_total']:>10,}{f['series_published']:>11,}"
              f"{tasks:>7}{per:>18}")
    same = (duck["finish"]["series_published"], duck["finish"]["reason_counts"]) == (
        spark["finish"]["series_published"], spark["finish"]["reason_counts"])
    print(f"spark / duckdb: {spark['wall'] / duck['wall']:.2f}x wall, {spark['finish']['seconds'] / duck['finish']['seconds']:.2f}x "
          f"run; decisions {'identical' if same else 'DIFFER'}")
    t = info.get("timings", {})
    task_s = info.get("task_seconds", [0.0])
    phases = spark["finish"].get("phase_seconds", {})
    other = spark["wall"] - spark["finish"]["seconds"]
    listed = sum(t.get(k, 0.0) for k in ("session", "checks", "spark_job", "decode")) + phases.get("publish", 0.0)
    print("where the Spark path's time went (s): "
          f"JVM + session start {t.get('session', 0):.1f}, source checks (Spark aggregations) {t.get('checks', 0):.1f}, "
          f"fitting job {t.get('spark_job', 0):.1f} (core inside tasks: {max(task_s):.1f} longest task, "
          f"{sum(task_s):.1f} summed over {len(task_s)}), collect + decode on the driver {t.get('decode', 0):.1f}, "
          f"publish {phases.get('publish', 0):.1f}, rest (schema check, staging, session stop) "
          f"{spark['finish']['seconds'] - listed:.1f}, interpreter start/exit {other:.1f}")
    if plumbing:
        print(f"the fitting job's plumbing alone (same read, bucketing into {plumbing['groups']} tasks, shuffle and "
              f"Arrow hand-over to Python, a no-op instead of the core): {plumbing['plumbing']:.1f} s "
              f"of the fitting job's {t.get('spark_job', 0):.1f} s")
    dp = duck["finish"].get("phase_seconds", {})
    print("DuckDB path (s): " + ", ".join(f"{k} {v:.1f}" for k, v in dp.items())
          + f", interpreter start/exit {duck['wall'] - duck['finish']['seconds']:.1f}")


if __name__ == "__main__":
    main()
