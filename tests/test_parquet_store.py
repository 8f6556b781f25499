"""Lakehouse output: Parquet datasets partitioned by run, visible only through a commit marker written last."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import duckdb
import polars as pl
import pytest

from arflow.cli import main
from arflow.errors import PublishError, SourceError
from arflow.job import run_job
from arflow.job_file import load_job
from arflow.sample.panels import ar_panel, default_job, job_toml, mixed_panel, warehouse_state, write_table
from arflow.warehouse import parquet_target as lake

KEYS = ["site"]
SORT = {"models": KEYS, "gates": KEYS + ["gate"], "residual_acf": KEYS + ["lag"], "forecasts": KEYS + ["step"],
        "series_status": KEYS}


def _job(tmp_path: Path, **publish: object) -> Path:
    write_table(tmp_path / "warehouse.duckdb", mixed_panel())
    sections = default_job()
    sections["publish"].update({"lakehouse": "lake", **publish})
    path = tmp_path / "job.toml"
    path.write_text(job_toml(sections), encoding="utf-8")
    return path


def _duck(db: Path, sql: str) -> pl.DataFrame:
    con = duckdb.connect(str(db), read_only=True)
    try:
        return con.sql(sql).pl()
    finally:
        con.close()


def _lake_state(root: Path) -> dict[str, list]:
    """Everything a marker-following reader sees."""
    if not (root / "arflow").exists():
        return {}
    state = {"runs": lake.committed_runs(root).drop("committed_at").sort("run_id").rows()}
    for table in (*SORT, "runs"):
        frame = lake.read_table(root, table)
        state[table] = sorted(frame.drop([c for c in ("started_at", "finished_at", "duration_seconds") if c in frame.columns]).rows(), key=repr)
    return state


@pytest.fixture
def job(tmp_path: Path, capsys) -> Path:
    """A job publishing to DuckDB and a lakehouse, with vintage 2026-11 already committed in both."""
    path = _job(tmp_path)
    assert main(["run", str(path), "--as-of", "2026-11"]) == 0
    capsys.readouterr()
    return path


def test_lakehouse_tables_and_view_equal_duckdb(job: Path, capsys) -> None:
    assert main(["run", str(job)]) == 0  # a second vintage: the view must pick the latest per series
    db, root = job.parent / "warehouse.duckdb", job.parent / "lake"
    for table, order in SORT.items():
        want = _duck(db, f"SELECT * FROM arflow.{table}").sort(["run_id", *order], maintain_order=True)
        got = lake.read_table(root, table).sort(["run_id", *order], maintain_order=True)
        assert got.columns == want.columns, table
        assert got.height == want.height > 0, table
        for col in want.columns:
            assert got[col].cast(want[col].dtype).equals(want[col], null_equal=True), (table, col)
    view = _duck(db, "SELECT * FROM arflow.published_forecasts ORDER BY job, site, step")
    got = lake.published_forecasts(root)
    assert got.columns == view.columns and got.height == view.height > 0
    assert got.sort("run_id", "site", "step").equals(view.sort("run_id", "site", "step"))
    runs = lake.committed_runs(root)
    assert sorted(runs["as_of"].to_list()) == ["2026-11-01", "2026-12-01"] and set(runs["attempt"]) == {1}
    # markers name relative files, the layout is recorded once
    marker = json.loads((root / "arflow" / "_commits" / "meters@2026-12-01.json").read_text())
    assert marker["tables"]["forecasts"]["files"] == ["forecasts/run=meters@2026-12-01/attempt=1/part-00000.parquet"]
    assert json.loads((root / "arflow" / "_layout.json").read_text())["keys"] == ["site"]


@pytest.mark.parametrize("point", ["lakehouse:models", "lakehouse:runs", "models", "vintages", "lakehouse:commit"])
def test_fault_leaves_no_partial_run_visible(job: Path, capsys, monkeypatch, point: str) -> None:
    root = job.parent / "lake"
    lake_before = _lake_state(root)
    db_before = warehouse_state(job.parent / "warehouse.duckdb")
    monkeypatch.setenv("ARFLOW_TEST_FAIL_AFTER", point)
    assert main(["run", str(job)]) == 1
    assert "test fault injected" in capsys.readouterr().err
    assert _lake_state(root) == lake_before
    # no attempt folder of the failed run is left behind
    assert not list((root / "arflow").glob("*/run=meters@2026-12-01"))
    if point != "lakehouse:commit":  # at the marker step the DuckDB transaction had already committed
        assert warehouse_state(job.parent / "warehouse.duckdb") == db_before


def test_rerun_replaces_vintage_and_tidies_attempts(job: Path, capsys) -> None:
    root = job.parent / "lake" / "arflow"
    for _ in range(2):
        assert main(["run", str(job), "--as-of", "2026-11"]) == 0
    runs = lake.committed_runs(root.parent)
    assert runs["attempt"].to_list() == [3]
    # the current attempt and the one the marker named before stay; older ones are gone
    assert sorted(p.name for p in (root / "models" / "run=meters@2026-11-01").iterdir()) == ["attempt=2", "attempt=3"]
    assert lake.read_table(root.parent, "models").height == 10
    assert _duck(job.parent / "warehouse.duckdb", "SELECT attempt FROM arflow.runs").item() == 3


def test_killed_writer_leaves_an_orphan_nobody_reads(job: Path) -> None:
    """Staged but never committed (the process died): readers ignore it; the next commit removes it."""
    spec = load_job(job)
    root = job.parent / "lake"
    before = _lake_state(root)
    from arflow.warehouse.contract import TableLayout

    layout = TableLayout("arflow", ("site",), ("VARCHAR",), "DATE")
    record = _record("meters@2026-11-01")
    lake.ParquetTarget(root, layout).stage(record, {"models": pl.DataFrame({"site": ["x"], "decision": ["published"]})})
    assert (root / "arflow" / "models" / "run=meters@2026-11-01" / "attempt=2").is_dir()
    assert _lake_state(root) == before
    assert run_job(spec, as_of="2026-11").attempt == 2  # DuckDB's attempt; the lakehouse skips the orphan's number
    assert lake.committed_runs(root)["attempt"].to_list() == [3]
    assert sorted(p.name for p in (root / "arflow" / "models" / "run=meters@2026-11-01").iterdir()) == ["attempt=1", "attempt=3"]


def test_lakehouse_only_and_layout_mismatch(tmp_path: Path, capsys) -> None:
    frame = ar_panel(4, 60, seed=3)
    frame.write_parquet(tmp_path / "readings.parquet")
    sections = default_job()
    del sections["source"]["database"], sections["source"]["table"]
    sections["source"]["parquet"] = "readings.parquet"
    sections["publish"]["lakehouse"] = "lake"
    path = tmp_path / "job.toml"
    path.write_text(job_toml(sections), encoding="utf-8")
    assert load_job(path).publish.database is None
    code = main(["run", str(path)])
    out = capsys.readouterr().out
    assert code == 0 and "lakehouse" in out
    assert lake.read_table(tmp_path / "lake", "models").height == 4
    assert not list(tmp_path.glob("*.duckdb"))
    # another job with other keys may not share the folder's schema
    renamed = frame.rename({"site": "meter"})
    renamed.write_parquet(tmp_path / "readings.parquet")
    sections["source"]["keys"] = ["meter"]
    path.write_text(job_toml(sections), encoding="utf-8")
    assert main(["run", str(path)]) == 3
    err = capsys.readouterr().err
    assert "keyed by (site)" in err and "[publish] schema" in err and len(err.strip().splitlines()) == 1
    with pytest.raises(PublishError, match=r"keyed by \(site\)"):
        run_job(load_job(path))


def test_missing_lakehouse_reader_errors(tmp_path: Path) -> None:
    with pytest.raises(SourceError, match=r"lakehouse folder .*nowhere.* does not exist; check the lakehouse path") as err:
        lake.committed_runs(tmp_path / "nowhere")
    assert err.value.exit_code == 3  # a source problem: exit 3, one line
    assert "\n" not in str(err.value)
    (tmp_path / "empty" / "arflow").mkdir(parents=True)
    assert lake.read_table(tmp_path / "empty", "models").height == 0
    assert lake.published_forecasts(tmp_path / "empty").height == 0
    shutil.rmtree(tmp_path / "empty")


def _record(run_id: str):
    import datetime as dt

    from arflow.warehouse.contract import RunRecord

    now = dt.datetime(2026, 1, 1)
    return RunRecord(run_id=run_id, job="meters", as_of=dt.date(2026, 11, 1), started_at=now, finished_at=now,
                     status="ok", series_total=1, series_published=1, series_quarantined=0, quarantine_share=0.0,
                     on_failure="keep-previous", frequency="month", horizon=6, coverage=(0.8,), source="test",
                     config_sha256="0" * 64, arflow_version="test")
