"""Publish-or-quarantine decisions as a pure function of the diagnostics.

Each gate gives, per series, a statistic, a p-value (where it is a test), the
threshold it was held to and whether it passed. A series is published only if
every gate passed; otherwise it is quarantined with one reason code per
failure. Nothing here computes statistics: it only compares.

Fail closed: a gate whose statistic (or p-value, for a test) is not finite
cannot vouch for a series, so it fails with reason ``check_not_computed``
(a NaN compared with a threshold would otherwise count as a pass). A forecast
whose prediction interval is not finite or has (numerically) zero width is
never published: reason ``degenerate_interval``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: Reason codes, in the order they are reported. Each is also the name of its
#: row in the gates table (where it has one) and of its quality flag (data
#: checks): one name per check, documented in ``arflow.vocabulary``.
REASONS = (
    "no_data",
    "duplicate_periods",
    "data_gaps",
    "non_finite_values",
    "constant_series",
    "ends_before_as_of",
    "too_short",
    "fit_failed",
    "unit_root",
    "not_stationary",
    "residual_autocorrelation",
    "residual_arch",
    "forecast_below_lower_bound",
    "worse_than_naive",
    "outliers",
    "interval_undercoverage",
    "order_not_supported",
    # added later; appended so the order of the codes above never changes
    "check_not_computed",
    "degenerate_interval",
    "conflicting_duplicates",
    "off_calendar_periods",
    "forecast_above_upper_bound",
)
REASON_INDEX = {r: i for i, r in enumerate(REASONS)}


@dataclass(frozen=True)
class GateRow:
    """One gate over all series: arrays of shape (G,). ``applies`` False rows are not reported."""

    statistic: np.ndarray
    pvalue: np.ndarray
    threshold: np.ndarray
    passed: np.ndarray
    applies: np.ndarray


@dataclass(frozen=True)
class GateOutcome:
    """``gates`` maps gate name -> :class:`GateRow`; ``reasons`` (G, len(REASONS)) bool."""

    gates: dict[str, GateRow]
    reasons: np.ndarray

    @property
    def published(self) -> np.ndarray:
        return ~self.reasons.any(axis=1)

    def reason_lists(self) -> list[list[str]]:
        names = np.array(REASONS, dtype=object)
        return [list(names[row]) for row in self.reasons]


class GateBuilder:
    """Collects gate rows and reason bits; see :func:`arflow.core.pipeline.run_core`."""

    def __init__(self, n_series: int) -> None:
        self.G = n_series
        self.rows: dict[str, GateRow] = {}
        self.reasons = np.zeros((n_series, len(REASONS)), dtype=bool)

    def _full(self, v, dtype=np.float64) -> np.ndarray:
        return np.broadcast_to(np.asarray(v, dtype=dtype), (self.G,)).copy()

    def add(
        self,
        gate: str,
        passed: np.ndarray,
        statistic=np.nan,
        pvalue=np.nan,
        threshold=np.nan,
        applies=True,
        reason: str | None = None,
        computed=True,
    ) -> None:
        """Record a gate; where it applies but was not ``computed`` it fails with ``check_not_computed``."""
        computed = self._full(computed, bool)
        passed = self._full(passed, bool) & computed
        applies = self._full(applies, bool)
        self.rows[gate] = GateRow(
            self._full(statistic), self._full(pvalue), self._full(threshold), passed | ~applies, applies
        )
        if reason is not None:
            self.flag(reason, applies & ~passed & computed)
        self.flag("check_not_computed", applies & ~computed)

    def flag(self, reason: str, where: np.ndarray) -> None:
        self.reasons[:, REASON_INDEX[reason]] |= np.asarray(where, dtype=bool)

    def outcome(self) -> GateOutcome:
        return GateOutcome(self.rows, self.reasons)


@dataclass(frozen=True)
class GateInputs:
    """What the gates look at, per series (arrays of shape (G,))."""

    flags: np.ndarray  # data-quality bits from the panel
    n: np.ndarray  # length of the fitted run
    stale_periods: np.ndarray  # as_of - last observed period
    fitted: np.ndarray
    unit_root: np.ndarray  # judged to carry a unit root
    differenced: np.ndarray  # modelled on first differences
    adf_statistic: np.ndarray
    adf_pvalue: np.ndarray
    max_root_modulus: np.ndarray
    residual_statistic: np.ndarray
    residual_pvalue: np.ndarray
    forecast_min: np.ndarray
    forecast_max: np.ndarray
    forecast_finite: np.ndarray
    arch_statistic: np.ndarray | None = None
    arch_pvalue: np.ndarray | None = None
    naive_statistic: np.ndarray | None = None  # model RMSE / naive RMSE
    naive_threshold: float | None = None
    outlier_statistic: np.ndarray | None = None  # largest robust AO statistic |lambda|
    outlier_threshold: np.ndarray | None = None  # its critical value c(n)
    outlier_passed: np.ndarray | None = None  # False: outliers held back (policy) or untreatable
    coverage_statistic: np.ndarray | None = None  # backtest interval coverage (worst level)
    coverage_pvalue: np.ndarray | None = None  # one-sided binomial p-value of under-coverage
    coverage_alpha: float | None = None
    order_unsupported: np.ndarray | None = None  # a fixed order the series cannot carry
    selection_cut: np.ndarray | None = None  # fitted on fewer candidate orders than configured
    order_cap: np.ndarray | None = None  # the largest order the series' sample could carry
    max_order: int | None = None
    #: smallest relative half-width of the forecast intervals over steps and
    #: levels (half-width / scale of the series); None: not checked
    interval_relative_width: np.ndarray | None = None


#: A prediction interval narrower than this share of the series' scale is
#: numerically zero: an exact fit (a ramp, a polynomial) whose residuals are
#: rounding noise, not a forecast anyone can rely on.
MIN_RELATIVE_INTERVAL = 1e-9


def _finite(*arrays: np.ndarray | None) -> np.ndarray:
    ok = True
    for a in arrays:
        if a is not None:
            ok = ok & np.isfinite(np.asarray(a, dtype=np.float64))
    return np.asarray(ok, dtype=bool)


def decide(x: GateInputs, gates, unit_root_policy: str, naive_mode: str = "off", coverage_mode: str = "off") -> GateOutcome:
    """Decide publish or quarantine for every series.

    ``gates`` is a :class:`arflow.settings.GateSettings`. ``unit_root_policy``
    is the model setting (``"difference"``, ``"quarantine"``, ``"ignore"``).
    ``naive_mode``: ``"off"``, ``"warn"`` (recorded, never quarantines) or
    ``"enforce"``. ``coverage_mode``: the same three modes for the
    ``interval_calibration`` gate (backtest coverage of the prediction intervals).
    """
    from .panel import (
        CONFLICTING_DUPLICATES,
        CONSTANT,
        DUPLICATE_PERIODS,
        INTERNAL_GAPS,
        NO_DATA,
        NON_FINITE_VALUES,
        OFF_CALENDAR,
    )

    G = len(x.n)
    b = GateBuilder(G)
    f = x.flags
    no_data = (f & NO_DATA) != 0
    dup = ((f & DUPLICATE_PERIODS) != 0) & (not gates.allow_duplicates)
    # allowed duplicates must agree: which of two different values is right cannot be known
    conflict = ((f & CONFLICTING_DUPLICATES) != 0) & gates.allow_duplicates
    gaps = ((f & INTERNAL_GAPS) != 0) & (not gates.allow_gaps)
    nonfin = ((f & NON_FINITE_VALUES) != 0) & (not gates.allow_gaps)
    const = (f & CONSTANT) != 0
    off_calendar = (f & OFF_CALENDAR) != 0
    stale = x.stale_periods > gates.max_periods_behind
    behind = stale & ~no_data
    # each data check writes a gate row (statistic 1 = found) only for the series where it found something
    for name, where in (("no_data", no_data), ("duplicate_periods", dup), ("conflicting_duplicates", conflict),
                        ("data_gaps", gaps), ("non_finite_values", nonfin), ("constant_series", const),
                        ("off_calendar_periods", off_calendar)):
        if np.any(where):
            b.add(name, ~where, statistic=1.0, threshold=0.0, applies=where, reason=name)
    if np.any(behind):
        b.add("ends_before_as_of", ~behind, statistic=x.stale_periods, threshold=gates.max_periods_behind,
              applies=behind, reason="ends_before_as_of")

    short = (x.n < gates.min_observations) & ~no_data
    b.add("too_short", ~short, statistic=x.n, threshold=gates.min_observations, reason="too_short")
    # a series long enough for the gate but not for its model
    unsupported = np.zeros(G, dtype=bool) if x.order_unsupported is None else np.asarray(x.order_unsupported, bool)
    b.flag("fit_failed", ~x.fitted & ~short & ~no_data & ~const & ~unsupported)
    # a fixed order longer than the series can carry: flagged, never refitted at another order
    b.flag("order_not_supported", unsupported & ~short & ~no_data & ~const)
    if x.selection_cut is not None:
        # recorded, never quarantines: the order was chosen among fewer candidates than configured
        b.add("order_candidates", ~np.asarray(x.selection_cut, bool), statistic=x.order_cap,
              threshold=np.nan if x.max_order is None else x.max_order, applies=x.fitted)

    fitted = x.fitted
    adf_ok = _finite(x.adf_statistic, x.adf_pvalue)
    if unit_root_policy == "quarantine":
        ur_pass = ~x.unit_root
    else:
        ur_pass = np.ones(G, dtype=bool)
    b.add(
        "unit_root",
        ur_pass,
        statistic=x.adf_statistic,
        pvalue=x.adf_pvalue,
        threshold=np.nan,
        # the unit-root judgment chooses levels or differences (or quarantines): when the
        # ADF test cannot be computed that choice is a guess, so the gate fails closed
        applies=fitted if unit_root_policy != "ignore" else fitted & adf_ok,
        computed=adf_ok,
        reason="unit_root",
    )
    if gates.require_stationary:
        b.add(
            "not_stationary",
            x.max_root_modulus < 1.0,
            statistic=x.max_root_modulus,
            threshold=1.0,
            applies=fitted,
            computed=_finite(x.max_root_modulus),
            reason="not_stationary",
        )
    p = x.residual_pvalue
    b.add(
        "residual_autocorrelation",
        p >= gates.alpha,
        statistic=x.residual_statistic,
        pvalue=p,
        threshold=gates.alpha,
        applies=fitted,
        computed=_finite(x.residual_statistic, p),
        reason="residual_autocorrelation",
    )
    if gates.arch_test and x.arch_pvalue is not None:
        b.add(
            "residual_arch",
            x.arch_pvalue >= gates.alpha,
            statistic=x.arch_statistic,
            pvalue=x.arch_pvalue,
            threshold=gates.alpha,
            applies=fitted,
            computed=_finite(x.arch_statistic, x.arch_pvalue),
            reason="residual_arch",
        )
    b.flag("fit_failed", fitted & ~x.forecast_finite)
    if x.interval_relative_width is not None:
        w = x.interval_relative_width
        b.add(
            "degenerate_interval",
            w > MIN_RELATIVE_INTERVAL,
            statistic=w,
            threshold=MIN_RELATIVE_INTERVAL,
            applies=fitted & x.forecast_finite,
            computed=_finite(w),
            reason="degenerate_interval",
        )
    if gates.lower_bound is not None:
        b.add(
            "forecast_below_lower_bound",
            x.forecast_min >= gates.lower_bound,
            statistic=x.forecast_min,
            threshold=gates.lower_bound,
            applies=fitted & x.forecast_finite,
            computed=_finite(x.forecast_min),
            reason="forecast_below_lower_bound",
        )
    if gates.upper_bound is not None:
        b.add(
            "forecast_above_upper_bound",
            x.forecast_max <= gates.upper_bound,
            statistic=x.forecast_max,
            threshold=gates.upper_bound,
            applies=fitted & x.forecast_finite,
            computed=_finite(x.forecast_max),
            reason="forecast_above_upper_bound",
        )
    if naive_mode != "off" and x.naive_statistic is not None:
        ok = x.naive_statistic <= x.naive_threshold
        computed = _finite(x.naive_statistic)
        if naive_mode == "enforce":
            # enforced: a series the backtest could not score has not shown it beats naive
            b.add("worse_than_naive", ok, statistic=x.naive_statistic, threshold=x.naive_threshold,
                  applies=fitted, computed=computed, reason="worse_than_naive")
        else:
            # "warn" records the outcome in the gates table but never holds a series back
            b.add("worse_than_naive", ok, statistic=x.naive_statistic, threshold=x.naive_threshold,
                  applies=fitted & computed)
    if x.outlier_passed is not None:
        # fail closed: a fitted series whose outlier statistic could not be computed is not vouched for
        b.add(
            "outliers",
            x.outlier_passed,
            statistic=x.outlier_statistic,
            threshold=x.outlier_threshold,
            applies=fitted,
            computed=_finite(x.outlier_statistic),
            reason="outliers",
        )
    if coverage_mode != "off" and x.coverage_pvalue is not None:
        p = x.coverage_pvalue
        ok = p >= x.coverage_alpha
        computed = _finite(x.coverage_statistic, p)
        if coverage_mode == "enforce":
            # enforced: a series the backtest could not score has not shown its intervals cover
            b.add("interval_undercoverage", ok, statistic=x.coverage_statistic, pvalue=p,
                  threshold=x.coverage_alpha, applies=fitted, computed=computed, reason="interval_undercoverage")
        else:
            # "warn" records the outcome in the gates table but never holds a series back
            b.add("interval_undercoverage", ok, statistic=x.coverage_statistic, pvalue=p,
                  threshold=x.coverage_alpha, applies=fitted & computed)
    return b.outcome()
