"""Job-file parsing: defaults, paths, and one-line errors naming the key."""

from __future__ import annotations

from pathlib import Path

import pytest

from arflow.errors import SettingsError
from arflow.job_file import load_job
from arflow.sample.panels import default_job, job_toml


def write(tmp_path: Path, sections: dict) -> Path:
    path = tmp_path / "job.toml"
    path.write_text(job_toml(sections), encoding="utf-8")
    return path


def test_defaults_and_relative_paths(tmp_path: Path) -> None:
    spec = load_job(write(tmp_path, default_job()))
    assert spec.name == "meters"
    assert spec.source.database == tmp_path.resolve() / "warehouse.duckdb"
    assert spec.publish.database == spec.source.database
    assert spec.publish.schema == "arflow" and spec.publish.on_failure == "keep-previous"
    assert spec.settings.forecast.coverage == (0.8, 0.95)
    assert spec.settings.model.seasonal_lag == "off"
    assert spec.run.chunk_series == 10_000 and spec.run.workers is None  # None: the CPUs available
    assert len(spec.config_sha256) == 64


def test_schema_qualified_table_and_parquet(tmp_path: Path) -> None:
    job = default_job(table="water.readings")
    assert load_job(write(tmp_path, job)).source.table == ("water", "readings")
    job = default_job()
    del job["source"]["database"], job["source"]["table"]
    job["source"]["parquet"] = "data/*.parquet"
    job["publish"]["database"] = "out.duckdb"
    spec = load_job(write(tmp_path, job))
    assert spec.source.parquet == str(tmp_path.resolve() / "data" / "*.parquet")
    assert spec.publish.database == tmp_path.resolve() / "out.duckdb"


def test_hash_ignores_formatting(tmp_path: Path) -> None:
    a = load_job(write(tmp_path, default_job())).config_sha256
    path = tmp_path / "job.toml"
    path.write_text("# comment\n" + path.read_text(), encoding="utf-8")
    assert load_job(path).config_sha256 == a


def _edit(section: str, key: str, value: object):
    def apply(job: dict) -> dict:
        if value is _DELETE:
            del job[section][key]
        else:
            job.setdefault(section, {})[key] = value
        return job
    return apply


_DELETE = object()

BAD = [
    (_edit("forecast", "horizn", 6), "unknown forecast.horizn in job file; did you mean horizon?"),
    (_edit("sauce", "x", 1), "unknown [sauce]"),
    (_edit("forecast", "horizon", 0), "forecast.horizon = 0"),
    (_edit("forecast", "horizon", "12"), "forecast.horizon = '12'"),
    (_edit("forecast", "coverage", [1.5]), "forecast.coverage = 1.5"),
    (_edit("forecast", "coverage", 0.8), "forecast.coverage"),
    (_edit("model", "order", "three"), "model.order"),
    (_edit("model", "criterion", "r2"), "model.criterion"),
    (_edit("gates", "alpha", 2), "gates.alpha"),
    (_edit("gates", "allow_gaps", "yes"), "gates.allow_gaps"),
    (_edit("source", "table", "x; DROP TABLE readings"), "source.table = 'x; DROP TABLE readings' is not allowed"),
    (_edit("source", "table", "a.b.c"), "source.table"),
    (_edit("source", "keys", ["site; DROP TABLE readings"]), "source.keys = 'site; DROP TABLE readings' is not a plain identifier"),
    (_edit("source", "keys", []), "source.keys"),
    (_edit("source", "keys", ["run_id"]), "used by arflow's output tables"),
    (_edit("source", "value", "site"), "must name different columns"),
    (_edit("source", "period", 'm"onth'), "source.period"),
    (_edit("source", "frequency", "monthly"), "source.frequency = 'monthly'"),
    (_edit("source", "frequency", _DELETE), "source.frequency is missing"),
    (_edit("source", "query", "SELECT 1"), "either table or query"),
    (_edit("source", "parquet", "x.parquet"), "exactly one of database"),
    (_edit("publish", "schema", "arflow; DROP SCHEMA main"), "publish.schema"),
    (_edit("publish", "on_failure", "keep"), "publish.on_failure = 'keep'"),
    (_edit("run", "chunk_series", 0), "run.chunk_series"),
    (_edit("run", "workers", True), "run.workers"),
    (_edit("job", "name", "two words"), "job.name"),
    (_edit("job", "name", _DELETE), "job.name is missing"),
]


@pytest.mark.parametrize("edit, message", BAD, ids=[m[:40] for _, m in BAD])
def test_bad_job_files_name_the_key(tmp_path: Path, edit, message: str) -> None:
    with pytest.raises(SettingsError) as info:
        load_job(write(tmp_path, edit(default_job())))
    text = str(info.value)
    assert message in text
    assert "\n" not in text


def test_parquet_needs_publish_database(tmp_path: Path) -> None:
    job = default_job()
    del job["source"]["database"], job["source"]["table"]
    job["source"]["parquet"] = "x.parquet"
    with pytest.raises(SettingsError, match="publish.database is missing"):
        load_job(write(tmp_path, job))


def test_missing_and_malformed_files(tmp_path: Path) -> None:
    with pytest.raises(SettingsError, match="not found"):
        load_job(tmp_path / "nope.toml")
    bad = tmp_path / "bad.toml"
    bad.write_text("[job]\nname = \n", encoding="utf-8")
    with pytest.raises(SettingsError, match="not valid TOML"):
        load_job(bad)
