"""A real Dagster pipeline in-process (``dagster.materialize``, an ephemeral instance) on the sample warehouse.

The pipeline is the forecast asset with its quarantine check and a downstream
asset that reads ``published_forecasts``; each case checks the status Dagster
records: materialization, check result and severity, run success, whether the
downstream asset ran.
"""

from __future__ import annotations

import os
from pathlib import Path

import duckdb
import pytest

dg = pytest.importorskip("dagster")

from arflow.integrations.common import as_of_for_date  # noqa: E402
from arflow.integrations.dagster import QUARANTINE_CHECK, WarehouseCredentials, build_forecast_asset  # noqa: E402
from sample_jobs import sample_jobs  # noqa: E402

MONTHLY = dg.MonthlyPartitionsDefinition(start_date="2024-01-01", end_offset=1)


@pytest.fixture(scope="module")
def jobs(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    return sample_jobs(tmp_path_factory.mktemp("dagster"))


def _pipeline(job_file: Path, on_alarm: str = "fail", **kwargs) -> tuple[list, list[str]]:
    """The forecast asset and a downstream asset that records the published vintage it read."""
    forecasts = build_forecast_asset(job_file, partitions_def=MONTHLY, periods_back=1, on_alarm=on_alarm, **kwargs)
    read: list[str] = []

    @dg.asset(deps=[forecasts], partitions_def=MONTHLY)
    def dashboard_extract() -> None:
        con = duckdb.connect(str(job_file.parent / "vellmar_water.duckdb"), read_only=True)
        try:
            read.append(str(con.execute("SELECT max(as_of) FROM arflow.published_forecasts").fetchone()[0]))
        finally:
            con.close()

    return [forecasts, dashboard_extract], read


def _materialize(assets: list, partition: str, **kwargs):
    return dg.materialize(assets, partition_key=partition, instance=dg.DagsterInstance.ephemeral(),
                          raise_on_error=False, **kwargs)


def _check(result) -> "dg.AssetCheckEvaluation":
    (evaluation,) = result.get_asset_check_evaluations()
    assert evaluation.check_name == QUARANTINE_CHECK
    return evaluation


def test_success_materializes_with_the_summary_and_a_passed_check(jobs) -> None:
    assets, read = _pipeline(jobs["ok"])
    # the January 2026 partition forecasts from the month just ended (periods_back=1): as of 2025-12
    result = _materialize(assets, "2026-01-01")
    assert result.success
    (materialization,) = result.asset_materializations_for_node("forecasts")
    meta = materialization.metadata
    assert meta["as_of"].value == "2025-12-01"
    assert meta["series_total"].value == 21 and not meta["alarm"].value
    assert meta["series_published"].value + meta["series_quarantined"].value == 21
    summary = meta["summary"].value
    assert summary["run_id"] == "vellmar_demand@2025-12-01" and summary["exit_code"] == 0
    assert "series read" in meta["text_summary"].value
    evaluation = _check(result)
    assert evaluation.passed
    assert read == ["2025-12-01"]  # the downstream asset ran after the publish and saw the new vintage


def test_quarantine_alarm_fails_the_check(jobs) -> None:
    # "fail": a blocking check of ERROR severity; the records are written (materialization recorded),
    # the run fails and the downstream asset does not run
    assets, read = _pipeline(jobs["alarm"])
    result = _materialize(assets, "2025-11-01")
    assert not result.success
    evaluation = _check(result)
    assert not evaluation.passed and evaluation.severity == dg.AssetCheckSeverity.ERROR
    (materialization,) = result.asset_materializations_for_node("forecasts")
    assert materialization.metadata["alarm"].value and materialization.metadata["held"].value
    assert read == []
    # "warn": Dagster's warning, a failed check of WARN severity; the run succeeds
    assets, read = _pipeline(jobs["alarm"], on_alarm="warn")
    result = _materialize(assets, "2025-11-01")
    assert result.success
    evaluation = _check(result)
    assert not evaluation.passed and evaluation.severity == dg.AssetCheckSeverity.WARN
    assert len(read) == 1


def test_job_file_error_fails_the_run_without_retries(jobs) -> None:
    assets, read = _pipeline(jobs["broken"])
    result = _materialize(assets, "2026-01-01")
    assert not result.success
    failures = [e for e in result.all_events if e.event_type_value == "STEP_FAILURE"]
    assert len(failures) == 1 and failures[0].step_key == "forecasts"
    error = failures[0].step_failure_data.user_failure_data
    assert "max_quarantine_shares" in error.description and error.metadata["exit_code"].value == 2
    assert result.asset_materializations_for_node("forecasts") == [] and read == []


def test_credentials_resource_sets_libpq_variables_for_the_run_only(jobs, monkeypatch) -> None:
    monkeypatch.setenv("TEST_FORECAST_DB_PASSWORD", "s3cret-not-logged")
    monkeypatch.delenv("PGPASSWORD", raising=False)
    assets, _ = _pipeline(jobs["ok"], credentials_key="warehouse")
    resource = WarehouseCredentials(user="forecaster", password=dg.EnvVar("TEST_FORECAST_DB_PASSWORD"))
    instance = dg.DagsterInstance.ephemeral()
    result = dg.materialize(assets, partition_key="2025-12-01", instance=instance, resources={"warehouse": resource})
    assert result.success
    messages = [entry.user_message or "" for entry in instance.all_logs(result.run_id)]
    assert any("warehouse settings from the resource: PGPASSWORD, PGUSER" in m for m in messages)
    assert not any("s3cret-not-logged" in m for m in messages)
    assert "PGPASSWORD" not in os.environ and "PGUSER" not in os.environ  # put back after the run


def test_scheduled_dates_step_back_whole_periods() -> None:
    import datetime as dt

    assert as_of_for_date(dt.datetime(2026, 1, 1, 6, 30), "month", 1) == dt.date(2025, 12, 1)
    assert as_of_for_date(dt.date(2026, 3, 15), "quarter", 1) == dt.date(2025, 12, 1)
    assert as_of_for_date(dt.date(2026, 1, 5), "week", 2) == dt.date(2025, 12, 22)
    assert as_of_for_date(dt.date(2026, 1, 5), "day", 0) == dt.date(2026, 1, 5)


def test_readme_example_defines_a_loadable_code_location() -> None:
    import re

    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
    section = readme.split("### Dagster", 1)[1]
    code = re.search(r"```python\n(.*?)```", section, re.S).group(1)
    namespace: dict = {}
    exec(compile(code, "README-dagster", "exec"), namespace)  # noqa: S102 - the README's own example
    defs = namespace["defs"]
    dg.Definitions.validate_loadable(defs)
    assert defs.resolve_job_def("monthly_forecasts") is not None
