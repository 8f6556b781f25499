"""The results of a run: the result object and its table names, in one place.

Every list of run table names in arflow is derived from the tuples here:
the per-chunk result frames (:data:`RESULT_TABLES`), what a chunk stages on
disk (:data:`STAGED_TABLES`, the results plus the recent ``actuals``), and the
tables a target writes per run (:data:`RUN_TABLES`, in insert order).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import polars as pl
import pyarrow as pa

from .settings import Settings

#: frames one chunk of work produces (``arflow.ForecastRun`` has one attribute per name)
RESULT_TABLES = ("models", "gates", "residual_acf", "forecasts", "backtests")
#: the recent actuals of a chunk (keys, ``period``, ``value``): accuracy tracking scores earlier vintages with them
ACTUALS = "actuals"
#: what a chunk stages on local disk until the run is published
STAGED_TABLES = (*RESULT_TABLES, ACTUALS)
#: per-series decision rows a target derives from ``models``
SERIES_STATUS = "series_status"
#: tables written per run, in insert order (the fault hook names these)
RUN_TABLES = (SERIES_STATUS, *RESULT_TABLES, "accuracy")
#: tables the published view reads (a held run leaves these as they were)
VIEW_TABLES = (SERIES_STATUS, "forecasts")


def _frame(table: Any) -> pl.DataFrame | None:
    if table is None or isinstance(table, pl.DataFrame):
        return table
    frame = pl.from_arrow(table)
    assert isinstance(frame, pl.DataFrame)
    return frame


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
        (list[str]), ``failed_gates`` (list of {gate, statistic, p_value,
        threshold}: every gate row the series failed), ``warnings``
        (list[str]: checks that failed without holding it back).
    gates
        One row per series and gate: keys, ``gate``, ``statistic``,
        ``p_value``, ``threshold``, ``passed``.
    residual_acf
        keys, ``lag``, ``autocorrelation``, ``t_stat``, ``p_value``.
    forecasts
        Published series only: keys, ``period``, ``step``, ``forecast``,
        ``lower_NN`` / ``upper_NN`` per coverage level.
    backtests
        When the backtest is enabled: keys, ``model`` ("ar", "naive",
        "seasonal_naive"), ``step``, ``rmse``, ``mae``, ``mase``,
        ``hit_rate_NN`` (share of origins inside the NN% interval, AR model),
        ``origins`` (origins scored).
    """

    models: pl.DataFrame
    gates: pl.DataFrame
    residual_acf: pl.DataFrame
    forecasts: pl.DataFrame
    as_of: Any
    settings: Settings
    backtests: pl.DataFrame | None = None

    @property
    def series_total(self) -> int:
        return self.models.height

    @property
    def series_published(self) -> int:
        return int((self.models["decision"] == "published").sum()) if self.models.height else 0

    @property
    def series_quarantined(self) -> int:
        return self.series_total - self.series_published

    def tables(self) -> dict[str, pl.DataFrame | None]:
        """Every result table by name (:data:`RESULT_TABLES` order; ``backtests`` None when not run)."""
        return {name: getattr(self, name) for name in RESULT_TABLES}

    @classmethod
    def from_tables(cls, tables: dict[str, Any], *, as_of: Any, settings: Settings) -> "ForecastRun":
        """The result object from tables by name (polars frames or Arrow tables; a missing ``backtests`` is None)."""
        frames = {name: _frame(tables.get(name)) for name in RESULT_TABLES}
        return cls(**frames, as_of=as_of, settings=settings)

    def to_arrow(self) -> dict[str, pa.Table]:
        """Every result table present, as Arrow tables."""
        return {name: frame.to_arrow() for name, frame in self.tables().items() if frame is not None}

    def reason_counts(self) -> dict[str, int]:
        """How many series each reason code held back."""
        if self.models.height == 0:
            return {}
        counts = self.models.select(pl.col("reasons").explode().drop_nulls().value_counts(sort=True)).unnest("reasons")
        return {row[0]: int(row[1]) for row in counts.iter_rows()}

    def warning_counts(self) -> dict[str, int]:
        """How many series each warning check (failed, but not held back) fired for."""
        if self.models.height == 0 or "warnings" not in self.models.columns:
            return {}
        counts = self.models.select(pl.col("warnings").explode().drop_nulls().value_counts(sort=True)).unnest("warnings")
        return {row[0]: int(row[1]) for row in counts.iter_rows()}
