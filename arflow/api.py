"""The one Python call: a long polars/Arrow frame in, typed results out.

>>> import polars as pl, arflow
>>> run = arflow.forecast(frame, keys=["zone"], period="month", value="demand",
...                       settings=arflow.Settings(frequency="month"))   # doctest: +SKIP
>>> run.forecasts.columns[:4]                                            # doctest: +SKIP
['zone', 'period', 'step', 'forecast']
"""

from __future__ import annotations

from dataclasses import replace
from typing import Any

import numpy as np
import polars as pl

from .frames import as_polars, is_spark_frame
from .results import ForecastRun
from .settings import Settings

__all__ = ["ForecastRun", "forecast", "infer_frequency"]


def forecast(
    frame: Any,
    *,
    keys: list[str] | str,
    period: str,
    value: str,
    frequency: str | None = None,
    settings: Settings | None = None,
    as_of: Any = None,
    workers: int | None = None,
) -> ForecastRun:
    """Fit, check, gate and forecast every series of a long frame.

    ``frame`` is a polars DataFrame (or LazyFrame) or a pyarrow Table with one
    row per series and period, or a Spark DataFrame (needs the ``spark``
    extra; the work then runs in Spark tasks on buckets of whole series, see
    :mod:`arflow.engines.spark`). ``keys`` name the columns that identify a
    series; ``period`` is a Date/Datetime/ISO-text column (or integers with
    ``frequency="step"``); ``value`` is numeric. ``as_of`` (a date, ISO text,
    or int) ignores later rows; by default it is the latest period present.
    ``workers`` > 1 runs the statistical core in that many worker processes (blocks of series);
    None (the default) uses the CPUs available to the process (affinity and container quota)
    when the frame holds enough series for that to pay (:data:`arflow.run.MIN_SERIES_FOR_WORKERS`);
    1 keeps everything in this process. The numbers do not depend on it.

    ``frequency`` ("day", "week", "month", "quarter", "year", "step") overrides
    ``settings.frequency``. Without it, the frequency is ``settings.frequency``
    when settings are given, else inferred from the period column
    (:func:`infer_frequency`); either way, when the period column clearly
    holds another frequency than the one in force, or no frequency can be
    inferred, :class:`arflow.errors.SchemaError` names the problem in one line
    (nothing is assumed silently).

    Schema problems raise :class:`arflow.errors.SchemaError`; per-series
    problems become quarantine reasons.

    >>> import polars as pl, numpy as np, datetime as dt, arflow
    >>> rng = np.random.default_rng(0); y = np.zeros(120)
    >>> for t in range(1, 120): y[t] = 0.5 * y[t - 1] + rng.normal()
    >>> months = pl.date_range(dt.date(2015, 1, 1), dt.date(2024, 12, 1), "1mo", eager=True)
    >>> df = pl.DataFrame({"site": "north", "month": months, "flow": 50 + y})
    >>> run = arflow.forecast(df, keys="site", period="month", value="flow")
    >>> run.models["decision"].to_list(), run.forecasts.height
    (['published'], 12)
    """
    key_list = [keys] if isinstance(keys, str) else list(keys)
    if is_spark_frame(frame):  # computed by Spark tasks, each running the same chunk of work on whole series
        from .engines.spark.frame import forecast_spark_frame

        settings = settings or Settings()
        if frequency is not None:
            settings = replace(settings, frequency=frequency)
        return forecast_spark_frame(frame, keys=key_list, period=period, value=value, settings=settings, as_of=as_of)
    from .run import forecast_frame

    settings = _settings_with_frequency(frame, key_list, period, value, frequency, settings)
    return forecast_frame(frame, key_list, period, value, settings, as_of, workers)


#: Typical spacing in days between consecutive periods of each calendar frequency.
_SPACING_DAYS = {"day": (1, 1), "week": (7, 7), "month": (28, 31), "quarter": (89, 92), "year": (365, 366)}


def infer_frequency(frame: Any, period: str) -> str | None:
    """The frequency a period column holds, or None when it cannot be told.

    Integer periods are ``"step"``. Dates (DATE, TIMESTAMP or ISO text): the
    most common spacing between consecutive distinct periods, in days: 1 day,
    7 week, 28-31 month, 89-92 quarter, 365-366 year; anything else (or fewer
    than three distinct periods) is None.
    """
    if is_spark_frame(frame):
        return None
    df = as_polars(frame)
    if period not in df.columns:
        return None  # the frame adapter reports the missing column
    s = df.get_column(period)
    if s.dtype.is_integer():
        return "step"
    if isinstance(s.dtype, pl.Datetime):
        s = s.dt.date()
    elif s.dtype == pl.String:
        s = s.str.to_date(strict=False)
    if s.dtype != pl.Date:
        return None
    days = np.unique(s.drop_nulls().cast(pl.Int32).to_numpy())
    if len(days) < 3:
        return None
    gaps, counts = np.unique(np.diff(days), return_counts=True)
    mode = int(gaps[np.argmax(counts)])
    for name, (lo, hi) in _SPACING_DAYS.items():
        if lo <= mode <= hi:
            return name
    return None


def _settings_with_frequency(
    frame: Any, keys: list[str], period: str, value: str, frequency: str | None, settings: Settings | None
) -> Settings:
    """The settings to run with: an explicit ``frequency`` wins; the period column must not contradict it."""
    from .errors import SchemaError
    from .settings import FREQUENCIES

    if frequency is not None and frequency not in FREQUENCIES:
        raise SchemaError(f"frequency = {frequency!r} is not allowed; use " + " / ".join(f'"{f}"' for f in FREQUENCIES))
    seen = infer_frequency(frame, period)
    chosen = frequency or (settings.frequency if settings is not None else seen)
    if chosen is None:
        from .frames import to_panel_inputs

        to_panel_inputs(frame, keys, period, value, "day")  # a schema problem is the clearer error
        raise SchemaError(
            f"cannot tell the frequency of period column {period!r} (fewer than three distinct periods or "
            "irregular spacing); pass frequency=\"day\" / \"week\" / \"month\" / \"quarter\" / \"year\" / \"step\""
        )
    if seen is not None and seen != chosen and not (seen == "step" or chosen == "step"):
        raise SchemaError(
            f"period column {period!r} holds {seen}ly periods but the frequency is {chosen!r}; "
            f"pass frequency={seen!r} (or set Settings(frequency=...))".replace("dayly", "daily")
        )
    base = settings or Settings()
    return base if base.frequency == chosen else replace(base, frequency=chosen)
