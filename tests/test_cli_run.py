"""End to end through the command line: a DuckDB source in, vetted forecasts out."""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path

import duckdb
import polars as pl
import pytest

from arflow.cli import main
from arflow.sample.panels import default_job, job_toml, mixed_panel, warehouse_state, write_table

PROBLEM_REASONS = {
    "short": "too_short",
    "flat": "constant_series",
    "dup": "duplicate_periods",
    "lag6": "residual_autocorrelation",
}


class Job:
    """A temporary warehouse with a job file over it."""

    def __init__(self, tmp_path: Path, frame: pl.DataFrame | None = None, **edits: dict) -> None:
        self.dir = tmp_path
        self.db = tmp_path / "warehouse.duckdb"
        write_table(self.db, mixed_panel() if frame is None else frame)
        self.sections = default_job("warehouse.duckdb")
        for section, body in edits.items():
            self.sections.setdefault(section, {}).update(body)
        self.path = tmp_path / "job.toml"
        self.write()

    def write(self) -> None:
        self.path.write_text(job_toml(self.sections), encoding="utf-8")

    def sql(self, query: str) -> list[tuple]:
        con = duckdb.connect(str(self.db), read_only=True)
        try:
            return con.execute(query).fetchall()
        finally:
            con.close()


def cli(capsys: pytest.CaptureFixture[str], *args: str) -> tuple[int, str, str]:
    code = main(list(args))
    captured = capsys.readouterr()
    return code, captured.out, captured.err


@pytest.fixture
def job(tmp_path: Path) -> Job:
    return Job(tmp_path)


def test_view_holds_exactly_the_series_that_passed(job: Job, capsys) -> None:
    code, out, err = cli(capsys, "run", str(job.path))
    assert code == 0, err
    published = {r[0] for r in job.sql("SELECT site FROM arflow.models WHERE decision = 'published'")}
    in_view = {r[0] for r in job.sql("SELECT DISTINCT site FROM arflow.published_forecasts")}
    assert in_view == published
    assert published >= {"s01", "s02"} and not published & set(PROBLEM_REASONS)
    # six steps per published series, with both interval levels, and no stale rows
    rows = job.sql("SELECT site, count(*), bool_or(stale), min(lower_95 < lower_80 AND lower_80 <= forecast AND forecast <= upper_80 AND upper_80 < upper_95) FROM arflow.published_forecasts GROUP BY site")
    assert all(n == 6 and not stale and ordered for _, n, stale, ordered in rows)
    for site, reason in PROBLEM_REASONS.items():
        (decision, reasons), = job.sql(f"SELECT decision, reasons FROM arflow.models WHERE site = '{site}'")
        assert decision == "quarantined" and reason in reasons
    # the failing residual test is in gates with its statistic and p-value
    (stat, p, threshold), = job.sql(
        "SELECT statistic, p_value, threshold FROM arflow.gates WHERE site = 'lag6' AND gate = 'residual_autocorrelation' AND NOT passed"
    )
    assert stat > 0 and p < threshold == 0.01
    (stat,), = job.sql("SELECT statistic FROM arflow.gates WHERE site = 'short' AND gate = 'too_short' AND NOT passed")
    assert stat == 12
    assert job.sql("SELECT count(*) FROM arflow.residual_acf WHERE site = 's01'")[0][0] > 0
    # the summary names counts, reasons, time and where results went
    for text in ("series read", "published", "quarantined", "too_short", "time taken", str(job.db)):
        assert text in out
    run = job.sql("SELECT status, series_total, series_published, series_quarantined, attempt, on_failure FROM arflow.runs")
    assert run == [("ok", 10, len(published), 10 - len(published), 1, "keep-previous")]


def test_same_run_twice_gives_identical_rows_and_no_duplicates(job: Job, capsys) -> None:
    assert cli(capsys, "run", str(job.path))[0] == 0
    first = warehouse_state(job.db)
    assert cli(capsys, "run", str(job.path))[0] == 0
    second = warehouse_state(job.db)
    for table in ("published_forecasts", "forecasts", "models", "gates", "residual_acf", "series_status"):
        assert second[table] == first[table], table
    assert job.sql("SELECT count(*), max(attempt) FROM arflow.runs") == [(1, 2)]
    assert job.sql("SELECT count(*) FROM arflow.vintages") == [(1,)]


def test_chunks_and_workers_do_not_change_results(tmp_path: Path, capsys) -> None:
    (tmp_path / "one").mkdir()
    (tmp_path / "many").mkdir()
    one = Job(tmp_path / "one")
    many = Job(tmp_path / "many", run={"chunk_series": 3, "workers": 2})
    assert cli(capsys, "run", str(one.path))[0] == 0
    code, out, _ = cli(capsys, "run", str(many.path))
    assert code == 0 and "4 chunks" in out
    assert warehouse_state(one.db)["published_forecasts"] == warehouse_state(many.db)["published_forecasts"]
    assert warehouse_state(one.db)["models"] == warehouse_state(many.db)["models"]


def test_as_of_adds_a_vintage_and_the_view_keeps_the_latest(job: Job, capsys) -> None:
    assert cli(capsys, "run", str(job.path))[0] == 0
    latest = warehouse_state(job.db)["published_forecasts"]
    code, out, err = cli(capsys, "run", str(job.path), "--as-of", "2025-06")
    assert code == 0, err
    assert "as of 2025-06-01" in out
    assert job.sql("SELECT as_of, run_id FROM arflow.vintages ORDER BY as_of") == [
        (dt.date(2025, 6, 1), "meters@2025-06-01"),
        (dt.date(2026, 12, 1), "meters@2026-12-01"),
    ]
    # the backfill's own forecasts start after its as-of; the view still shows the latest vintage
    assert job.sql("SELECT min(period) FROM arflow.forecasts WHERE run_id = 'meters@2025-06-01'") == [(dt.date(2025, 7, 1),)]
    assert warehouse_state(job.db)["published_forecasts"] == latest


@pytest.mark.parametrize("policy", ["keep-previous", "withdraw"])
def test_failure_policy_in_the_view(tmp_path: Path, capsys, policy: str) -> None:
    frame = mixed_panel()
    last = frame["month"].max()
    # s01 gets a duplicated reading in the last month only: fine as of a month earlier, quarantined as of the last
    extra = frame.filter((pl.col("site") == "s01") & (pl.col("month") == last))
    job = Job(tmp_path, pl.concat([frame, extra]), publish={"on_failure": policy})
    assert cli(capsys, "run", str(job.path), "--as-of", "2026-11")[0] == 0
    assert cli(capsys, "run", str(job.path))[0] == 0
    (reasons,), = job.sql("SELECT reasons FROM arflow.models WHERE site = 's01' AND run_id = 'meters@2026-12-01'")
    assert "duplicate_periods" in reasons
    s01 = job.sql("SELECT DISTINCT run_id, as_of, stale FROM arflow.published_forecasts WHERE site = 's01'")
    if policy == "keep-previous":
        assert s01 == [("meters@2026-11-01", dt.date(2026, 11, 1), True)]
    else:
        assert s01 == []
    others = job.sql("SELECT DISTINCT run_id, stale FROM arflow.published_forecasts WHERE site <> 's01'")
    assert others == [("meters@2026-12-01", False)]
    # once the data is fixed and the vintage re-run, s01 is current again
    write_table(job.db, mixed_panel())
    assert cli(capsys, "run", str(job.path))[0] == 0
    assert job.sql("SELECT DISTINCT run_id, stale FROM arflow.published_forecasts WHERE site = 's01'") == [("meters@2026-12-01", False)]


def test_dry_run_writes_nothing(job: Job, capsys) -> None:
    code, out, err = cli(capsys, "run", str(job.path), "--dry-run")
    assert code == 0, err
    assert "dry run" in out and "would publish" in out
    assert job.sql("SELECT count(*) FROM information_schema.schemata WHERE schema_name = 'arflow'") == [(0,)]
    assert cli(capsys, "run", str(job.path))[0] == 0
    before = warehouse_state(job.db)
    assert cli(capsys, "run", str(job.path), "--dry-run", "--as-of", "2025-01")[0] == 0
    assert warehouse_state(job.db) == before


def test_json_log_lines(job: Job, capsys) -> None:
    job.sections["run"] = {"chunk_series": 4}
    job.write()
    code, out, _ = cli(capsys, "run", str(job.path), "--log-format", "json")
    assert code == 0
    events = [json.loads(line) for line in out.splitlines()]
    assert [e["event"] for e in events] == ["start", "chunk", "chunk", "chunk", "publish", "finish"]
    assert events[0]["series"] == 10 and events[-1]["series_total"] == 10
    assert events[-1]["reason_counts"]["too_short"] == 1
    assert all("time" in e for e in events)
    job.sections["forecast"]["horizon"] = 0
    job.write()
    code, out, err = cli(capsys, "run", str(job.path), "--log-format", "json")
    assert code == 2
    (event,) = [json.loads(line) for line in out.splitlines()]
    assert event["event"] == "error" and event["exit_code"] == 2 and "forecast.horizon" in event["message"]


def test_alarm_exit_code_still_writes(job: Job, capsys) -> None:
    job.sections["gates"]["max_quarantine_share"] = 0.2
    job.sections["publish"]["hold_on_alarm"] = False  # the default holds the view (tests/test_vintages.py)
    job.write()
    code, out, err = cli(capsys, "run", str(job.path))
    assert code == 4
    assert "alarm" in err and "results were written" in err
    assert job.sql("SELECT status FROM arflow.runs") == [("alarm",)]
    assert job.sql("SELECT count(*) > 0 FROM arflow.published_forecasts") == [(True,)]


def test_new_coverage_level_adds_columns(job: Job, capsys) -> None:
    job.sections["forecast"]["coverage"] = [0.8]
    job.write()
    assert cli(capsys, "run", str(job.path), "--as-of", "2026-06")[0] == 0
    job.sections["forecast"]["coverage"] = [0.8, 0.975]
    job.write()
    assert cli(capsys, "run", str(job.path))[0] == 0
    cols = [r[0] for r in job.sql("SELECT column_name FROM information_schema.columns WHERE table_name = 'forecasts' ORDER BY ordinal_position")]
    assert cols[-4:] == ["lower_80", "upper_80", "lower_97_5", "upper_97_5"]
    assert job.sql("SELECT count(*) FROM arflow.forecasts WHERE run_id = 'meters@2026-06-01' AND lower_97_5 IS NOT NULL") == [(0,)]
    assert job.sql("SELECT bool_and(lower_97_5 < lower_80) FROM arflow.published_forecasts") == [(True,)]


def test_query_parquet_and_integer_periods(tmp_path: Path, capsys) -> None:
    frame = mixed_panel()
    job = Job(tmp_path, frame)
    del job.sections["source"]["table"]
    job.sections["source"]["query"] = "SELECT * FROM readings WHERE site LIKE 's%' -- clean sites only"
    job.write()
    code, out, err = cli(capsys, "run", str(job.path))
    assert code == 0, err
    assert job.sql("SELECT count(*) FROM arflow.models") == [(7,)]  # s01..s06 and short

    frame.write_parquet(tmp_path / "readings.parquet")
    sections = default_job(name="meters_pq")
    del sections["source"]["database"], sections["source"]["table"]
    sections["source"]["parquet"] = "*.parquet"
    sections["publish"] = {"database": "out.duckdb", "schema": "results"}
    (tmp_path / "pq.toml").write_text(job_toml(sections), encoding="utf-8")
    code, _, err = cli(capsys, "run", str(tmp_path / "pq.toml"))
    assert code == 0, err
    assert warehouse_state(tmp_path / "out.duckdb", "results")["models"]

    steps = frame.with_columns(tick=pl.col("month").rank("dense").cast(pl.Int64)).drop("month")
    write_table(tmp_path / "steps.duckdb", steps)
    sections = default_job("steps.duckdb", name="meters_steps")
    sections["source"].update(period="tick", frequency="step")
    (tmp_path / "steps.toml").write_text(job_toml(sections), encoding="utf-8")
    code, _, err = cli(capsys, "run", str(tmp_path / "steps.toml"))
    assert code == 0, err
    con = duckdb.connect(str(tmp_path / "steps.duckdb"), read_only=True)
    assert con.execute("SELECT min(period), max(step) FROM arflow.published_forecasts").fetchall() == [(97, 6)]
    con.close()


def test_second_job_with_other_keys_needs_its_own_schema(job: Job, capsys) -> None:
    assert cli(capsys, "run", str(job.path))[0] == 0
    other = mixed_panel().rename({"site": "meter"})
    write_table(job.db, other, "other_readings")
    sections = default_job("warehouse.duckdb", table="other_readings", name="other")
    sections["source"]["keys"] = ["meter"]
    (job.dir / "other.toml").write_text(job_toml(sections), encoding="utf-8")
    before = warehouse_state(job.db)
    code, _, err = cli(capsys, "run", str(job.dir / "other.toml"))
    assert code == 3 and "keyed by (site)" in err and "[publish] schema" in err
    assert warehouse_state(job.db) == before
    sections["publish"]["schema"] = "other_results"
    (job.dir / "other.toml").write_text(job_toml(sections), encoding="utf-8")
    assert cli(capsys, "run", str(job.dir / "other.toml"))[0] == 0
