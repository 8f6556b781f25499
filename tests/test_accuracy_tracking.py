"""Backtests and accuracy of published vintages, end to end through the command line.

Outside check: the accuracy rows are recomputed here from their definitions
(error = actual - forecast; absolute percentage error |e / actual|, Hyndman &
Koehler 2006) by joining the published forecasts with the source's actuals.
"""

from __future__ import annotations

from pathlib import Path

import duckdb
import pytest

from arflow.cli import main
from arflow.sample.panels import ar_panel, default_job, job_toml, write_table


def run(capsys, *args: str) -> int:
    code = main(list(args))
    capsys.readouterr()
    return code


@pytest.fixture
def warehouse(tmp_path: Path) -> tuple[Path, Path]:
    db = tmp_path / "warehouse.duckdb"
    write_table(db, ar_panel(8, 72, seed=5))  # 2019-01 .. 2024-12
    sections = default_job("warehouse.duckdb")
    sections["backtest"] = {"origins": 6}
    job = tmp_path / "job.toml"
    job.write_text(job_toml(sections), encoding="utf-8")
    return db, job


def q(db: Path, sql: str) -> list[tuple]:
    con = duckdb.connect(str(db), read_only=True)
    try:
        return con.execute(sql).fetchall()
    finally:
        con.close()


def test_backtests_are_published(warehouse, capsys) -> None:
    db, job = warehouse
    assert run(capsys, "run", str(job)) in (0, 4)
    rows = q(db, "SELECT model, count(*), min(horizon), max(horizon), max(origins) FROM arflow.backtests GROUP BY model ORDER BY model")
    methods = {r[0]: r for r in rows}
    assert set(methods) >= {"ar", "naive"}
    assert methods["ar"][2:] == (1, 6, 6)  # steps 1..horizon, 6 origins
    # coverage rates are shares
    (lo, hi) = q(db, "SELECT min(coverage_80), max(coverage_80) FROM arflow.backtests WHERE model = 'ar'")[0]
    assert 0.0 <= lo <= hi <= 1.0


def test_accuracy_filled_once_for_earlier_vintages(warehouse, capsys) -> None:
    db, job = warehouse
    assert run(capsys, "run", str(job), "--as-of", "2024-06-01") in (0, 4)
    assert q(db, "SELECT count(*) FROM arflow.accuracy")[0][0] == 0  # nothing to score yet
    assert run(capsys, "run", str(job)) in (0, 4)  # as of 2024-12: actuals for Jul..Dec arrived
    rows = q(db, "SELECT count(*), min(step), max(step) FROM arflow.accuracy")[0]
    published = q(db, "SELECT count(*) FROM arflow.series_status WHERE run_id = 'meters@2024-06-01' AND decision = 'published'")[0][0]
    assert rows == (published * 6, 1, 6)
    # recompute from the definitions: error = actual - forecast
    check = q(db, """
        SELECT max(abs(a.error - (r.reading - f.forecast))),
               max(abs(a.abs_pct_error - abs((r.reading - f.forecast) / r.reading))),
               bool_and(a.covered_95 = (r.reading BETWEEN f.lower_95 AND f.upper_95))
        FROM arflow.accuracy a
        JOIN arflow.forecasts f ON f.run_id = a.run_id AND f.site = a.site AND f.period = a.period
        JOIN readings r ON r.site = a.site AND r.month = a.period
    """)[0]
    assert check[0] < 1e-9 and check[1] < 1e-12 and check[2]
    # re-running the same vintage, and running again, records nothing twice
    assert run(capsys, "run", str(job)) in (0, 4)
    assert run(capsys, "run", str(job)) in (0, 4)
    again = q(db, "SELECT count(*), count(DISTINCT (run_id, site, period)) FROM arflow.accuracy")[0]
    assert again == (rows[0], rows[0])
    view = q(db, "SELECT step, forecasts_scored, hit_rate_95 FROM arflow.accuracy_by_horizon ORDER BY step")
    assert [v[0] for v in view] == [1, 2, 3, 4, 5, 6]
    assert all(v[1] == published for v in view)
    assert all(0.0 <= v[2] <= 1.0 for v in view)
