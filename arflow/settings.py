"""Frozen settings for the statistical core: model, forecast and gates.

The job file (TOML) maps one-to-one onto these classes; the Python API takes
them directly. Every value is validated on construction, and a bad value raises
:class:`~arflow.errors.SettingsError` naming the key and what is allowed.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

from .errors import SettingsError

FREQUENCIES = ("day", "week", "month", "quarter", "year", "step")
CRITERIA = ("aic", "bic", "hqic")
UNIT_ROOT_POLICIES = ("difference", "quarantine", "ignore")
OUTLIER_POLICIES = ("treat", "quarantine", "off")
RESIDUAL_TESTS = ("ljung-box", "breusch-godfrey", "lag-t")
MULTIPLE_LAGS = ("holm", "none")

#: Most coverage levels a job may ask for: each level adds columns to three output tables for good.
MAX_COVERAGE_LEVELS = 6

#: Seasonal lag used when ``seasonal_lag = "auto"``.
SEASONAL_PERIOD = {"day": 7, "week": 52, "month": 12, "quarter": 4, "year": None, "step": None}


def _fail(key: str, value: object, allowed: str) -> None:
    raise SettingsError(f"{key} = {value!r} is not allowed; use {allowed}")


def _is_int(v: object) -> bool:
    return isinstance(v, int) and not isinstance(v, bool)


def _is_num(v: object) -> bool:
    return (isinstance(v, (int, float)) and not isinstance(v, bool)) and math.isfinite(v)


@dataclass(frozen=True)
class ModelSettings:
    """How each series is modelled.

    ``order``: ``"auto"`` (select 0..``max_order`` by ``criterion``; 0 is the
    constant mean, i.e. white noise) or a fixed int. A series too short for
    every candidate order selects among those its sample can carry (recorded
    by the ``order_candidates`` gate row, which never quarantines); a fixed
    order longer than a series can carry is never silently lowered: the series
    is quarantined with reason ``order_not_supported``.
    ``seasonal_lag``: ``"auto"`` (4 quarterly, 12 monthly, 7 daily, 52 weekly),
    an int, or ``"off"``; the seasonal lag is added when it improves the
    criterion or its coefficient is significant at ``seasonal_alpha``.
    ``unit_root``: ``"difference"`` (model first differences of series that
    carry a unit root), ``"quarantine"`` (hold them back) or ``"ignore"``.
    A series is judged to carry a unit root when (1) the ADF test does not
    reject at ``unit_root_alpha``, (2) its level model's persistence (sum of
    AR coefficients) is at least ``max(1 - unit_root_bias / n,
    unit_root_min_persistence)`` and (3) the model fitted to its first
    differences is not clearly worse than the level model on the same
    observations (likelihood ratio at most the squared Dickey-Fuller critical
    value at ``unit_root_alpha``). 20 is about the 1% point of the
    Dickey-Fuller normalised-bias distribution with a constant (from memory:
    Fuller 1996, about -19.8 at n = 100); the floor 0.67 is that bound's value
    at 60 observations (1 - 20/60), so the guard does not vanish for shorter
    series: a 24-point series with persistence 0.4 stays on levels. Details and measured rates:
    :func:`arflow.core.pipeline.unit_root_decision` and the README.

    >>> ModelSettings(order=2).order
    2
    """

    order: int | str = "auto"
    max_order: int = 8
    criterion: str = "bic"
    seasonal_lag: int | str = "auto"
    seasonal_alpha: float = 0.05
    unit_root: str = "difference"
    unit_root_alpha: float = 0.05
    unit_root_bias: float = 20.0
    unit_root_min_persistence: float = 0.67
    #: additive outliers (:mod:`arflow.core.outliers`): "treat" (intervention terms, refit,
    #: report), "quarantine" (hold the series back with reason ``outlier``) or "off"
    outliers: str = "treat"

    def min_observations_for_order(self) -> int:
        """Observations a series needs to carry a fixed ``order`` (0 for ``"auto"``).

        ``n - p >= p + 1 + 5``: p coefficients, the intercept and five residual
        degrees of freedom on the ``n - p`` rows an AR(p) is fitted on.
        """
        return 0 if self.order == "auto" else 2 * int(self.order) + 6

    def __post_init__(self) -> None:
        if self.outliers not in OUTLIER_POLICIES:
            _fail("model.outliers", self.outliers, " / ".join(f'"{c}"' for c in OUTLIER_POLICIES))
        if not (_is_num(self.unit_root_bias) and 0 < self.unit_root_bias <= 1000):
            _fail("model.unit_root_bias", self.unit_root_bias, "a positive number (default 20)")
        if not (_is_num(self.unit_root_min_persistence) and 0 <= self.unit_root_min_persistence < 1):
            _fail("model.unit_root_min_persistence", self.unit_root_min_persistence, "a number from 0 up to (not including) 1")
        if not (self.order == "auto" or (_is_int(self.order) and 1 <= self.order <= 60)):
            _fail("model.order", self.order, '"auto" or an integer from 1 to 60')
        if not (_is_int(self.max_order) and 1 <= self.max_order <= 60):
            _fail("model.max_order", self.max_order, "an integer from 1 to 60")
        if self.criterion not in CRITERIA:
            _fail("model.criterion", self.criterion, " / ".join(f'"{c}"' for c in CRITERIA))
        if not (self.seasonal_lag in ("auto", "off") or (_is_int(self.seasonal_lag) and 2 <= self.seasonal_lag <= 400)):
            _fail("model.seasonal_lag", self.seasonal_lag, '"auto", "off" or an integer from 2 to 400')
        if self.unit_root not in UNIT_ROOT_POLICIES:
            _fail("model.unit_root", self.unit_root, " / ".join(f'"{c}"' for c in UNIT_ROOT_POLICIES))
        for key in ("seasonal_alpha", "unit_root_alpha"):
            v = getattr(self, key)
            if not (_is_num(v) and 0 < v < 1):
                _fail(f"model.{key}", v, "a number strictly between 0 and 1")

    def seasonal_for(self, frequency: str) -> int | None:
        """The seasonal lag to try for ``frequency`` (None when off or undefined)."""
        if self.seasonal_lag == "off":
            return None
        if self.seasonal_lag == "auto":
            return SEASONAL_PERIOD.get(frequency)
        return int(self.seasonal_lag)


@dataclass(frozen=True)
class ForecastSettings:
    """Forecast horizon and prediction-interval coverage levels.

    ``parameter_uncertainty``: ``True`` (default) widens the intervals by the
    estimation uncertainty of the coefficients (delta method, Fuller & Hasza
    1981) and uses Student-t quantiles with the residual degrees of freedom;
    ``False`` gives the classic plug-in psi-weight intervals (the coefficients
    treated as known, Gaussian quantiles; what statsmodels' ``AutoReg`` reports).
    ``selection_uncertainty``: ``True`` (default; only with
    ``parameter_uncertainty``) widens them further by the uncertainty of the
    model choice (order, levels or differences): the forecast distribution
    over the candidate models weighted by the criterion
    (:mod:`arflow.core.intervals`); ``False`` keeps the selected model's own.

    >>> ForecastSettings(horizon=6, coverage=(0.8,)).horizon
    6
    """

    horizon: int = 12
    coverage: tuple[float, ...] = (0.8, 0.95)
    parameter_uncertainty: bool = True
    selection_uncertainty: bool = True

    def __post_init__(self) -> None:
        if not isinstance(self.parameter_uncertainty, bool):
            _fail("forecast.parameter_uncertainty", self.parameter_uncertainty, "true or false")
        if not isinstance(self.selection_uncertainty, bool):
            _fail("forecast.selection_uncertainty", self.selection_uncertainty, "true or false")
        if not (_is_int(self.horizon) and 1 <= self.horizon <= 1000):
            _fail("forecast.horizon", self.horizon, "an integer from 1 to 1000")
        cov = tuple(self.coverage) if isinstance(self.coverage, (list, tuple)) else None
        if not cov:
            _fail("forecast.coverage", self.coverage, "a non-empty list of levels such as [0.8, 0.95]")
        for c in cov:
            if not (_is_num(c) and 0 < c < 1):
                _fail("forecast.coverage", c, "levels strictly between 0 and 1, e.g. [0.8, 0.95]")
        if len(cov) > MAX_COVERAGE_LEVELS:
            _fail("forecast.coverage", f"{len(cov)} levels", f"at most {MAX_COVERAGE_LEVELS} levels (each adds interval columns to the output tables for good)")
        labels = [coverage_label(c) for c in cov]
        if len(set(labels)) != len(labels):
            _fail("forecast.coverage", list(cov), "distinct levels (each names lower_NN / upper_NN columns)")
        object.__setattr__(self, "coverage", tuple(float(c) for c in cov))


def coverage_label(level: float) -> str:
    """Column suffix for a coverage level: 0.8 -> "80", 0.975 -> "97_5"."""
    pct = round(level * 100, 6)
    if pct == int(pct):
        return str(int(pct))
    return f"{pct:g}".replace(".", "_")


@dataclass(frozen=True)
class GateSettings:
    """Which checks decide publish or quarantine, and at what level.

    ``residual_test``: ``"ljung-box"`` (default), ``"breusch-godfrey"`` or
    ``"lag-t"`` (per-lag t tests, Holm-corrected unless ``lag_correction="none"``).
    ``series_fdr``: when set (e.g. 0.05), the residual test's p-values are
    Benjamini-Hochberg adjusted across the series of a run before comparing.
    ``lower_bound`` / ``upper_bound``: forecasts (point values) outside are
    quarantined. ``max_quarantine_share``: the CLI exits with the alarm code
    when more than this share of series is held back.
    """

    residual_test: str = "ljung-box"
    residual_lags: int = 12
    alpha: float = 0.05
    lag_correction: str = "holm"
    series_fdr: float | None = None
    min_observations: int = 24
    require_stationary: bool = True
    allow_gaps: bool = False
    allow_duplicates: bool = False
    max_periods_behind: int = 0
    lower_bound: float | None = None
    upper_bound: float | None = None
    arch_test: bool = False
    arch_lags: int = 4
    max_quarantine_share: float = 0.5

    def __post_init__(self) -> None:
        if self.residual_test not in RESIDUAL_TESTS:
            _fail("gates.residual_test", self.residual_test, " / ".join(f'"{c}"' for c in RESIDUAL_TESTS))
        if not (_is_int(self.residual_lags) and 1 <= self.residual_lags <= 200):
            _fail("gates.residual_lags", self.residual_lags, "an integer from 1 to 200")
        if not (_is_num(self.alpha) and 0 < self.alpha < 1):
            _fail("gates.alpha", self.alpha, "a number strictly between 0 and 1, e.g. 0.05")
        if self.lag_correction not in MULTIPLE_LAGS:
            _fail("gates.lag_correction", self.lag_correction, '"holm" or "none"')
        if self.series_fdr is not None and not (_is_num(self.series_fdr) and 0 < self.series_fdr < 1):
            _fail("gates.series_fdr", self.series_fdr, "a number strictly between 0 and 1, or leave it out")
        if not (_is_int(self.min_observations) and 3 <= self.min_observations):
            _fail("gates.min_observations", self.min_observations, "an integer of at least 3")
        if not (_is_int(self.max_periods_behind) and self.max_periods_behind >= 0):
            _fail("gates.max_periods_behind", self.max_periods_behind, "an integer of at least 0")
        for key in ("lower_bound", "upper_bound"):
            v = getattr(self, key)
            if v is not None and not _is_num(v):
                _fail(f"gates.{key}", v, "a finite number, or leave it out")
        if self.lower_bound is not None and self.upper_bound is not None and self.lower_bound >= self.upper_bound:
            _fail("gates.lower_bound", self.lower_bound, "a value below gates.upper_bound")
        for key in ("require_stationary", "allow_gaps", "allow_duplicates", "arch_test"):
            if not isinstance(getattr(self, key), bool):
                _fail(f"gates.{key}", getattr(self, key), "true or false")
        if not (_is_int(self.arch_lags) and 1 <= self.arch_lags <= 60):
            _fail("gates.arch_lags", self.arch_lags, "an integer from 1 to 60")
        if not (_is_num(self.max_quarantine_share) and 0 <= self.max_quarantine_share <= 1):
            _fail("gates.max_quarantine_share", self.max_quarantine_share, "a number from 0 to 1")


NAIVE_GATE_MODES = ("off", "warn", "enforce")


@dataclass(frozen=True)
class BacktestSettings:
    """Rolling-origin backtest and the ``worse_than_naive`` gate.

    ``origins``: how many forecast origins (expanding window) to refit and
    score; ``horizon``: steps scored per origin (default: the forecast
    horizon). ``naive_gate``: ``"off"``, ``"warn"`` (recorded in the gates
    table, never quarantines) or ``"enforce"`` (quarantine with reason
    ``worse_than_naive``). The gate statistic is model RMSE / naive RMSE
    pooled over the origins and steps 1..``naive_steps``; a series fails when
    it exceeds ``1 + naive_tolerance``. Few steps and many origins keep the
    ratio from showing chance skill (errors of overlapping horizons are
    strongly correlated). Measured with the defaults (24 origins, step 1) on
    1,000 simulated series of length 150: stationary AR(1) with phi 0.5 beats
    naive in 96%; random walks show a ratio below 0.95 in 3.7%
    (``bench/calibration.py``).

    ``coverage_gate`` (``interval_undercoverage``): off / warn / enforce like
    ``naive_gate``, reason ``interval_undercoverage``. Measured size with the
    defaults (5%, step 1, 24 origins) on 2,000 series of 120 whose model is
    right: 1.5-1.8% (the exact binomial test is discrete, hence conservative).

    >>> BacktestSettings(origins=24).naive_steps
    1
    """

    enabled: bool = True
    origins: int = 24
    horizon: int | None = None
    naive_gate: str = "warn"
    naive_tolerance: float = 0.05
    naive_steps: int = 1
    #: interval_undercoverage gate: "off" / "warn" / "enforce"; a series fails when its
    #: backtest coverage at steps 1..coverage_steps is significantly below nominal
    #: (one-sided exact binomial test at coverage_alpha, Bonferroni over the levels)
    coverage_gate: str = "warn"
    coverage_alpha: float = 0.05
    coverage_steps: int = 1

    def __post_init__(self) -> None:
        if self.coverage_gate not in NAIVE_GATE_MODES:
            _fail("backtest.coverage_gate", self.coverage_gate, '"off", "warn" or "enforce"')
        if not (_is_num(self.coverage_alpha) and 0 < self.coverage_alpha < 1):
            _fail("backtest.coverage_alpha", self.coverage_alpha, "a number strictly between 0 and 1, e.g. 0.05")
        if not (_is_int(self.coverage_steps) and 1 <= self.coverage_steps <= 1000):
            _fail("backtest.coverage_steps", self.coverage_steps, "an integer from 1 up to the backtest horizon")
        if not isinstance(self.enabled, bool):
            _fail("backtest.enabled", self.enabled, "true or false")
        if not (_is_int(self.origins) and 1 <= self.origins <= 500):
            _fail("backtest.origins", self.origins, "an integer from 1 to 500")
        if self.horizon is not None and not (_is_int(self.horizon) and 1 <= self.horizon <= 1000):
            _fail("backtest.horizon", self.horizon, "an integer from 1 to 1000, or leave it out")
        if self.naive_gate not in NAIVE_GATE_MODES:
            _fail("backtest.naive_gate", self.naive_gate, '"off", "warn" or "enforce"')
        if not (_is_num(self.naive_tolerance) and 0 <= self.naive_tolerance < 10):
            _fail("backtest.naive_tolerance", self.naive_tolerance, "a number from 0 (e.g. 0.05 for 5%)")
        if not (_is_int(self.naive_steps) and 1 <= self.naive_steps <= 1000):
            _fail("backtest.naive_steps", self.naive_steps, "an integer from 1 up to the backtest horizon")


@dataclass(frozen=True)
class Settings:
    """Everything the core needs for one run (besides the data)."""

    frequency: str = "month"
    model: ModelSettings = field(default_factory=ModelSettings)
    forecast: ForecastSettings = field(default_factory=ForecastSettings)
    gates: GateSettings = field(default_factory=GateSettings)
    backtest: BacktestSettings = field(default_factory=BacktestSettings)

    def __post_init__(self) -> None:
        if self.frequency not in FREQUENCIES:
            _fail("source.frequency", self.frequency, " / ".join(f'"{c}"' for c in FREQUENCIES))
        need = self.model.min_observations_for_order()
        if need > self.gates.min_observations:
            raise SettingsError(
                f"model.order = {self.model.order} needs at least {need} observations per series but "
                f"gates.min_observations = {self.gates.min_observations}; raise gates.min_observations "
                f"to {need} or lower model.order"
            )


#: the one message for gates.series_fdr with Spark (a job file, a spec built in code, a Spark frame)
SERIES_FDR_SPARK = (
    'gates.series_fdr adjusts p-values across all series of a run, which engine = "spark" does not support; '
    "leave series_fdr out, or run this job with the DuckDB engine"
)


def refuse_series_fdr_on_spark(settings: Settings) -> None:
    """Spark fits buckets of series independently, so an adjustment across all series cannot be made there."""
    if settings.gates.series_fdr is not None:
        raise SettingsError(SERIES_FDR_SPARK)
