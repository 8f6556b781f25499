"""The Spark engine's job-file keys and its errors before any Spark work (no Spark session needed)."""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

from arflow.cli import main
from arflow.errors import SettingsError
from arflow.job import run_job
from arflow.job_file import load_job, parse_job
from arflow.sample.panels import default_job, job_toml


def spark_job(**source: object) -> dict:
    job = default_job()
    del job["source"]["database"], job["source"]["table"]
    job["source"].update({"engine": "spark", "parquet": "data/readings", **source})
    job["publish"]["database"] = "out.duckdb"
    return job


def write(tmp_path: Path, sections: dict) -> Path:
    path = tmp_path / "job.toml"
    path.write_text(job_toml(sections), encoding="utf-8")
    return path


def parse(tmp_path: Path, sections: dict):
    return parse_job(sections, base_dir=tmp_path.resolve())


def test_engine_defaults_to_duckdb(tmp_path: Path) -> None:
    spec = load_job(write(tmp_path, default_job()))
    assert spec.source.engine == "duckdb" and spec.spark is None and spec.publish.lakehouse is None


def test_spark_source_keys(tmp_path: Path) -> None:
    spec = load_job(write(tmp_path, spark_job()))
    assert spec.source.engine == "spark" and spec.source.parquet == str(tmp_path.resolve() / "data" / "readings")
    assert spec.source.describe() == f"spark parquet {tmp_path.resolve() / 'data' / 'readings'}"
    assert spec.spark is not None and spec.spark.master is None and spec.spark.partitions is None

    job = spark_job(parquet="s3a://bucket/readings/")
    job["spark"] = {"master": "local[2]", "partitions": 8, "config": {"spark.driver.memory": "2g", "spark.sql.ansi.enabled": True}}
    spec = parse(tmp_path, job)
    assert spec.source.parquet == "s3a://bucket/readings/"
    assert spec.spark.master == "local[2]" and spec.spark.partitions == 8
    assert spec.spark.config == (("spark.driver.memory", "2g"), ("spark.sql.ansi.enabled", "true"))

    job = spark_job()
    del job["source"]["parquet"]
    job["source"]["table"] = "lake.water.readings"
    job["publish"] = {"lakehouse": "lake"}
    spec = parse(tmp_path, job)
    assert spec.source.table == ("lake", "water", "readings") and spec.source.describe() == "spark table lake.water.readings"
    assert spec.publish.database is None and spec.publish.lakehouse == tmp_path.resolve() / "lake"


def _drop(section: str, key: str):
    def apply(job: dict) -> dict:
        del job[section][key]
        return job
    return apply


def _set(section: str, key: str, value: object):
    def apply(job: dict) -> dict:
        job.setdefault(section, {})[key] = value
        return job
    return apply


@pytest.mark.parametrize(("edit", "needle"), [
    (_set("source", "engine", "flink"), 'source.engine = \'flink\' is not allowed; use "duckdb" / "spark"'),
    (_set("source", "database", "w.duckdb"), "source.database names a DuckDB file, which Spark does not read"),
    (_set("source", "query", "SELECT 1"), "source.query is not used with engine = \"spark\""),
    (_set("source", "table", "readings"), "exactly one of table (a Spark table) and parquet"),
    (_drop("source", "parquet"), "exactly one of table (a Spark table) and parquet"),
    (lambda j: _set("source", "table", "a.b.c.d")(_drop("source", "parquet")(j)), "source.table = 'a.b.c.d' is not allowed"),
    (_set("spark", "partitions", 0), "spark.partitions = 0 is not allowed; use an integer from 1 to 100000"),
    (_set("spark", "master", ""), "spark.master = '' is not allowed"),
    (_set("spark", "config", {"driver.memory": "2g"}), "spark.config: driver.memory = '2g' is not allowed"),
    (_set("spark", "workers", 2), "unknown spark.workers in job file"),
    (_drop("publish", "database"), "publish.database is missing; with a Spark source name the DuckDB file"),
])
def test_spark_key_errors(tmp_path: Path, edit, needle: str) -> None:
    with pytest.raises(SettingsError) as info:
        parse(tmp_path, edit(spark_job()))
    assert needle in str(info.value) and "\n" not in str(info.value)


def test_spark_section_needs_spark_engine(tmp_path: Path) -> None:
    job = default_job()
    job["spark"] = {"master": "local[2]"}
    with pytest.raises(SettingsError, match=r'\[spark\] is only used with \[source\] engine = "spark"'):
        load_job(write(tmp_path, job))


def test_without_the_extra_one_line_install_hint(tmp_path: Path, monkeypatch, capsys) -> None:
    monkeypatch.setitem(sys.modules, "pyspark", None)  # import pyspark now raises ImportError
    code = main(["run", str(write(tmp_path, spark_job()))])
    err = capsys.readouterr().err
    assert code == 2
    assert err == (
        "arflow: error: [source] engine = \"spark\" needs the spark extra, which is not installed; "
        "install it with: pip install 'arflow-gated[spark]'\n"
    )


def test_series_fdr_is_refused_with_spark(tmp_path: Path) -> None:
    job = spark_job()
    job["gates"]["series_fdr"] = 0.05
    with pytest.raises(SettingsError, match="gates.series_fdr adjusts p-values across all series"):
        run_job(load_job(write(tmp_path, job)))
