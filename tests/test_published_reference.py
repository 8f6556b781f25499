"""Published numbers, end to end, against statsmodels ``AutoReg`` (reference library).

What is checked is what a user reads: the ``models`` and ``forecasts`` frames of
``arflow.forecast`` and the ``models`` / ``forecasts`` tables an ``arflow run``
writes to a DuckDB warehouse: coefficient t statistics (sign and value), the
residual standard deviation ``sigma`` and the prediction-interval bounds.

Variance convention (stated in DEVELOPERS.md): arflow's sigma^2 is
RSS / (n - k); statsmodels' ``AutoReg`` uses sigma2 = RSS / n, for its standard
errors and its prediction intervals alike (n = observations used, k = lag
coefficients + intercept). So, from statsmodels' numbers:

    sigma       = sqrt(sigma2 * n / (n - k))
    std error   = bse * sqrt(n / (n - k))
    t statistic = tvalues * sqrt((n - k) / n)
    interval    = forecast +/- (half-width of conf_int) * sqrt(n / (n - k))
"""

from __future__ import annotations

from pathlib import Path

import duckdb
import numpy as np
import polars as pl
import pytest
from statsmodels.tsa.ar_model import AutoReg

import arflow
from arflow.cli import main
from arflow.sample.panels import default_job, job_toml, write_table
from arflow.sample.simulate import simulate_ar
from arflow.settings import BacktestSettings, ForecastSettings, ModelSettings, Settings

COVERAGE = (0.8, 0.95)
HORIZON = 12


def plug_in_settings(order: int) -> Settings:
    """The settings of every comparison in this file: fixed order, levels, plug-in intervals.

    statsmodels' intervals are the classic plug-in ones, so the parameter-uncertainty
    correction (``ForecastSettings.parameter_uncertainty``, default true) is switched off, and
    so is outlier treatment (a flagged period would add intervention terms AutoReg does not have).
    """
    return Settings(
        frequency="month",
        model=ModelSettings(order=order, seasonal_lag="off", unit_root="ignore", outliers="off"),
        forecast=ForecastSettings(horizon=HORIZON, coverage=COVERAGE, parameter_uncertainty=False),
        backtest=BacktestSettings(enabled=False),
    )


def plug_in_job(database: str, order: int) -> dict:
    """The job-file equivalent of :func:`plug_in_settings` (plug-in intervals, no outlier treatment)."""
    sections = default_job(database)
    sections["model"] = {"order": order, "seasonal_lag": "off", "unit_root": "ignore", "outliers": "off"}
    sections["forecast"] = {"horizon": HORIZON, "coverage": list(COVERAGE), "parameter_uncertainty": False}
    sections["backtest"] = {"enabled": False}
    return sections


def panel_frame() -> pl.DataFrame:
    """Six seeded AR series of 96 months: AR(1) 0.5, AR(2) (0.6, -0.3) (negative t statistics), AR(1) -0.4."""
    Y = np.vstack([
        simulate_ar({1: 0.5}, 2, 96, 701),
        simulate_ar({1: 0.6, 2: -0.3}, 2, 96, 702),
        simulate_ar({1: -0.4}, 2, 96, 703),
    ])
    months = pl.date_range(pl.date(2017, 1, 1), pl.date(2024, 12, 1), "1mo", eager=True)
    return pl.concat([
        pl.DataFrame({"site": f"s{g + 1:02d}", "month": months, "reading": Y[g]}) for g in range(len(Y))
    ])


def reference(y: np.ndarray, order: int) -> dict:
    """statsmodels AutoReg numbers converted to arflow's RSS/(n-k) convention (module docstring)."""
    res = AutoReg(y, order, trend="c").fit()
    n, k = int(res.nobs), order + 1
    scale = np.sqrt(n / (n - k))
    pred = res.get_prediction(start=len(y), end=len(y) + HORIZON - 1)
    mean = np.asarray(pred.predicted_mean)
    bands = {}
    for level in COVERAGE:
        ci = np.asarray(pred.conf_int(alpha=1 - level))
        half = (ci[:, 1] - ci[:, 0]) / 2 * scale
        bands[level] = (mean - half, mean + half)
    return dict(
        n=n,
        params=np.asarray(res.params),
        t_stats=np.asarray(res.tvalues)[1:] / scale,
        std_errors=np.asarray(res.bse)[1:] * scale,
        intercept_std_error=float(res.bse[0]) * scale,
        sigma=float(np.sqrt(res.sigma2 * n / (n - k))),
        mean=mean,
        bands=bands,
    )


def label(level: float) -> str:
    return f"{round(level * 100):d}"


def check_models(models: pl.DataFrame, frame: pl.DataFrame, order: int) -> None:
    assert models.height == frame["site"].n_unique()
    for row in models.iter_rows(named=True):
        y = frame.filter(pl.col("site") == row["site"]).sort("month")["reading"].to_numpy()
        ref = reference(y, order)
        assert row["lags"] == list(range(1, order + 1))
        assert row["n_obs"] == ref["n"]
        np.testing.assert_allclose(row["coefficients"], ref["params"][1:], rtol=1e-8, atol=1e-12)
        # sign first (a flipped column must not hide behind a tolerance), then value
        assert np.array_equal(np.sign(row["t_stats"]), np.sign(ref["t_stats"])), row["site"]
        np.testing.assert_allclose(row["t_stats"], ref["t_stats"], rtol=1e-8)
        np.testing.assert_allclose(row["std_errors"], ref["std_errors"], rtol=1e-8)
        np.testing.assert_allclose(row["intercept_std_error"], ref["intercept_std_error"], rtol=1e-8)
        # published sigma = sqrt(sigma2 * n / (n - k)) of statsmodels
        np.testing.assert_allclose(row["sigma"], ref["sigma"], rtol=1e-9)


def check_forecasts(forecasts: pl.DataFrame, frame: pl.DataFrame, order: int, sites: list[str]) -> None:
    assert sorted(forecasts["site"].unique().to_list()) == sorted(sites)
    for site in sites:
        y = frame.filter(pl.col("site") == site).sort("month")["reading"].to_numpy()
        ref = reference(y, order)
        fc = forecasts.filter(pl.col("site") == site).sort("step")
        assert fc["step"].to_list() == list(range(1, HORIZON + 1))
        np.testing.assert_allclose(fc["forecast"].to_numpy(), ref["mean"], rtol=1e-9)
        for level in COVERAGE:
            lo, hi = ref["bands"][level]
            np.testing.assert_allclose(fc[f"lower_{label(level)}"].to_numpy(), lo, rtol=1e-9)
            np.testing.assert_allclose(fc[f"upper_{label(level)}"].to_numpy(), hi, rtol=1e-9)


@pytest.fixture(scope="module")
def frame() -> pl.DataFrame:
    return panel_frame()


@pytest.mark.parametrize("order", [1, 2])
def test_api_models_match_autoreg(frame, order):
    run = arflow.forecast(frame, keys="site", period="month", value="reading", settings=plug_in_settings(order))
    check_models(run.models, frame, order)


@pytest.mark.parametrize("order", [1, 2])
def test_api_intervals_match_autoreg(frame, order):
    run = arflow.forecast(frame, keys="site", period="month", value="reading", settings=plug_in_settings(order))
    published = run.models.filter(pl.col("decision") == "published")["site"].to_list()
    assert len(published) >= 4  # the comparison must not pass on an empty table
    check_forecasts(run.forecasts, frame, order, published)


def test_t_statistics_carry_the_sign_of_their_coefficients(frame):
    # t = coefficient / standard error, standard error > 0 (definition)
    run = arflow.forecast(frame, keys="site", period="month", value="reading", settings=plug_in_settings(2))
    coef = np.concatenate(run.models["coefficients"].to_list())
    t = np.concatenate(run.models["t_stats"].to_list())
    se = np.concatenate(run.models["std_errors"].to_list())
    assert (coef < 0).any() and (coef > 0).any()
    np.testing.assert_allclose(t, coef / se, rtol=1e-12)


def test_warehouse_run_publishes_reference_numbers(tmp_path: Path, frame, capsys):
    order = 2
    db = tmp_path / "warehouse.duckdb"
    write_table(db, frame)
    job = tmp_path / "job.toml"
    job.write_text(job_toml(plug_in_job("warehouse.duckdb", order)), encoding="utf-8")
    assert main(["run", str(job)]) == 0  # no alarm: the quarantine share is below the limit
    capsys.readouterr()
    con = duckdb.connect(str(db), read_only=True)
    try:
        models = pl.from_arrow(con.sql("SELECT * FROM arflow.models ORDER BY site").to_arrow_table())
        forecasts = pl.from_arrow(con.sql("SELECT * FROM arflow.forecasts ORDER BY site, step").to_arrow_table())
    finally:
        con.close()
    check_models(models, frame, order)
    published = models.filter(pl.col("decision") == "published")["site"].to_list()
    assert len(published) >= 4
    check_forecasts(forecasts, frame, order, published)
