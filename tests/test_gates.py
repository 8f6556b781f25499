"""Unit tests of ``gates.decide`` at every boundary.

The decision rules are stated in the settings' documentation and the README:
a series is too short when it has fewer than ``min_observations`` values, stale
when more than ``max_periods_behind`` periods lie between its last observation
and the as-of period, a test fails when its p-value is below ``alpha`` (the
usual convention "reject when p < alpha"; common practice), the AR model must
have every root of its companion matrix strictly inside the unit circle
(Box-Jenkins stationarity condition), point forecasts must lie within
``[lower_bound, upper_bound]``, and the backtest statistic (model RMSE / naive
RMSE) may not exceed ``1 + naive_tolerance``. Each rule is checked exactly at
its threshold and one step past it.

NaN inputs are tested with the fail-closed work on the gates, not here.
"""

from __future__ import annotations

import numpy as np
import pytest

from arflow.core.gates import REASONS, decide
from arflow.core.panel import CONSTANT, DUPLICATE_PERIODS, INTERNAL_GAPS, NO_DATA, NON_FINITE_VALUES
from arflow.settings import GateSettings
from helpers import gate_inputs as inputs


def reasons(outcome, g: int) -> list[str]:
    return outcome.reason_lists()[g]


def test_healthy_series_publish_with_no_reasons():
    out = decide(inputs(3), GateSettings(), "difference")
    assert out.published.tolist() == [True, True, True]
    assert out.reason_lists() == [[], [], []]
    assert out.reasons.shape == (3, len(REASONS))


# ----------------------------------------------------------------------------- min_observations


@pytest.mark.parametrize("minimum", [3, 24, 60])
def test_min_observations_boundary(minimum):
    # n equal to the minimum passes; one fewer fails with "too_short"
    g = GateSettings(min_observations=minimum)
    out = decide(inputs(3, n=[minimum, minimum - 1, minimum + 1]), g, "difference")
    assert out.published.tolist() == [True, False, True]
    assert reasons(out, 1) == ["too_short"]
    row = out.gates["too_short"]
    assert row.passed.tolist() == [True, False, True]
    assert row.statistic.tolist() == [minimum, minimum - 1, minimum + 1]
    assert np.all(row.threshold == minimum)


def test_a_short_series_is_not_also_reported_as_a_failed_fit():
    # too short for the gate: the fit was not attempted, which is not a second failure
    out = decide(inputs(2, n=[10, 100], fitted=[False, False]), GateSettings(min_observations=24), "difference")
    assert reasons(out, 0) == ["too_short"]
    # long enough for the gate but the model could not be fitted: "fit_failed"
    assert reasons(out, 1) == ["fit_failed"]


# ----------------------------------------------------------------------------- stale periods


@pytest.mark.parametrize("limit", [0, 1, 3])
def test_stale_periods_boundary(limit):
    # exactly max_periods_behind passes; one more fails with "ends_before_as_of"
    g = GateSettings(max_periods_behind=limit)
    out = decide(inputs(3, stale_periods=[limit, limit + 1, 0]), g, "difference")
    assert out.published.tolist() == [True, False, True]
    assert reasons(out, 1) == ["ends_before_as_of"]
    dq = out.gates["ends_before_as_of"]  # a row only where the check found something; statistic = periods behind
    assert dq.applies.tolist() == [False, True, False]
    assert dq.statistic[1] == limit + 1 and not dq.passed[1]
    assert dq.threshold.tolist() == [limit] * 3 and np.isnan(dq.pvalue).all()


def test_stale_is_not_reported_for_a_series_without_data():
    out = decide(inputs(1, flags=[NO_DATA], stale_periods=[50], fitted=[False], n=[0]), GateSettings(), "difference")
    assert reasons(out, 0) == ["no_data"]


# ----------------------------------------------------------------------------- data-quality flags


@pytest.mark.parametrize(
    "flag, reason, allow",
    [
        (DUPLICATE_PERIODS, "duplicate_periods", "allow_duplicates"),
        (INTERNAL_GAPS, "data_gaps", "allow_gaps"),
        (NON_FINITE_VALUES, "non_finite_values", "allow_gaps"),
    ],
)
def test_quality_flags_quarantine_unless_allowed(flag, reason, allow):
    out = decide(inputs(2, flags=[flag, 0]), GateSettings(), "difference")
    assert reasons(out, 0) == [reason] and reasons(out, 1) == []
    row = out.gates[reason]  # one name: reason code, quality flag and gate row
    assert row.applies.tolist() == [True, False] and row.statistic[0] == 1.0 and not row.passed[0]
    allowed = decide(inputs(2, flags=[flag, 0]), GateSettings(**{allow: True}), "difference")
    assert allowed.published.tolist() == [True, True]


def test_constant_series_is_quarantined_once():
    out = decide(inputs(1, flags=[CONSTANT], fitted=[False]), GateSettings(), "difference")
    assert reasons(out, 0) == ["constant_series"]  # not also "fit_failed"


def test_each_data_problem_has_its_own_gate_row():
    out = decide(inputs(1, flags=[DUPLICATE_PERIODS | INTERNAL_GAPS], stale_periods=[2]), GateSettings(), "difference")
    failed = sorted(name for name, row in out.gates.items() if row.applies[0] and not row.passed[0])
    assert failed == ["data_gaps", "duplicate_periods", "ends_before_as_of"]
    assert reasons(out, 0) == ["duplicate_periods", "data_gaps", "ends_before_as_of"]


# ----------------------------------------------------------------------------- p-value gates


@pytest.mark.parametrize("alpha", [0.01, 0.05, 0.2])
def test_residual_gate_at_alpha(alpha):
    # reject when p < alpha: p equal to alpha passes, the next float below fails
    below = np.nextafter(alpha, 0.0)
    out = decide(inputs(3, residual_pvalue=[alpha, below, 1.0]), GateSettings(alpha=alpha), "difference")
    assert out.published.tolist() == [True, False, True]
    assert reasons(out, 1) == ["residual_autocorrelation"]
    row = out.gates["residual_autocorrelation"]
    assert row.pvalue.tolist() == [alpha, below, 1.0]
    assert np.all(row.threshold == alpha)
    assert row.statistic.tolist() == [8.0, 8.0, 8.0]


def test_arch_gate_at_alpha_and_only_when_enabled():
    alpha = 0.05
    x = inputs(3, arch_statistic=[1.0, 9.0, 2.0], arch_pvalue=[alpha, np.nextafter(alpha, 0.0), 0.9])
    out = decide(x, GateSettings(arch_test=True, alpha=alpha), "difference")
    assert out.published.tolist() == [True, False, True]
    assert reasons(out, 1) == ["residual_arch"]
    assert out.gates["residual_arch"].statistic.tolist() == [1.0, 9.0, 2.0]
    off = decide(x, GateSettings(arch_test=False, alpha=alpha), "difference")
    assert "residual_arch" not in off.gates and off.published.all()


# ----------------------------------------------------------------------------- stationarity and unit roots


def test_stationarity_boundary_is_strict():
    # a root on the unit circle is not stationary (Box-Jenkins: all roots strictly inside)
    below = np.nextafter(1.0, 0.0)
    out = decide(inputs(3, max_root_modulus=[below, 1.0, 1.2]), GateSettings(), "difference")
    assert out.published.tolist() == [True, False, False]
    assert reasons(out, 1) == ["not_stationary"]
    assert np.all(out.gates["not_stationary"].threshold == 1.0)
    relaxed = decide(inputs(3, max_root_modulus=[below, 1.0, 1.2]), GateSettings(require_stationary=False), "difference")
    assert relaxed.published.all() and "not_stationary" not in relaxed.gates


@pytest.mark.parametrize("policy, published", [("quarantine", False), ("difference", True), ("ignore", True)])
def test_unit_root_policy(policy, published):
    out = decide(inputs(2, unit_root=[True, False]), GateSettings(), policy)
    assert out.published.tolist() == [published, True]
    if not published:
        assert reasons(out, 0) == ["unit_root"]
    assert out.gates["unit_root"].statistic.tolist() == [-5.0, -5.0]


def test_gates_that_need_a_fit_do_not_apply_to_unfitted_series():
    out = decide(inputs(1, fitted=[False], residual_pvalue=[0.0], max_root_modulus=[3.0]), GateSettings(), "difference")
    assert reasons(out, 0) == ["fit_failed"]
    for name in ("residual_autocorrelation", "not_stationary", "unit_root"):
        assert not out.gates[name].applies[0] and out.gates[name].passed[0]


def test_non_finite_forecast_is_a_failed_fit():
    out = decide(inputs(2, forecast_finite=[False, True]), GateSettings(), "difference")
    assert reasons(out, 0) == ["fit_failed"] and reasons(out, 1) == []


# ----------------------------------------------------------------------------- forecast bounds


def test_lower_bound_is_inclusive():
    g = GateSettings(lower_bound=0.0)
    out = decide(inputs(3, forecast_min=[0.0, np.nextafter(0.0, -1.0), 5.0]), g, "difference")
    assert out.published.tolist() == [True, False, True]
    assert reasons(out, 1) == ["forecast_below_lower_bound"]
    assert np.all(out.gates["forecast_below_lower_bound"].threshold == 0.0)
    assert "forecast_above_upper_bound" not in out.gates


def test_upper_bound_is_inclusive():
    g = GateSettings(upper_bound=110.0)
    out = decide(inputs(3, forecast_max=[110.0, np.nextafter(110.0, 200.0), 50.0]), g, "difference")
    assert out.published.tolist() == [True, False, True]
    assert reasons(out, 1) == ["forecast_above_upper_bound"]
    assert out.gates["forecast_above_upper_bound"].statistic.tolist() == [110.0, np.nextafter(110.0, 200.0), 50.0]
    assert "forecast_below_lower_bound" not in out.gates


# ----------------------------------------------------------------------------- beats naive


def test_naive_statistic_equal_to_threshold_passes():
    thr = 1.05
    x = inputs(3, naive_statistic=[thr, np.nextafter(thr, 2.0), 0.8], naive_threshold=thr)
    out = decide(x, GateSettings(), "difference", naive_mode="enforce")
    assert out.published.tolist() == [True, False, True]
    assert reasons(out, 1) == ["worse_than_naive"]
    row = out.gates["worse_than_naive"]
    assert row.passed.tolist() == [True, False, True]
    assert np.all(row.threshold == thr)


def test_naive_gate_warn_records_but_never_quarantines():
    x = inputs(2, naive_statistic=[3.0, 0.9], naive_threshold=1.05)
    out = decide(x, GateSettings(), "difference", naive_mode="warn")
    assert out.published.tolist() == [True, True]
    row = out.gates["worse_than_naive"]
    assert row.passed.tolist() == [False, True] and row.applies.tolist() == [True, True]
    assert row.statistic.tolist() == [3.0, 0.9]
    assert "worse_than_naive" not in decide(x, GateSettings(), "difference", naive_mode="off").gates
    # the default mode is "off"
    assert "worse_than_naive" not in decide(x, GateSettings(), "difference").gates


# ----------------------------------------------------------------------------- what the gates table publishes


def test_published_gate_rows_carry_their_inputs():
    # every gate row reports the statistic, p-value and threshold it was judged on (float64 columns)
    x = inputs(
        2,
        adf_statistic=[-4.0, -1.5], adf_pvalue=[0.002, 0.5], max_root_modulus=[0.3, 0.7],
        residual_statistic=[5.0, 6.0], residual_pvalue=[0.7, 0.4],
        arch_statistic=[1.0, 2.0], arch_pvalue=[0.8, 0.6],
        forecast_min=[95.0, 96.0], forecast_max=[105.0, 104.0],
        naive_statistic=[0.8, 0.9], naive_threshold=1.05,
    )
    g = GateSettings(arch_test=True, alpha=0.05, lower_bound=0.0, upper_bound=500.0, min_observations=30)
    out = decide(x, g, "quarantine", naive_mode="enforce")
    expected = {
        "too_short": ([100.0, 100.0], None, 30.0),
        "unit_root": ([-4.0, -1.5], [0.002, 0.5], None),
        "not_stationary": ([0.3, 0.7], None, 1.0),
        "residual_autocorrelation": ([5.0, 6.0], [0.7, 0.4], 0.05),
        "residual_arch": ([1.0, 2.0], [0.8, 0.6], 0.05),
        "forecast_below_lower_bound": ([95.0, 96.0], None, 0.0),
        "forecast_above_upper_bound": ([105.0, 104.0], None, 500.0),
        "worse_than_naive": ([0.8, 0.9], None, 1.05),
    }
    assert set(out.gates) == set(expected)
    for name, (stat, pval, thr) in expected.items():
        row = out.gates[name]
        for a in (row.statistic, row.pvalue, row.threshold):
            assert a.dtype == np.float64, name
        assert row.passed.dtype == bool and row.applies.dtype == bool
        assert row.statistic.tolist() == stat, name
        assert (np.isnan(row.pvalue).all() if pval is None else row.pvalue.tolist() == pval), name
        assert (np.isnan(row.threshold).all() if thr is None else np.all(row.threshold == thr)), name
        assert row.passed.all() and row.applies.all(), name
    assert out.reasons.dtype == bool and out.published.all()
    assert out.reason_lists() == [[], []]


def test_no_fit_no_model_gates():
    # a series without a fit gets no ARCH, bound or backtest verdict (the gates table has no row)
    x = inputs(2, fitted=[False, True], arch_statistic=[30.0, 1.0], arch_pvalue=[0.0, 0.9],
               forecast_min=[-5.0, 1.0], forecast_max=[900.0, 2.0], naive_statistic=[3.0, 0.8], naive_threshold=1.05)
    g = GateSettings(arch_test=True, lower_bound=0.0, upper_bound=500.0)
    for mode in ("warn", "enforce"):
        out = decide(x, g, "difference", naive_mode=mode)
        for name in ("residual_arch", "forecast_below_lower_bound", "forecast_above_upper_bound", "worse_than_naive"):
            assert out.gates[name].applies.tolist() == [False, True], (mode, name)
        assert reasons(out, 0) == ["fit_failed"] and reasons(out, 1) == []


def test_constant_series_counts_one_data_quality_problem():
    out = decide(inputs(2, flags=[CONSTANT, CONSTANT | INTERNAL_GAPS], fitted=[False, False]), GateSettings(), "difference")
    assert out.gates["constant_series"].applies.tolist() == [True, True]
    assert out.gates["data_gaps"].applies.tolist() == [False, True]
    assert reasons(out, 0) == ["constant_series"] and reasons(out, 1) == ["data_gaps", "constant_series"]
