"""The one Python call: a long polars/Arrow frame in, typed results out.

>>> import polars as pl, arflow
>>> run = arflow.forecast(frame, keys=["zone"], period="month", value="demand",
...                       settings=arflow.Settings(frequency="month"))   # doctest: +SKIP
>>> run.forecasts.columns[:4]                                            # doctest: +SKIP
['zone', 'period', 'step', 'forecast']
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import polars as pl

from .settings import Settings


@dataclass(frozen=True)
class ForecastRun:
    """Results of one run, each a polars DataFrame keyed by the user's key columns.

    models
        One row per series: keys, ``transform`` ("level" or "difference"),
        ``lags`` (list[int]), ``intercept``, ``intercept_std_error``,
        ``coefficients`` / ``std_errors`` / ``t_stats`` (lists aligned with
        ``lags``), ``sigma`` (df-adjusted residual s.d.), ``n_obs``,
        ``r_squared``, ``aic``, ``bic``, ``hqic``, ``max_root_modulus``,
        ``stationary``, ``mean_reverting_level`` (null when not stationary),
        ``adf_statistic``, ``adf_p_value``, ``kpss_statistic``,
        ``kpss_p_value``, ``first_period``, ``last_period``, ``quality_flags``
        (list[str]), ``decision`` ("published" / "quarantined"), ``reasons``
        (list[str]).
    gates
        One row per series and gate: keys, ``gate``, ``statistic``,
        ``p_value``, ``threshold``, ``passed``.
    residual_acf
        keys, ``lag``, ``autocorrelation``, ``t_stat``, ``p_value``.
    forecasts
        Published series only: keys, ``period``, ``step``, ``forecast``,
        ``lower_NN`` / ``upper_NN`` per coverage level.
    """

    models: pl.DataFrame
    gates: pl.DataFrame
    residual_acf: pl.DataFrame
    forecasts: pl.DataFrame
    as_of: Any
    settings: Settings

    @property
    def series_total(self) -> int:
        return self.models.height

    @property
    def series_published(self) -> int:
        return int((self.models["decision"] == "published").sum()) if self.models.height else 0

    @property
    def series_quarantined(self) -> int:
        return self.series_total - self.series_published

    def reason_counts(self) -> dict[str, int]:
        """How many series each reason code held back."""
        if self.models.height == 0:
            return {}
        counts = self.models.select(pl.col("reasons").explode().drop_nulls().value_counts(sort=True)).unnest("reasons")
        return {row[0]: int(row[1]) for row in counts.iter_rows()}
