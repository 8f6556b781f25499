"""The Spark engine in local mode: same results as the DuckDB path, same errors, no partial runs.

One SparkSession (``local[2]``) for the module, started and stopped here.
Skipped only when pyspark or Java is missing; CI installs ``.[test,spark]``.
"""

from __future__ import annotations

import json
import os
import shutil
import sys
from pathlib import Path

import duckdb
import numpy as np
import polars as pl
import pytest

pytest.importorskip("pyspark", reason="the spark extra is not installed (pip install '.[test,spark]')")
if shutil.which("java") is None and not os.environ.get("JAVA_HOME"):
    pytest.skip("Java is not installed (Spark needs Java 17+)", allow_module_level=True)

import arflow  # noqa: E402
from arflow.engines.spark import bucketing  # noqa: E402
from arflow.engines.spark import tasks as spark_tasks  # noqa: E402
from arflow.cli import main  # noqa: E402
from arflow.errors import SchemaError, SourceError  # noqa: E402
from arflow.demo import prepare_demo  # noqa: E402
from arflow.job import run_job, validate_job  # noqa: E402
from arflow.job_file import load_job  # noqa: E402
from arflow.sample.panels import warehouse_state  # noqa: E402
from arflow.warehouse import delta_target as lake  # noqa: E402

pytestmark = [pytest.mark.spark, pytest.mark.filterwarnings("ignore::DeprecationWarning"),
              pytest.mark.filterwarnings("ignore::FutureWarning")]

KEYS = ["district", "zone"]
SORT = {"models": KEYS, "gates": KEYS + ["gate"], "residual_acf": KEYS + ["lag"], "forecasts": KEYS + ["step"],
        "series_status": KEYS, "backtests": KEYS + ["model", "step"], "accuracy": KEYS + ["period", "step"]}
RTOL = 1e-9


@pytest.fixture(scope="module")
def spark():
    from pyspark.sql import SparkSession

    old = os.environ.get("PYSPARK_PYTHON")
    os.environ["PYSPARK_PYTHON"] = sys.executable
    session = (
        SparkSession.builder.master("local[2]").appName("arflow-tests")
        .config("spark.sql.shuffle.partitions", "2")
        .config("spark.ui.enabled", "false")
        .config("spark.ui.showConsoleProgress", "false")
        .getOrCreate()
    )
    session.sparkContext.setLogLevel("ERROR")
    yield session
    session.stop()
    if old is None:
        os.environ.pop("PYSPARK_PYTHON", None)
    else:
        os.environ["PYSPARK_PYTHON"] = old


@pytest.fixture(scope="module")
def sample(tmp_path_factory) -> Path:
    """The sample warehouse run by the DuckDB path, its table exported to Parquet, and a Spark job file over it."""
    d = tmp_path_factory.mktemp("spark_sample")
    job_path = prepare_demo(d)
    assert run_job(load_job(job_path), as_of="2025-06").series_total > 250
    assert run_job(load_job(job_path)).series_total > 250  # a second vintage: earlier forecasts get scored
    con = duckdb.connect(str(d / "vellmar_water.duckdb"), read_only=True)
    try:
        con.execute(f"COPY (SELECT * FROM water.monthly_demand) TO '{d / 'zones.parquet'}' (FORMAT parquet)")
    finally:
        con.close()
    text = job_path.read_text(encoding="utf-8")
    source = 'database = "vellmar_water.duckdb"\ntable = "water.monthly_demand"'
    assert source in text
    text = text.replace(source, 'engine = "spark"\nparquet = "zones.parquet"')
    text = text.replace("[publish]\n", '[publish]\ndatabase = "spark_out.duckdb"\nlakehouse = "lake"\n')
    (d / "spark_job.toml").write_text(text + '\n[spark]\nmaster = "local[2]"\n', encoding="utf-8")
    return d


@pytest.fixture(scope="module")
def spark_run(spark, sample: Path) -> dict:
    """The sample job's two vintages run through Spark by the command line (json log of the second)."""
    import io

    assert main(["run", str(sample / "spark_job.toml"), "--as-of", "2025-06"], out=io.StringIO(), err=io.StringIO()) == 0
    out, err = io.StringIO(), io.StringIO()
    code = main(["run", str(sample / "spark_job.toml"), "--log-format", "json"], out=out, err=err)
    assert code == 0, err.getvalue()
    events = [json.loads(line) for line in out.getvalue().splitlines()]
    return {e["event"]: e for e in events}


def _tables(db: Path) -> dict[str, pl.DataFrame]:
    con = duckdb.connect(str(db), read_only=True)
    try:
        return {t: con.sql(f"SELECT * FROM arflow.{t}").pl().sort(["forecast_run_id" if t == "accuracy" else "run_id", *s],
                                                                   maintain_order=True)
                for t, s in SORT.items()}
    finally:
        con.close()


def assert_same(a: pl.DataFrame, b: pl.DataFrame, what: str) -> None:
    """Same rows and columns; decisions and texts equal; numbers equal to 1e-9 relative."""
    assert a.columns == b.columns and a.height == b.height, what
    for col in a.columns:
        x, y = a[col], b[col]
        if x.dtype == pl.List(pl.Float64):
            assert (x.list.len() == y.list.len()).all(), (what, col)
            x, y = x.explode(), y.explode()
        if x.dtype.is_float():
            xa, ya = x.to_numpy().astype(float), y.to_numpy().astype(float)
            assert np.array_equal(np.isnan(xa), np.isnan(ya)), (what, col)
            np.testing.assert_allclose(xa, ya, rtol=RTOL, atol=0, equal_nan=True, err_msg=f"{what}.{col}")
        else:
            assert x.equals(y, null_equal=True), (what, col)


def test_sample_warehouse_through_spark_equals_duckdb(sample: Path, spark_run: dict) -> None:
    duck, spark_tables = _tables(sample / "vellmar_water.duckdb"), _tables(sample / "spark_out.duckdb")
    for table in SORT:
        assert duck[table].height > 0, table
        assert_same(duck[table], spark_tables[table], table)
    assert duck["models"]["run_id"].n_unique() == 2 and duck["accuracy"]["recorded_by"].n_unique() == 1
    models = spark_tables["models"].filter(pl.col("run_id") == "vellmar_demand@2025-12-01")
    assert set(models["decision"]) == {"published", "quarantined"}
    # work spread: every task got exactly one bucket of many whole series
    info = spark_run["spark"]
    assert info["tasks"] == info["buckets"] >= 2
    assert min(info["series_per_task"]) > 20 and sum(info["series_per_task"]) == models.height
    finish = spark_run["finish"]
    assert finish["series_total"] == models.height and finish["chunks"] == info["buckets"]
    assert any("engine spark (local[2])" in n for n in finish["notes"])
    # the lakehouse copy: its published_forecasts equals the DuckDB view
    con = duckdb.connect(str(sample / "spark_out.duckdb"), read_only=True)
    try:
        view = con.sql("SELECT * FROM arflow.published_forecasts").pl()
    finally:
        con.close()
    got = lake.published_forecasts(sample / "lake")
    order = ["district", "zone", "run_id", "step"]
    assert got.sort(order).equals(view.sort(order)) and got.height > 0


def test_failing_task_leaves_no_partial_run(sample: Path, spark_run: dict, monkeypatch, capsys) -> None:
    db_before = warehouse_state(sample / "spark_out.duckdb")
    lake_before = lake.read_table(sample / "lake", "forecasts")
    markers_before = lake.committed_runs(sample / "lake")
    monkeypatch.setattr(spark_tasks, "_TEST_FAIL_BUCKET", 1)
    code = main(["run", str(sample / "spark_job.toml"), "--as-of", "2025-09"])  # a new vintage
    err = capsys.readouterr().err
    assert code == 3
    assert err.startswith("arflow: error: the Spark job failed (") and "test fault injected" in err
    assert "nothing was published" in err and len(err.strip().splitlines()) == 1
    assert warehouse_state(sample / "spark_out.duckdb") == db_before
    assert lake.committed_runs(sample / "lake").equals(markers_before)
    assert lake.read_table(sample / "lake", "forecasts").equals(lake_before)
    assert not (sample / "lake" / "arflow" / "_arflow" / "journal.json").exists()  # nothing left to settle


def _error(path: Path) -> tuple[type, str]:
    try:
        run_job(load_job(path))
    except Exception as exc:  # noqa: BLE001
        return type(exc), str(exc)
    raise AssertionError("no error")


def test_empty_source_and_missing_column_errors_match_duckdb(spark, sample: Path, tmp_path: Path) -> None:
    con = duckdb.connect()
    con.execute(f"COPY (SELECT * FROM '{sample / 'zones.parquet'}' LIMIT 0) TO '{tmp_path / 'empty.parquet'}' (FORMAT parquet)")
    con.close()
    shutil.copy(sample / "zones.parquet", tmp_path / "zones.parquet")
    base = (sample / "spark_job.toml").read_text(encoding="utf-8").replace('lakehouse = "lake"\n', "")
    duck_base = base.replace('engine = "spark"\n', "").replace('[spark]\nmaster = "local[2]"\n', "")
    cases = {
        "empty": ('parquet = "zones.parquet"', 'parquet = "empty.parquet"'),
        "missing column": ('value = "demand_ml"', 'value = "demand"'),
        "misspelt key": ('keys = ["district", "zone"]', 'keys = ["District", "zone"]'),
    }
    for name, (old, new) in cases.items():
        assert old in base, name
        (tmp_path / "s.toml").write_text(base.replace(old, new), encoding="utf-8")
        (tmp_path / "d.toml").write_text(duck_base.replace(old, new), encoding="utf-8")
        via_spark, via_duckdb = _error(tmp_path / "s.toml"), _error(tmp_path / "d.toml")
        assert via_spark == via_duckdb, name
        assert issubclass(via_spark[0], SourceError) and "\n" not in via_spark[1]
    assert not (tmp_path / "spark_out.duckdb").exists()


def test_spark_table_source_and_dataframe_api(spark, sample: Path, tmp_path: Path) -> None:
    frame = spark.read.parquet(str(sample / "zones.parquet"))
    frame.createOrReplaceTempView("monthly_demand")
    text = (sample / "spark_job.toml").read_text(encoding="utf-8").replace('parquet = "zones.parquet"', 'table = "monthly_demand"')
    (tmp_path / "t.toml").write_text(text, encoding="utf-8")
    report = validate_job(load_job(tmp_path / "t.toml"))
    assert report.source == "spark table monthly_demand" and report.series > 250
    assert dict(report.columns) == {"district": "VARCHAR", "zone": "VARCHAR", "month": "DATE", "demand_ml": "DOUBLE"}
    with pytest.raises(SourceError, match="source table nowhere not found in Spark's catalog"):
        (tmp_path / "n.toml").write_text(text.replace('table = "monthly_demand"', 'table = "nowhere"'), encoding="utf-8")
        run_job(load_job(tmp_path / "n.toml"))

    # arflow.forecast on a Spark DataFrame equals arflow.forecast on the same rows in polars
    spec = load_job(sample / "spark_job.toml")
    local = pl.read_parquet(sample / "zones.parquet")
    kw = dict(keys=KEYS, period="month", value="demand_ml", settings=spec.settings)
    want, got = arflow.forecast(local, **kw), arflow.forecast(frame, **kw)
    assert got.as_of == want.as_of
    for name in ("models", "gates", "residual_acf", "forecasts", "backtests"):  # rows come ordered by keys from Spark
        order = SORT[name]
        assert_same(getattr(want, name).sort(order), getattr(got, name).sort(order), name)
    # the API's errors are the polars path's
    for bad, exc in ((frame.drop("zone"), SchemaError), (frame.limit(0), SourceError)):
        with pytest.raises(exc) as from_spark:
            arflow.forecast(bad, **kw)
        with pytest.raises(exc) as from_polars:
            arflow.forecast(local.drop("zone") if exc is SchemaError else local.clear(), **kw)
        assert str(from_spark.value) == str(from_polars.value)


def test_bucket_labels_follow_spark_hash_partitioning(spark) -> None:
    from pyspark.sql import functions as F

    values = [0, 1, -1, 7, 2**31, -(2**40) + 3, 2**62 + 11]
    got = [r[0] for r in spark.createDataFrame([(v,) for v in values], "v long").select(F.hash("v")).collect()]
    assert bucketing.murmur3_long(np.array(values)).tolist() == got
    labels = bucketing.bucket_labels(5)
    parts = [r[0] for r in spark.createDataFrame([(v,) for v in labels], "v long").select(F.pmod(F.hash("v"), F.lit(5))).collect()]
    assert parts == [0, 1, 2, 3, 4]
