"""Calendar handling: every frequency labels forecast periods the way the input labels its periods.

Outside reference: the Gregorian calendar as implemented by Python's datetime
(the expected labels are built with datetime arithmetic, not with arflow).
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import polars as pl
import pytest

import arflow
from arflow import GateSettings, Settings
from arflow.sample.simulate import simulate_ar


def _frame(periods: list, seed: int = 1) -> pl.DataFrame:
    y = simulate_ar({1: 0.5}, 1, len(periods), seed)[0]
    return pl.DataFrame({"unit": "u1", "p": periods, "v": y})


def _add_months(d: dt.date, k: int) -> dt.date:
    m = d.month - 1 + k
    return dt.date(d.year + m // 12, m % 12 + 1, 1)


def _month_end(d: dt.date) -> dt.date:
    return _add_months(d, 1) - dt.timedelta(days=1)


def _first_forecasts(periods: list, frequency: str, n: int = 3) -> list:
    run = arflow.forecast(_frame(periods), keys="unit", period="p", value="v",
                          settings=Settings(frequency=frequency, gates=GateSettings(alpha=1e-6)))
    assert run.models["decision"][0] == "published", run.models["reasons"][0]
    return run.forecasts.sort("step")["period"].to_list()[:n]


def test_quarter_ends():
    starts = [_add_months(dt.date(2000, 1, 1), 3 * i) for i in range(80)]
    ends = [_month_end(_add_months(s, 2)) for s in starts]
    nxt = [_month_end(_add_months(starts[-1], 3 * k + 2)) for k in (1, 2, 3)]
    assert _first_forecasts(ends, "quarter") == nxt


def test_quarter_starts():
    starts = [_add_months(dt.date(2000, 1, 1), 3 * i) for i in range(80)]
    assert _first_forecasts(starts, "quarter") == [_add_months(starts[-1], 3 * k) for k in (1, 2, 3)]


def test_weeks_keep_their_weekday():
    mondays = [dt.date(2020, 1, 6) + dt.timedelta(weeks=i) for i in range(150)]
    out = _first_forecasts(mondays, "week")
    assert out == [mondays[-1] + dt.timedelta(weeks=k) for k in (1, 2, 3)]
    assert all(d.weekday() == 0 for d in out)


def test_days_and_years():
    days = [dt.date(2023, 1, 1) + dt.timedelta(days=i) for i in range(200)]
    assert _first_forecasts(days, "day") == [days[-1] + dt.timedelta(days=k) for k in (1, 2, 3)]
    years = [dt.date(1950 + i, 12, 31) for i in range(60)]
    assert _first_forecasts(years, "year") == [dt.date(2010, 12, 31), dt.date(2011, 12, 31), dt.date(2012, 12, 31)]


def test_datetime_periods_and_mixed_weekdays():
    stamps = [dt.datetime(2020, 1, 1, 6, 30) + dt.timedelta(days=i) for i in range(100)]
    assert _first_forecasts(stamps, "day")[0] == dt.date(2020, 4, 10)
    mixed = [dt.date(2020, 1, 6) + dt.timedelta(weeks=i) for i in range(60)]
    mixed[10] += dt.timedelta(days=1)
    # a Tuesday among Monday weeks is not binned silently: the series is held back with a reason
    run = arflow.forecast(_frame(mixed), keys="unit", period="p", value="v", settings=Settings(frequency="week"))
    assert run.models["decision"][0] == "quarantined"
    assert "off_calendar_periods" in run.models["reasons"][0]


def test_integer_periods_must_use_step():
    with pytest.raises(arflow.SchemaError, match="frequency 'step'"):
        _first_forecasts(list(range(50)), "month")
    assert _first_forecasts(list(np.arange(100, 150)), "step") == [150, 151, 152]
