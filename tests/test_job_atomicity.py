"""Publishing is one transaction: faults, kills and concurrent runs leave the warehouse as it was."""

from __future__ import annotations

import signal
from pathlib import Path

import pytest

from arflow.cli import main
from arflow.sample.panels import default_job, job_toml, mixed_panel, warehouse_state, write_table
from helpers import published_job, start_paused, warehouse_of


@pytest.fixture
def job(tmp_path: Path) -> Path:
    """A job that has published the vintage 2026-11; returns the job file."""
    return published_job(tmp_path)


@pytest.mark.parametrize("table", ["series_status", "models", "forecasts", "runs", "vintages"])
@pytest.mark.parametrize("as_of", ["2026-11", None], ids=["same vintage", "new vintage"])
def test_fault_mid_publish_leaves_tables_as_before(job: Path, capsys, monkeypatch, table: str, as_of: str | None) -> None:
    before = warehouse_state(warehouse_of(job))
    monkeypatch.setenv("ARFLOW_TEST_FAIL_AFTER", table)
    code = main(["run", str(job)] + (["--as-of", as_of] if as_of else []))
    err = capsys.readouterr().err
    assert code == 1
    assert err.startswith("arflow: error: internal error") and err.count("\n") == 1
    assert f"test fault injected after {table}" in err
    assert warehouse_state(warehouse_of(job)) == before
    monkeypatch.delenv("ARFLOW_TEST_FAIL_AFTER")
    assert main(["run", str(job)]) == 0


def test_killed_mid_publish_leaves_tables_as_before(job: Path, tmp_path: Path, capsys) -> None:
    before = warehouse_state(warehouse_of(job))
    proc = start_paused(job, "forecasts")
    proc.send_signal(signal.SIGKILL)
    proc.communicate(timeout=30)
    assert proc.returncode == -signal.SIGKILL
    assert warehouse_state(warehouse_of(job)) == before
    # and the warehouse is healthy: the next run publishes
    assert main(["run", str(job)]) == 0
    assert warehouse_state(warehouse_of(job))["vintages"] != before["vintages"]


def test_terminated_mid_publish_rolls_back(job: Path, tmp_path: Path) -> None:
    before = warehouse_state(warehouse_of(job))
    proc = start_paused(job, "forecasts")
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=30)
    assert proc.returncode == 130
    assert err.strip().endswith("interrupted; nothing was published by this run")
    assert warehouse_state(warehouse_of(job)) == before


def test_concurrent_run_fails_cleanly_and_first_finishes(job: Path, tmp_path: Path, capsys) -> None:
    before = warehouse_state(warehouse_of(job))
    first = start_paused(job, "forecasts")
    try:
        code = main(["run", str(job), "--as-of", "2026-10"])
        err = capsys.readouterr().err
        assert code == 3
        assert "is in use by another process" in err and "retry when it finishes" in err and err.count("\n") == 1
    finally:
        (tmp_path / "resume").touch()
        out, err = first.communicate(timeout=60)
    assert first.returncode == 0, err
    assert "published" in out
    after = warehouse_state(warehouse_of(job))
    assert [r[2] for r in after["vintages"]] == ["meters@2026-11-01", "meters@2026-12-01"]
    assert after != before


def test_locked_target_with_separate_source(tmp_path: Path, capsys) -> None:
    """Source readable, target held by another run: exit 3 naming the target."""
    write_table(tmp_path / "source.duckdb", mixed_panel())
    sections = default_job("source.duckdb")
    sections["publish"]["database"] = "target.duckdb"
    job = tmp_path / "job.toml"
    job.write_text(job_toml(sections), encoding="utf-8")
    first = start_paused(job, "forecasts")
    try:
        code = main(["run", str(job)])
        err = capsys.readouterr().err
        assert code == 3 and err.startswith("arflow: error: target database") and "in use by another process" in err
        # a dry run only reads the source, so it still works and says the target was busy
        assert main(["run", str(job), "--dry-run"]) == 0
        assert "target in use by another process" in capsys.readouterr().out
    finally:
        (tmp_path / "resume").touch()
        first.communicate(timeout=60)
    assert first.returncode == 0
