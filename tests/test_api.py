"""The one Python call: frames in, keyed results out; bad input gives a clear error or a flag."""

from __future__ import annotations

import datetime as dt

import numpy as np
import polars as pl
import pytest
from statsmodels.tsa.ar_model import AutoReg

import arflow
from arflow import ModelSettings, Settings


def ar_series(seed: int, n: int, phi: float = 0.6, mean: float = 100.0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    y = np.zeros(n + 50)
    for t in range(1, n + 50):
        y[t] = phi * y[t - 1] + rng.normal()
    return mean + y[50:]


def months(end: dt.date, n: int) -> pl.Series:
    return pl.date_range(dt.date(1990, 1, 1), end, "1mo", eager=True)[-n:]


def frame(lengths=(120, 90, 60), end=dt.date(2024, 12, 1)) -> pl.DataFrame:
    parts = []
    for i, n in enumerate(lengths):
        parts.append(pl.DataFrame({"basin": f"b{i}", "gauge": i, "month": months(end, n), "flow": ar_series(i, n)}))
    return pl.concat(parts)


def test_results_are_keyed_and_typed():
    run = arflow.forecast(frame(), keys=["basin", "gauge"], period="month", value="flow")
    assert run.models.columns[:2] == ["basin", "gauge"]
    assert run.models.height == 3
    for col in ("lags", "coefficients", "std_errors", "reasons", "quality_flags"):
        assert isinstance(run.models.schema[col], pl.List)
    assert set(run.gates["gate"].unique()) >= {"too_short", "residual_autocorrelation"}
    assert {"lower_80", "upper_80", "lower_95", "upper_95"} <= set(run.forecasts.columns)
    pub = run.models.filter(pl.col("decision") == "published")
    assert run.forecasts.height == pub.height * 12
    first = run.forecasts.filter(pl.col("step") == 1)["period"]
    assert (first == dt.date(2025, 1, 1)).all()
    assert run.series_total == 3 and run.series_published + run.series_quarantined == 3


def test_ragged_frame_same_numbers_as_each_series_alone():
    settings = Settings(frequency="month", model=ModelSettings(order=2, seasonal_lag="off", unit_root="ignore"))
    df = frame(lengths=(120, 75, 48))
    together = arflow.forecast(df, keys=["basin"], period="month", value="flow", settings=settings)
    for name in ("b0", "b1", "b2"):
        alone = arflow.forecast(df.filter(pl.col("basin") == name), keys=["basin"], period="month",
                                value="flow", settings=settings)
        a = together.models.filter(pl.col("basin") == name)
        np.testing.assert_allclose(a["coefficients"][0].to_numpy(), alone.models["coefficients"][0].to_numpy(), rtol=1e-10)
        np.testing.assert_allclose(a["sigma"][0], alone.models["sigma"][0], rtol=1e-10)
        # and both agree with statsmodels AutoReg on that series (reference library)
        y = df.filter(pl.col("basin") == name)["flow"].to_numpy()
        ref = AutoReg(y, 2, trend="c").fit()
        np.testing.assert_allclose(a["coefficients"][0].to_numpy(), ref.params[1:], rtol=1e-8)


def test_arrow_input_and_month_end_labels():
    df = frame(lengths=(100,)).with_columns(pl.col("month").dt.month_end())
    run = arflow.forecast(df.to_arrow(), keys="basin", period="month", value="flow")
    assert run.forecasts["period"][0] == dt.date(2025, 1, 31)
    assert run.models["last_period"][0] == dt.date(2024, 12, 31)


def test_as_of_ignores_later_rows():
    run = arflow.forecast(frame(lengths=(120,)), keys="basin", period="month", value="flow", as_of="2023-12-01")
    assert run.models["last_period"][0] == dt.date(2023, 12, 1)
    assert run.forecasts["period"][0] == dt.date(2024, 1, 1)


def test_integer_steps():
    y = ar_series(3, 80)
    df = pl.DataFrame({"unit": "u1", "t": np.arange(80), "v": y})
    run = arflow.forecast(df, keys="unit", period="t", value="v", settings=Settings(frequency="step"))
    assert run.forecasts["period"].to_list()[:2] == [80, 81]


@pytest.mark.parametrize(
    "mutate, message",
    [
        (lambda d: d.drop("flow"), "no value column 'flow'"),
        (lambda d: d.with_columns(pl.col("flow").cast(pl.String)), "must be numeric"),
        (lambda d: d.clear(), "no rows"),
        (lambda d: d.with_columns(pl.lit("May 2020").alias("month")), "not an ISO date"),
        (lambda d: d.with_columns(pl.when(pl.col("gauge") == 1).then(None).otherwise(pl.col("basin")).alias("basin")),
         "NULL"),
    ],
)
def test_schema_problems_raise_one_clear_error(mutate, message):
    with pytest.raises(arflow.ArflowError) as err:
        arflow.forecast(mutate(frame()), keys=["basin"], period="month", value="flow")
    text = str(err.value)
    assert message in text and "\n" not in text


def test_bad_series_become_reasons_not_exceptions():
    df = frame(lengths=(120, 120, 120, 10))
    df = df.with_columns(
        pl.when(pl.col("basin") == "b1").then(None).otherwise(pl.col("flow")).alias("flow")  # all-NaN series
    )
    dup = df.filter(pl.col("basin") == "b2").head(3)
    df = pl.concat([df, dup])  # duplicate periods in b2
    run = arflow.forecast(df, keys=["basin"], period="month", value="flow")
    reasons = dict(zip(run.models["basin"], run.models["reasons"].to_list()))
    assert reasons["b0"] == []
    assert "no_data" in reasons["b1"]
    assert "duplicate_periods" in reasons["b2"]
    assert "too_short" in reasons["b3"]
    assert set(run.forecasts["basin"].unique()) == {"b0"}
