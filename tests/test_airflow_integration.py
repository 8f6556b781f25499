"""A real Airflow DAG in-process (``dag.test()``) on the sample warehouse.

Airflow keeps its state in a metadata database: the session gets its own
Airflow home in a temporary folder (SQLite database, DAGs folder), set up
before Airflow is imported and removed at the end. The DAG is the forecast
task, a downstream task that receives the run summary, and an asset the
forecast task emits; each case checks the states Airflow records.
"""

from __future__ import annotations

import atexit
import importlib.util
import json
import os
import shutil
import tempfile
from pathlib import Path

import pytest

_HOME = Path(tempfile.mkdtemp(prefix="arflow-airflow-home-"))
atexit.register(shutil.rmtree, _HOME, True)  # also when Airflow is not installed and the module is skipped
os.environ.update({
    "AIRFLOW_HOME": str(_HOME),
    "AIRFLOW__CORE__DAGS_FOLDER": str(_HOME / "dags"),
    "AIRFLOW__CORE__LOAD_EXAMPLES": "False",
    "AIRFLOW__DATABASE__SQL_ALCHEMY_CONN": f"sqlite:///{_HOME / 'airflow.db'}",
})
(_HOME / "dags").mkdir()

airflow = pytest.importorskip("airflow")

from sample_jobs import sample_jobs  # noqa: E402

DAG_FILE = '''\
import json
from pathlib import Path

import pendulum
from airflow.sdk import DAG, Asset, task

from arflow.integrations.airflow import ArflowJobOperator

FORECASTS = Asset("arflow://vellmar_demand/published_forecasts")

for case, job_file in {jobs!r}.items():
    with DAG(f"forecast_{{case}}", schedule="@monthly", start_date=pendulum.datetime(2025, 1, 1), catchup=False) as dag:
        forecast = ArflowJobOperator(
            task_id="forecast", job_file=job_file, periods_back=1, retries=2, outlets=[FORECASTS],
            env={{"PGAPPNAME": "arflow-{{{{ dag.dag_id }}}}"}},
        )

        @task
        def refresh_dashboard(summary: dict, case: str = case) -> None:
            Path({out!r}, f"{{case}}.json").write_text(json.dumps(summary))

        refresh_dashboard(forecast.output)
    globals()[f"dag_{{case}}"] = dag
'''


@pytest.fixture(scope="module")
def dags(tmp_path_factory: pytest.TempPathFactory):
    from airflow.utils import db

    db.resetdb()  # the metadata database of this session's Airflow home
    jobs = sample_jobs(tmp_path_factory.mktemp("airflow"))
    out = tmp_path_factory.mktemp("airflow-out")
    path = _HOME / "dags" / "arflow_forecasts.py"
    path.write_text(DAG_FILE.format(jobs={k: str(v) for k, v in jobs.items() if k != "missing_table"}, out=str(out)),
                    encoding="utf-8")
    spec = importlib.util.spec_from_file_location("arflow_forecasts_dag", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    yield module, out
    shutil.rmtree(_HOME, ignore_errors=True)


def _run(dag):
    import signal

    import pendulum

    # Airflow's in-process task runner installs its own SIGTERM handler in this (the test) process and
    # leaves it there; put the test session's handlers back so later tests get their signals as before
    handlers = {s: signal.getsignal(s) for s in (signal.SIGTERM, signal.SIGINT)}
    try:
        # the January 2026 run forecasts from the month just ended (periods_back=1): as of 2025-12
        run = dag.test(logical_date=pendulum.datetime(2026, 1, 1, tz="UTC"))
    finally:
        for sig, handler in handlers.items():
            signal.signal(sig, handler)
    return run, {ti.task_id: ti for ti in run.get_task_instances()}


def _asset_events() -> list[dict]:
    from airflow import settings
    from airflow.models.asset import AssetEvent

    session = settings.Session()
    try:
        return [dict(event.extra or {}) for event in session.query(AssetEvent).all()]
    finally:
        session.close()


def _xcom(dag_id: str, key: str):
    from airflow import settings
    from airflow.models.xcom import XComModel

    session = settings.Session()
    try:
        rows = session.query(XComModel).filter_by(dag_id=dag_id, key=key).all()
        return [XComModel.deserialize_value(row) for row in rows]
    finally:
        session.close()


def test_success_passes_the_summary_downstream_and_to_the_asset(dags) -> None:
    module, out = dags
    run, tis = _run(module.dag_ok)
    assert run.state == "success"
    assert tis["forecast"].state == "success" and tis["refresh_dashboard"].state == "success"
    summary = json.loads((out / "ok.json").read_text())
    assert summary["as_of"] == "2025-12-01" and summary["run_id"] == "vellmar_demand@2025-12-01"
    assert summary["series_total"] == 21 and summary["exit_code"] == 0 and not summary["alarm"]
    events = [e for e in _asset_events() if e.get("run_id") == "vellmar_demand@2025-12-01"]
    assert len(events) == 1 and events[0]["series_published"] == summary["series_published"]
    assert "PGAPPNAME" not in os.environ  # the task's environment was for the run only


def test_quarantine_alarm_fails_the_task_and_holds_downstream(dags) -> None:
    module, out = dags
    before = len(_asset_events())
    run, tis = _run(module.dag_alarm)
    assert run.state == "failed"
    assert tis["forecast"].state == "failed"  # failed at once, not up for retry: the same data alarms again
    assert tis["forecast"].try_number == 1
    (summary,) = _xcom("forecast_alarm", "arflow_summary")  # the summary is kept with the failed task
    assert summary["alarm"] and summary["held"] and summary["exit_code"] == 4
    assert summary["quarantine_share"] > summary["max_quarantine_share"] == 0.1
    assert tis["refresh_dashboard"].state == "upstream_failed"
    assert not (out / "alarm.json").exists()
    assert len(_asset_events()) == before  # no asset event: downstream DAGs do not start


def test_job_file_error_fails_the_task_without_retries(dags) -> None:
    module, out = dags
    run, tis = _run(module.dag_broken)
    assert run.state == "failed"
    assert tis["forecast"].state == "failed" and tis["forecast"].try_number == 1
    assert tis["refresh_dashboard"].state == "upstream_failed"
    assert not (out / "broken.json").exists()


def test_readme_example_defines_the_dag(dags) -> None:
    import re

    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
    section = readme.split("### Apache Airflow", 1)[1]
    code = re.search(r"```python\n(.*?)```", section, re.S).group(1)
    namespace: dict = {}
    exec(compile(code, "README-airflow", "exec"), namespace)  # noqa: S102 - the README's own example
    forecast = namespace["forecast"]
    assert forecast.dag.dag_id == "demand_forecasts" and set(forecast.dag.task_dict) == {"forecast", "announce"}
    assert forecast.periods_back == 1 and "env" in forecast.template_fields
