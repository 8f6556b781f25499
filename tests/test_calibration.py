"""Calibration of the gates and policies by simulation (fixed seeds).

The nominal levels are the outside reference here: a 5% test must reject about
5% of series for which its null hypothesis holds. Data are simulated Gaussian
AR processes (the reference model itself), so the rates are exact targets.

Every rate is bounded on both sides: a gate that never rejects (or a policy
that never acts) fails a lower bound, one that always rejects fails an upper
bound. A detection rate (power) is paired with the same settings on data where
the null holds, whose rate has the upper bound. Bounds on
measured rates are about four binomial standard errors from the measurement.
"""

from __future__ import annotations

import numpy as np
import pytest

from arflow.core.gates import REASONS
from arflow.sample.simulate import simulate_ar as simulate, to_panel as panel_of
from arflow.core.pipeline import run_core
from arflow.settings import GateSettings, ModelSettings, Settings

pytestmark = pytest.mark.slow


def residual_rate(result) -> float:
    return float(result.outcome.reasons[:, REASONS.index("residual_autocorrelation")].mean())


@pytest.fixture(scope="module")
def ar12():
    # 1,000 AR(1) (phi 0.5) and 1,000 AR(2) (0.5, 0.3) series of length 120
    return np.vstack([simulate({1: 0.5}, 1000, 120, 11), simulate({1: 0.5, 2: 0.3}, 1000, 120, 12)])


def test_default_residual_gate_size(ar12):
    r = run_core(panel_of(ar12), Settings(frequency="month"))
    # nominal 5%: the default gate (Ljung-Box, 12 lags, df 12 - p, BIC order) must quarantine 3%..7%
    assert 0.03 <= residual_rate(r) <= 0.07


def test_breusch_godfrey_and_holm_lag_t_are_not_oversized(ar12):
    for gate in (GateSettings(residual_test="breusch-godfrey"), GateSettings(residual_test="lag-t")):
        r = run_core(panel_of(ar12), Settings(frequency="month", gates=gate))
        # nominal 5%; measured 3.0% (Breusch-Godfrey) and 1.6% (Holm over 12 lags: it controls the
        # chance of any false alarm at 5% and is conservative under dependent looks). Binomial SE
        # with 2,000 series: about 0.4 and 0.3 points.
        rate = residual_rate(r)
        low = 0.015 if gate.residual_test == "breusch-godfrey" else 0.005
        assert low <= rate <= 0.07, (gate.residual_test, rate)


def test_uncorrected_per_lag_t_test_over_12_lags_is_badly_oversized(ar12):
    # common practice per-lag t test without multiplicity control: with 12 looks at 5% each
    # the chance of at least one false alarm is far above 5% (about 1 - 0.95^12 = 46% for
    # independent looks; residual autocorrelations of a fitted AR are not independent).
    gate = GateSettings(residual_test="lag-t", lag_correction="none")
    r = run_core(panel_of(ar12), Settings(frequency="month", gates=gate))
    # measured 28.6%: above the nominal 5% by far, below the independent-looks bound of 46%
    assert 0.12 < residual_rate(r) < 0.46


def test_omitted_seasonal_lag_is_caught():
    Y = simulate({1: 0.2, 4: 0.5}, 2000, 120, 21)
    s = Settings(frequency="quarter", model=ModelSettings(order=1, seasonal_lag="off", unit_root="ignore"))
    assert residual_rate(run_core(panel_of(Y), s)) >= 0.90  # measured 97.9%; the other side below
    # the other side: with the same settings on data that have no seasonal lag (the null holds)
    # the gate rejects at its nominal 5% (measured 4.85%), so a gate that always rejects fails here
    Y0 = simulate({1: 0.2}, 2000, 120, 23)
    assert 0.03 <= residual_rate(run_core(panel_of(Y0), s)) <= 0.07


def test_seasonal_candidate_publishes_with_the_seasonal_lag():
    Y = simulate({1: 0.2, 4: 0.5}, 2000, 120, 22)
    for model in (ModelSettings(), ModelSettings(order=1)):
        r = run_core(panel_of(Y), Settings(frequency="quarter", model=model))
        j = list(r.fit.lags).index(4)
        assert (r.outcome.published & r.fit.lag_mask[:, j]).mean() >= 0.90  # measured 93.8%, 92.5%
    # the other side: on data without a seasonal lag the candidate is kept about as often as its 5%
    # significance test allows (measured 4.1% and 4.3%): a rule that always keeps it fails here
    Y0 = simulate({1: 0.2}, 2000, 120, 24)
    for model in (ModelSettings(), ModelSettings(order=1)):
        r = run_core(panel_of(Y0), Settings(frequency="quarter", model=model))
        j = list(r.fit.lags).index(4)
        assert 0.02 <= r.fit.lag_mask[:, j].mean() <= 0.08


def test_differencing_policy_rates():
    rng = np.random.default_rng(31)
    walks = 50.0 + np.cumsum(rng.normal(size=(2000, 120)), axis=1)
    seasonal = simulate({1: 0.2, 4: 0.5}, 2000, 120, 32)
    s = Settings(frequency="quarter", model=ModelSettings(unit_root="difference"))
    # random walks: the ADF test at 5% rejects its true null in about 5% of walks, so about 95%
    # are differenced (measured 93.1%); a policy that never or always differences fails
    assert 0.90 <= run_core(panel_of(walks), s).differenced.mean() <= 0.97
    # stationary seasonal AR: rarely differenced (measured 2.9%)
    assert 0.005 <= run_core(panel_of(seasonal), s).differenced.mean() <= 0.15


def test_backtest_gate_beats_naive_rates():
    # acceptance by simulation: stationary AR(1) (phi 0.5, length 150) beats the random-walk
    # forecast out of sample in >= 90% of series; on random walks no skill can exist, and the
    # default gate statistic (24 origins, step 1) claims more than the 5% tolerance in <= 10%
    from arflow.settings import BacktestSettings

    s = Settings(frequency="month", backtest=BacktestSettings())
    ar = simulate({1: 0.5}, 1000, 150, 51)
    walks = 50.0 + np.cumsum(np.random.default_rng(52).normal(size=(1000, 150)), axis=1)
    ratio_ar = run_core(panel_of(ar), s).outcome.gates["worse_than_naive"].statistic
    ratio_rw = run_core(panel_of(walks), s).outcome.gates["worse_than_naive"].statistic
    assert np.nanmean(ratio_ar < 1.0) >= 0.90  # measured 96.1%; the random walks below are the other side
    # measured 4.1%; a statistic that can never claim skill (always >= 1) fails the lower bound
    assert 0.01 <= np.nanmean(ratio_rw < 1.0 - s.backtest.naive_tolerance) <= 0.10
    # and every series was scored (a NaN statistic would silently drop out of the rates above)
    assert np.isfinite(ratio_ar).all() and np.isfinite(ratio_rw).all()


def test_worker_processes_give_the_same_numbers():
    from arflow.core import pipeline

    p = panel_of(simulate({1: 0.5, 12: 0.3}, 2500, 120, 61))  # three blocks of series
    s = Settings(frequency="month")
    one, two = run_core(p, s), run_core(p, s, workers=2)
    assert p.n_series > pipeline.BLOCK_SERIES
    np.testing.assert_array_equal(one.fit.coef, two.fit.coef)
    np.testing.assert_array_equal(one.forecasts.upper, two.forecasts.upper)
    np.testing.assert_array_equal(one.outcome.reasons, two.outcome.reasons)


# ---------------------------------------------------------------------------------------------
# unit-root decision and residual tests with the seasonal lag (bench/calibration.py measures
# the same cases on 2,000 series; here 500 per case, so a rate's sampling s.e. is at most
# sqrt(0.25 / 500) = 2.2 pp and about 1.1 pp near 6% or 94%: the bounds below are the
# acceptance bounds widened by about two such standard errors, and stated per test)
# ---------------------------------------------------------------------------------------------

from arflow.sample.simulate import random_walks  # noqa: E402

N_CAL = 500


def _decide(Y, frequency):
    r = run_core(panel_of(Y), Settings(frequency=frequency))
    return float(r.differenced.mean()), float((~r.outcome.published).mean())


@pytest.mark.parametrize(
    "frequency, phi, T, seed",
    [
        ("month", {1: 0.3, 12: 0.5}, 120, 501),
        ("week", {1: 0.3, 52: 0.5}, 156, 502),
        ("month", {1: 0.5}, 24, 503),
        ("month", {1: 0.5}, 30, 504),
    ],
)
def test_persistent_stationary_series_stay_on_levels(frequency, phi, T, seed):
    # acceptance: differenced <= 8%, quarantined <= gate level (5%) + 2 pp; bounds widened by
    # ~2 s.e. (diff: 1.2 pp at 6%; quarantine: 1.2 pp at 7%). Two-sided: a quarantine rate far
    # below the gate's level would mean the residual gate no longer tests anything.
    diff, quar = _decide(simulate(phi, N_CAL, T, seed), frequency)
    assert diff <= 0.08 + 0.02
    assert 0.01 <= quar <= 0.07 + 0.025


def test_short_monthly_seasonal_series_stay_on_levels():
    # monthly 0.3 y(t-1) + 0.5 y(t-12) at 60 points (measured on 2,000 series: differenced 2.9%,
    # quarantined 6.9%): acceptance 8% / 7%, each widened by ~2 s.e. at n = 500
    diff, quar = _decide(simulate({1: 0.3, 12: 0.5}, N_CAL, 60, 505), "month")
    assert diff <= 0.08 + 0.02
    assert 0.02 <= quar <= 0.07 + 0.025


@pytest.mark.parametrize("frequency, T, seed", [("month", 60, 511), ("month", 120, 512), ("week", 156, 513),
                                                ("quarter", 60, 514)])
def test_random_walks_are_still_differenced(frequency, T, seed):
    # acceptance >= 90% for random walks of 60+ points; 2 s.e. at 91% and n = 500 is 2.6 pp.
    # Upper bound: ADF rejects at 5%, so about 5% of random walks stay on levels by design.
    diff, _ = _decide(random_walks(N_CAL, T, seed), frequency)
    assert 0.90 - 0.026 <= diff <= 0.985


def _residual_rate(phi, T, seed, frequency, model, gates, G=N_CAL):
    r = run_core(panel_of(simulate(phi, G, T, seed)), Settings(frequency=frequency, model=model, gates=gates))
    return residual_rate(r)


@pytest.mark.parametrize(
    "frequency, phi, T, gates",
    [
        ("week", {1: 0.3, 52: 0.5}, 1040, GateSettings()),
        ("week", {1: 0.3, 52: 0.5}, 1040, GateSettings(residual_test="breusch-godfrey")),
        ("month", {1: 0.3, 12: 0.5}, 240, GateSettings(residual_lags=6)),
        ("month", {1: 0.3, 12: 0.5}, 240, GateSettings(residual_lags=6, residual_test="breusch-godfrey")),
    ],
)
def test_residual_test_size_with_the_seasonal_lag_beyond_residual_lags(frequency, phi, T, gates):
    # acceptance: size within 2 pp of the stated 5% (3%..7%); 2 s.e. at 5% and n = 1,000 is 1.4 pp.
    # (Before: Ljung-Box counted the lag-52 coefficient against lags 1..12: 8.3% weekly, 9.8% monthly.)
    rate = _residual_rate(phi, T, 520 + len(gates.residual_test) + T, frequency, ModelSettings(unit_root="ignore"),
                          gates, G=1000)
    assert 0.03 - 0.014 <= rate <= 0.07 + 0.014


@pytest.mark.parametrize(
    "frequency, phi, T, gates",
    [
        ("week", {1: 0.3, 52: 0.5}, 156, GateSettings()),
        ("week", {1: 0.3, 52: 0.5}, 156, GateSettings(residual_test="breusch-godfrey")),
        ("month", {1: 0.3, 12: 0.5}, 120, GateSettings(residual_lags=6)),
    ],
)
def test_an_omitted_seasonal_lag_beyond_residual_lags_is_caught(frequency, phi, T, gates):
    # acceptance >= 90% (measured 93-98% on 2,000 series); 2 s.e. at 93% and n = 500 is 2.3 pp
    model = ModelSettings(order=1, seasonal_lag="off", unit_root="ignore")
    assert _residual_rate(phi, T, 530 + T, frequency, model, gates) >= 0.90 - 0.023


def test_lag_t_with_the_seasonal_lag_is_not_oversized():
    # per-lag t with Holm is conservative for correlated lags (measured 1-3.5% at 5% across seeds);
    # asserted not oversized (<= 7%) and not dead (>= 0.5%), 1,000 series
    rate = _residual_rate({1: 0.3, 12: 0.5}, 240, 766, "month", ModelSettings(unit_root="ignore"),
                          GateSettings(residual_lags=6, residual_test="lag-t"), G=1000)
    assert 0.005 <= rate <= 0.07
