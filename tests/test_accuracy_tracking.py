"""Backtests and accuracy of published vintages, end to end through the command line.

Outside checks: the accuracy rows are recomputed here from their definitions
(error = actual - forecast; absolute percentage error |e / actual|, Hyndman &
Koehler 2006) from the published forecasts and the source's actuals; the
backtest rows are recomputed from the definitions of the naive forecast (the
last value, Hyndman & Koehler 2006) and from statsmodels ``AutoReg`` refits at
every origin (reference library).
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import numpy as np
import polars as pl
import pytest
from statsmodels.tsa.ar_model import AutoReg

from arflow.cli import main
from arflow.sample.panels import ar_panel, default_job, job_toml, write_table
from helpers import query_rows as q

SEED, SITES, MONTHS = 5, 8, 72  # 2019-01 .. 2024-12
ORIGINS, HORIZON = 6, 6


def run(capsys, *args: str) -> int:
    code = main(list(args))
    capsys.readouterr()
    return code


def source_frame() -> pl.DataFrame:
    return ar_panel(SITES, MONTHS, seed=SEED)


@pytest.fixture
def warehouse(tmp_path: Path) -> tuple[Path, Path]:
    db = tmp_path / "warehouse.duckdb"
    write_table(db, source_frame())
    sections = default_job("warehouse.duckdb")
    sections["backtest"] = {"origins": ORIGINS}
    job = tmp_path / "job.toml"
    job.write_text(job_toml(sections), encoding="utf-8")
    return db, job


def test_backtests_are_published(warehouse, capsys) -> None:
    db, job = warehouse
    # exit 0, not the alarm code 4: all eight seeded AR(1) series publish (alarm above 90% held back)
    assert run(capsys, "run", str(job)) == 0
    rows = q(db, "SELECT model, count(*), min(step), max(step), max(origins) FROM arflow.backtests GROUP BY model ORDER BY model")
    methods = {r[0]: r for r in rows}
    assert set(methods) >= {"ar", "naive"}
    assert methods["ar"][2:] == (1, 6, 6)  # steps 1..horizon, 6 origins
    # coverage rates are shares
    (lo, hi) = q(db, "SELECT min(hit_rate_80), max(hit_rate_80) FROM arflow.backtests WHERE model = 'ar'")[0]
    assert 0.0 <= lo <= hi <= 1.0
    check_backtest_values(db)


def check_backtest_values(db: Path) -> None:
    """Recompute the published backtest rows by hand, per series, origin and step.

    Origins are the last ``ORIGINS`` columns that leave ``HORIZON`` actuals
    (columns T-1-H-5 .. T-1-H). Naive forecast: the last training value (Hyndman &
    Koehler 2006), MASE scale: mean |y_t - y_(t-1)| over the origin's training data.
    Model forecast: statsmodels ``AutoReg(train, lags, trend="c")`` refitted at each origin
    with the published lag set (reference library).
    """
    frame = source_frame()
    models = dict(q(db, "SELECT site, lags FROM arflow.models WHERE transform = 'level'"))
    assert len(models) == SITES  # every series modelled on levels: no differencing to redo here
    got = {(r[0], r[1], r[2]): r[3:] for r in q(db, "SELECT site, model, step, rmse, mae, mase FROM arflow.backtests")}
    T = MONTHS
    origins = range(T - 1 - HORIZON - (ORIGINS - 1), T - HORIZON)
    for site, lags in models.items():
        y = frame.filter(pl.col("site") == site).sort("month")["reading"].to_numpy()
        naive_e, model_e, scale = [], [], []
        for c in origins:
            train, actual = y[: c + 1], y[c + 1 : c + 1 + HORIZON]
            naive_e.append(actual - train[-1])
            scale.append(np.mean(np.abs(np.diff(train))))
            res = AutoReg(train, lags, trend="c").fit()
            model_e.append(actual - np.asarray(res.predict(start=len(train), end=len(train) + HORIZON - 1)))
        naive_e, model_e, scale = np.array(naive_e), np.array(model_e), np.array(scale)[:, None]
        for name, e in (("naive", naive_e), ("ar", model_e)):
            rmse, mae, mase = np.sqrt(np.mean(e**2, axis=0)), np.mean(np.abs(e), axis=0), np.mean(np.abs(e) / scale, axis=0)
            for h in range(HORIZON):
                np.testing.assert_allclose(got[(site, name, h + 1)], [rmse[h], mae[h], mase[h]], rtol=1e-8)


def test_accuracy_filled_once_for_earlier_vintages(warehouse, capsys) -> None:
    db, job = warehouse
    assert run(capsys, "run", str(job), "--as-of", "2024-06-01") == 0
    assert q(db, "SELECT count(*) FROM arflow.accuracy")[0][0] == 0  # nothing to score yet
    assert run(capsys, "run", str(job)) == 0  # as of 2024-12: actuals for Jul..Dec arrived
    rows = q(db, "SELECT count(*), min(step), max(step) FROM arflow.accuracy")[0]
    published = q(db, "SELECT count(*) FROM arflow.series_status WHERE run_id = 'meters@2024-06-01' AND decision = 'published'")[0][0]
    assert rows == (published * 6, 1, 6)
    # recompute from the definitions: error = actual - forecast
    check = q(db, """
        SELECT max(abs(a.error - (r.reading - f.forecast))),
               max(abs(a.abs_pct_error - abs((r.reading - f.forecast) / r.reading))),
               bool_and(a.covered_95 = (r.reading BETWEEN f.lower_95 AND f.upper_95))
        FROM arflow.accuracy a
        JOIN arflow.forecasts f ON f.run_id = a.forecast_run_id AND f.site = a.site AND f.period = a.period
        JOIN readings r ON r.site = a.site AND r.month = a.period
    """)[0]
    assert check[0] < 1e-9 and check[1] < 1e-12 and check[2]
    # re-running the same vintage, and running again, records nothing twice
    assert run(capsys, "run", str(job)) == 0
    assert run(capsys, "run", str(job)) == 0
    again = q(db, "SELECT count(*), count(DISTINCT (forecast_run_id, site, period)) FROM arflow.accuracy")[0]
    assert again == (rows[0], rows[0])
    view = q(db, "SELECT step, forecasts_scored, hit_rate_95 FROM arflow.accuracy_by_horizon ORDER BY step")
    assert [v[0] for v in view] == [1, 2, 3, 4, 5, 6]
    assert all(v[1] == published for v in view)
    assert all(0.0 <= v[2] <= 1.0 for v in view)


def test_three_vintages_score_each_forecast_once_with_its_values(warehouse, capsys) -> None:
    # Vintages as of 2024-06, 2024-09 and 2024-12, horizon 6. The 2024-09 run scores the June
    # vintage's Jul..Sep forecasts; the 2024-12 run scores the June vintage's Oct..Dec and the
    # September vintage's Oct..Dec. The June vintage's Jul..Sep rows, already recorded, must not
    # be recorded a second time.
    db, job = warehouse
    for as_of in ("2024-06-01", "2024-09-01", "2024-12-01"):
        assert run(capsys, "run", str(job), "--as-of", as_of) == 0  # all eight series publish: no alarm
    june, september, december = "meters@2024-06-01", "meters@2024-09-01", "meters@2024-12-01"
    rows = q(db, """
        SELECT forecast_run_id, recorded_by, site, period, step, forecast, actual, error, abs_pct_error, covered_80, covered_95
        FROM arflow.accuracy ORDER BY ALL""")
    keys = [(r[0], r[2], r[3]) for r in rows]
    assert len(keys) == len(set(keys))  # no key twice
    sites = [f"s{i + 1:02d}" for i in range(SITES)]
    month = lambda m: dt.date(2024, m, 1)  # noqa: E731
    expected = {(june, s, month(m)): september for s in sites for m in (7, 8, 9)}
    expected |= {(june, s, month(m)): december for s in sites for m in (10, 11, 12)}
    expected |= {(september, s, month(m)): december for s in sites for m in (10, 11, 12)}
    assert {k: r[1] for k, r in zip(keys, rows)} == expected  # exactly these keys, each by the first run that saw it
    assert len(rows) == 72  # 8 series x (6 + 3) scored forecast periods

    # values, recomputed from the published forecasts and the source's actuals
    actual = {(r["site"], r["month"]): r["reading"] for r in source_frame().iter_rows(named=True)}
    published = {
        (r[0], r[1], r[2]): r[3:]
        for r in q(db, "SELECT run_id, site, period, step, forecast, lower_80, upper_80, lower_95, upper_95 FROM arflow.forecasts")
    }
    for run_id, _, site, period, step, forecast, act, error, ape, cov80, cov95 in rows:
        f_step, f, lo80, hi80, lo95, hi95 = published[(run_id, site, period)]
        y = actual[(site, period)]
        assert step == f_step and forecast == f and act == y
        vintage_month = 6 if run_id == june else 9
        assert step == period.month - vintage_month  # step h forecasts the h-th month after the as-of month
        assert abs(error - (y - f)) < 1e-12  # error = actual - forecast
        assert abs(ape - abs((y - f) / y)) < 1e-15  # |e / actual| (Hyndman & Koehler 2006)
        assert cov80 == (lo80 <= y <= hi80) and cov95 == (lo95 <= y <= hi95)

    # the dashboard view: per step, the forecasts scored and their mean absolute error
    by_step: dict[int, list[float]] = {}
    for r in rows:
        by_step.setdefault(r[4], []).append(r[7])
    view = q(db, "SELECT step, forecasts_scored, vintages, mae, rmse FROM arflow.accuracy_by_horizon ORDER BY step")
    assert [v[0] for v in view] == sorted(by_step)
    for step, scored, vintages, mae, rmse in view:
        e = np.array(by_step[step])
        assert scored == len(e) and vintages == len({r[0] for r in rows if r[4] == step})
        np.testing.assert_allclose([mae, rmse], [np.mean(np.abs(e)), np.sqrt(np.mean(e**2))], rtol=1e-12)
