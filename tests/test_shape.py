"""The shape of the package: interfaces, registries, specs that validate themselves, the two-phase publish."""

from __future__ import annotations

import ast
import datetime as dt
from pathlib import Path
from typing import Any

import pytest

import arflow
from arflow.engines.registry import ENGINES
from arflow.errors import PublishError, SettingsError
from arflow.job import publish_run
from arflow.job_file import ENGINES as ENGINE_NAMES
from arflow.job_file import JobSpec, PublishSpec, RunOptions, SourceSpec, SparkOptions
from arflow.results import RESULT_TABLES, RUN_TABLES, STAGED_TABLES, ForecastRun
from arflow.settings import GateSettings, Settings
from arflow.warehouse.contract import RunRecord, TableLayout, Target, check_layout_match, runs_row
from arflow.warehouse.registry import TARGETS, targets_for

PACKAGE = Path(arflow.__file__).parent


def test_no_module_imports_a_private_name_from_another() -> None:
    found = []
    for path in sorted(PACKAGE.rglob("*.py")):
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.ImportFrom) and node.module != "__future__":
                found += [f"{path.relative_to(PACKAGE)}: {node.module}.{a.name}" for a in node.names
                          if a.name.startswith("_") and not a.name.startswith("__")]
    assert found == []


def test_every_registered_target_satisfies_the_contract(tmp_path: Path) -> None:
    layout = TableLayout("arflow", ("site",), ("VARCHAR",), "DATE")
    publish = PublishSpec(database=tmp_path / "w.duckdb", lakehouse=tmp_path / "lake")
    targets = targets_for(publish, layout)
    assert len(targets) == len(TARGETS) == 2
    assert [t.commit_order for t in targets] == sorted(t.commit_order for t in targets)
    for target in targets:
        assert isinstance(target, Target)
        assert "\n" not in target.describe()
        assert target.latest_vintage("job") is None
        assert isinstance(target.check_layout(), str)
    # a lakehouse-only job builds one target
    assert len(targets_for(PublishSpec(database=None, lakehouse=tmp_path / "lake"), layout)) == 1


def test_engine_names_of_the_job_file_are_the_registry_names() -> None:
    assert tuple(ENGINES) == ENGINE_NAMES


def test_one_list_of_table_names() -> None:
    assert set(RESULT_TABLES) < set(STAGED_TABLES) and set(RESULT_TABLES) < set(RUN_TABLES)
    assert set(ForecastRun.__dataclass_fields__) - {"as_of", "settings"} == set(RESULT_TABLES)


def test_layout_mismatch_message_is_shared() -> None:
    layout = TableLayout("arflow", ("site",), ("VARCHAR",), "DATE")
    check_layout_match("somewhere", ["SITE"], "DATE", layout)  # case of key names does not matter
    with pytest.raises(PublishError, match=r"^somewhere holds results keyed by \(zone\), this job's keys are \(site\)"):
        check_layout_match("somewhere", ["zone"], "DATE", layout)
    with pytest.raises(PublishError, match=r"^somewhere holds BIGINT periods, this job's are DATE"):
        check_layout_match("somewhere", ["site"], "BIGINT", layout)


# ------------------------------------------------------------------------------ specs built in code


def _source(**kw: Any) -> SourceSpec:
    base: dict[str, Any] = {"keys": ("site",), "period": "month", "value": "reading", "database": Path("w.duckdb"),
                            "table": ("readings",)}
    return SourceSpec(**{**base, **kw})


@pytest.mark.parametrize("kw, message", [
    ({"engine": "pandas"}, "source.engine = 'pandas' is not allowed"),
    ({"parquet": "x/*.parquet"}, "needs exactly one of database"),
    ({"table": None}, "needs table"),
    ({"query": "SELECT 1"}, "either table or query"),
    ({"table": None, "query": "SELECT random() AS x"}, "uses random()"),
    ({"keys": ()}, "source.keys"),
    ({"keys": ("site name",)}, "not a plain identifier"),
    ({"value": "site"}, "must name different columns"),
    ({"keys": ("decision",)}, "used by arflow's output tables"),
    ({"engine": "spark", "database": None, "table": ("a", "b", "c", "d")}, "catalog.schema.table"),
    ({"engine": "spark", "table": None, "query": None}, "Spark does not read"),
])
def test_a_source_spec_built_in_code_gets_the_job_file_checks(kw: dict[str, Any], message: str) -> None:
    with pytest.raises(SettingsError, match=message):
        _source(**kw)


@pytest.mark.parametrize("build, message", [
    (lambda: PublishSpec(database=None), "publish.database is missing"),
    (lambda: PublishSpec(database=Path("w.duckdb"), schema="no-dash"), "publish.schema"),
    (lambda: PublishSpec(database=Path("w.duckdb"), on_failure="ignore"), "publish.on_failure"),
    (lambda: PublishSpec(database=Path("w.duckdb"), max_periods_ahead=0), "publish.max_periods_ahead"),
    (lambda: RunOptions(workers=0), "run.workers"),
    (lambda: RunOptions(chunk_series=True), "run.chunk_series"),
    (lambda: SparkOptions(partitions=0), "spark.partitions"),
    (lambda: SparkOptions(config=(("driver.memory", "4g"),)), "spark.config"),
])
def test_publish_run_and_spark_specs_check_themselves(build: Any, message: str) -> None:
    with pytest.raises(SettingsError, match=message):
        build()


def _job(source: SourceSpec, settings: Settings, spark: SparkOptions | None = None, name: str = "meters") -> JobSpec:
    return JobSpec(name=name, source=source, settings=settings, publish=PublishSpec(database=Path("w.duckdb")),
                   run=RunOptions(), config_sha256="0" * 64, spark=spark)


def test_cross_field_rules_are_checked_when_a_job_spec_is_built() -> None:
    spark_source = _source(engine="spark", database=None, table=("readings",))
    fdr = Settings(frequency="month", gates=GateSettings(series_fdr=0.05))
    with pytest.raises(SettingsError, match="gates.series_fdr adjusts p-values across all series"):
        _job(spark_source, fdr, SparkOptions())
    with pytest.raises(SettingsError, match=r"\[spark\] is only used with"):
        _job(_source(), Settings(frequency="month"), SparkOptions())
    with pytest.raises(SettingsError, match="job.name"):
        _job(_source(), Settings(frequency="month"), name="bad name")
    assert _job(_source(), fdr).settings.gates.series_fdr == 0.05  # fine with the local engine


# ------------------------------------------------------------------------------ two-phase publish


class _Pending:
    def __init__(self, log: list[str], name: str, fail_commit: bool) -> None:
        self.log, self.name, self.fail_commit, self.done = log, name, fail_commit, False

    def commit(self) -> int:
        if self.fail_commit:
            raise PublishError(f"{self.name} commit failed")
        self.log.append(f"commit {self.name}")
        self.done = True
        return {"db": 2, "lake": 5}[self.name]

    def abort(self) -> None:
        if not self.done:
            self.log.append(f"abort {self.name}")
            self.done = True


class _Target:
    def __init__(self, log: list[str], name: str, order: int, fail: str = "") -> None:
        self.log, self.name, self.commit_order, self.fail = log, name, order, fail

    def prepare(self, record: RunRecord, staged: Any) -> _Pending:
        if self.fail == "prepare":
            raise PublishError(f"{self.name} prepare failed")
        self.log.append(f"prepare {self.name}")
        return _Pending(self.log, self.name, self.fail == "commit")


def _record() -> RunRecord:
    t = dt.datetime(2026, 11, 1)
    return RunRecord(run_id="j@2026-11-01", job="j", as_of=dt.date(2026, 11, 1), started_at=t, finished_at=t,
                     status="ok", series_total=1, series_published=1, series_quarantined=0, quarantine_share=0.0,
                     on_failure="keep-previous", frequency="month", horizon=3, coverage=(0.8,), source="s",
                     config_sha256="0" * 64, arflow_version="test")


def test_targets_are_prepared_then_committed_in_commit_order() -> None:
    log: list[str] = []
    attempt = publish_run([_Target(log, "lake", 10), _Target(log, "db", 0)], _record(), None)
    assert log == ["prepare db", "prepare lake", "commit db", "commit lake"]
    assert attempt == 2  # the first committed target's attempt


@pytest.mark.parametrize("failing, fail", [("lake", "prepare"), ("db", "commit")])
def test_a_failure_before_the_first_commit_aborts_every_target(failing: str, fail: str) -> None:
    log: list[str] = []
    targets = [_Target(log, name, order, fail if name == failing else "") for name, order in (("db", 0), ("lake", 10))]
    with pytest.raises(PublishError, match=f"{failing} {fail} failed"):
        publish_run(targets, _record(), None)
    assert not any(line.startswith("commit") for line in log)
    prepared = [line.split()[1] for line in log if line.startswith("prepare")]
    assert sorted(line.split()[1] for line in log if line.startswith("abort")) == sorted(prepared)


def test_runs_row_has_the_runs_table_columns() -> None:
    from arflow.warehouse.duckdb_target import output_columns

    row = runs_row(_record(), 3)
    assert row["attempt"] == 3 and row["duration_seconds"] == 0.0
    assert {c.lower() for c in row} <= output_columns()
