"""ADF and KPSS against outside references.

Reference implementation: statsmodels 0.15 ``adfuller`` and ``kpss`` (and
``mackinnonp`` / ``mackinnoncrit``) on statsmodels-shipped datasets and seeded
simulations. Published tables: MacKinnon (2010), Queen's Economics Department
Working Paper 1227, Table 1 (response surfaces); Fuller (1996), Introduction
to Statistical Time Series, 2nd ed., Table 10.A.2 (asymptotic tau_mu);
Kwiatkowski, Phillips, Schmidt & Shin (1992), J. Econometrics 54, Table 1.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

import statsmodels.api as sm
from statsmodels.tools.sm_exceptions import InterpolationWarning
from statsmodels.tsa.adfvalues import mackinnoncrit, mackinnonp
from statsmodels.tsa.stattools import adfuller
from statsmodels.tsa.stattools import kpss as sm_kpss

from arflow.core import unitroot
from arflow.core.unitroot import adf, kpss, mackinnon_crit, mackinnon_pvalue
from arflow.sample.simulate import right_align

RTOL = 1e-6


def _series() -> dict[str, np.ndarray]:
    rng = np.random.default_rng(99)
    ar1 = np.zeros(400)
    for t in range(1, 400):
        ar1[t] = 0.7 * ar1[t - 1] + rng.standard_normal()
    return {
        # statsmodels-shipped datasets
        "sunspots": sm.datasets.sunspots.load_pandas().data["SUNACTIVITY"].to_numpy(float),
        "nile": sm.datasets.nile.load_pandas().data["volume"].to_numpy(float),
        "infl": sm.datasets.macrodata.load_pandas().data["infl"].to_numpy(float),
        "realgdp": sm.datasets.macrodata.load_pandas().data["realgdp"].to_numpy(float),
        # seeded simulations: random walk (unit root), stationary AR(1), short random walk
        "rw": np.cumsum(rng.standard_normal(250)),
        "ar1": ar1[100:],
        "rw_short": np.cumsum(rng.standard_normal(30)),
    }


SERIES = _series()


def _sm_kpss(x, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", InterpolationWarning)
        return sm_kpss(x, result_object=True, **kw)


def _check_adf(out, g, ref):
    np.testing.assert_allclose(out.statistic[g], ref.statistic, rtol=RTOL)
    np.testing.assert_allclose(out.pvalue[g], ref.pvalue, rtol=RTOL, atol=1e-12)
    assert out.used_lag[g] == ref.lags
    assert out.nobs[g] == ref.nobs
    for key, got in (("1%", out.crit_1), ("5%", out.crit_5), ("10%", out.crit_10)):
        np.testing.assert_allclose(got[g], ref.critical_values[key], rtol=1e-12)


# ----------------------------------------------------------------------------- ADF


@pytest.mark.parametrize("name", list(SERIES))
@pytest.mark.parametrize("criterion", ["aic", "bic", None])
@pytest.mark.parametrize("regression", ["c", "ct"])
def test_adf_matches_adfuller(name, criterion, regression):
    x = SERIES[name]
    # reference: statsmodels adfuller (default maxlag, autolag, MacKinnon p-value and crit values)
    ref = adfuller(x, regression=regression, autolag=criterion and criterion.upper(), result_object=True)
    out = adf(x, criterion=criterion, regression=regression)
    _check_adf(out, 0, ref)


@pytest.mark.parametrize("maxlag", [0, 2, 5])
def test_adf_given_max_lag(maxlag):
    for name in ("nile", "infl", "rw"):
        x = SERIES[name]
        ref = adfuller(x, maxlag=maxlag, autolag="AIC", result_object=True)  # reference: statsmodels
        _check_adf(adf(x, max_lag=maxlag), 0, ref)


def test_adf_hqic_by_brute_force():
    # no statsmodels autolag="hqic": rebuild the common-sample search with statsmodels OLS .hqic
    x = SERIES["infl"]
    maxlag = 8
    dx = np.diff(x)
    rows = len(dx) - maxlag
    y = dx[maxlag:]
    level = x[maxlag:-1]
    lagged = np.column_stack([dx[maxlag - j : len(dx) - j] for j in range(1, maxlag + 1)])
    hq = [
        sm.OLS(y, sm.add_constant(np.column_stack([level, lagged[:, :k]]))).fit().info_criteria("hqic") for k in range(maxlag + 1)
    ]
    best = int(np.argmin(hq))
    out = adf(x, max_lag=maxlag, criterion="hqic")
    assert out.used_lag[0] == best
    assert rows == len(x) - 1 - maxlag
    ref = adfuller(x, maxlag=best, autolag=None, result_object=True)  # refit with that lag
    _check_adf(out, 0, ref)


def test_adf_ragged_batch_equals_one_at_a_time(monkeypatch):
    rng = np.random.default_rng(5)
    rows = [np.cumsum(rng.standard_normal(n)) + 0.3 * rng.standard_normal(n) for n in (60, 333, 17, 150, 5, 2, 0)]
    rows[3] = rows[3] * 1e4 + 5e6  # large level, checks centring/scaling
    Y = right_align(rows, 340)
    batch = adf(Y)
    # force many small chunks: same numbers
    monkeypatch.setattr(unitroot, "_CHUNK_ELEMS", 500)
    chunked = adf(Y)
    for f in ("statistic", "pvalue", "crit_5"):
        np.testing.assert_allclose(getattr(chunked, f), getattr(batch, f), rtol=1e-10, equal_nan=True)
    np.testing.assert_array_equal(chunked.used_lag, batch.used_lag)
    for g, x in enumerate(rows):
        one = adf(x)
        np.testing.assert_allclose(batch.statistic[g], one.statistic[0], rtol=1e-10, equal_nan=True)
        assert batch.used_lag[g] == one.used_lag[0] and batch.nobs[g] == one.nobs[0]
        if len(x) >= 4:
            _check_adf(batch, g, adfuller(x, autolag="AIC", result_object=True))  # reference: statsmodels
    # per-series max_lag array, fixed lag
    ml = np.array([3, 10, 1, 6, 0, 0, 0])
    fixed = adf(Y, max_lag=ml, criterion=None)
    for g, x in enumerate(rows[:5]):
        _check_adf(fixed, g, adfuller(x, maxlag=int(ml[g]), autolag=None, result_object=True))


def test_adf_too_short_gives_nan():
    Y = right_align([np.arange(n, dtype=float) ** 1.5 for n in (0, 1, 3, 5, 40)])
    out = adf(Y)
    assert np.isnan(out.statistic[:3]).all() and np.isnan(out.pvalue[:3]).all() and np.isnan(out.crit_1[:3]).all()
    assert (out.used_lag[:3] == -1).all()
    # a requested max_lag the sample cannot carry (statsmodels raises): NaN
    out = adf(np.random.default_rng(1).standard_normal(20), max_lag=9)
    assert np.isnan(out.statistic[0])
    with pytest.raises(ValueError):
        adfuller(np.random.default_rng(1).standard_normal(20), maxlag=9)
    assert np.isnan(adf(np.ones(30)).statistic[0])  # constant series


def test_adf_critical_values_mackinnon_2010_and_fuller_1996():
    # MacKinnon (2010) Table 1, tau_c, N = 1: asymptotic b_inf
    np.testing.assert_allclose(mackinnon_crit(1e9), [-3.43035, -2.86154, -2.56677], atol=1e-8)
    np.testing.assert_allclose(mackinnon_crit(np.inf), [-3.43035, -2.86154, -2.56677], rtol=0)
    # Fuller (1996) Table 10.A.2, tau_mu, n = infinity: -3.43, -2.86, -2.57
    np.testing.assert_array_equal(np.round(mackinnon_crit(1e9), 2), [-3.43, -2.86, -2.57])
    # response surface at finite T: C(T) = b_inf + b1/T + b2/T^2 + b3/T^3 (MacKinnon 2010, eq. 7)
    T = 100.0
    np.testing.assert_allclose(
        mackinnon_crit(T)[0], -3.43035 - 6.5393 / T - 16.786 / T**2 - 79.433 / T**3, rtol=1e-14
    )
    for T in (25, 50, 100, 250, 500):
        # reference: statsmodels mackinnoncrit
        np.testing.assert_allclose(mackinnon_crit(T), mackinnoncrit(1, "c", T), rtol=1e-12)
        np.testing.assert_allclose(mackinnon_crit(T, "ct"), mackinnoncrit(1, "ct", T), rtol=1e-12)


def test_mackinnon_pvalue_matches_reference():
    taus = np.linspace(-20, 4, 241)
    for reg in ("c", "ct"):
        # reference: MacKinnon (1994) coefficients as tabulated by statsmodels mackinnonp
        ref = [mackinnonp(t, regression=reg, N=1) for t in taus]
        np.testing.assert_allclose(mackinnon_pvalue(taus, reg), ref, rtol=1e-12, atol=1e-15)
    # the 5 % asymptotic critical value has p close to 0.05
    assert mackinnon_pvalue(-2.86154) == pytest.approx(0.05, abs=2e-3)


# ----------------------------------------------------------------------------- KPSS


@pytest.mark.parametrize("name", list(SERIES))
@pytest.mark.parametrize("nlags", ["auto", "legacy", 4])
def test_kpss_matches_statsmodels(name, nlags):
    x = SERIES[name]
    ref = _sm_kpss(x, regression="c", nlags=nlags)  # reference: statsmodels kpss
    out = kpss(x, nlags)
    np.testing.assert_allclose(out.statistic[0], ref.statistic, rtol=RTOL)
    np.testing.assert_allclose(out.pvalue[0], ref.pvalue, rtol=RTOL)
    assert out.lags[0] == ref.lags
    assert 0.01 <= out.pvalue[0] <= 0.10  # clipped to the KPSS (1992) table range


@pytest.mark.parametrize("name", ["nile", "realgdp", "ar1"])
def test_kpss_trend_matches_statsmodels(name):
    x = SERIES[name]
    ref = _sm_kpss(x, regression="ct", nlags="auto")  # reference: statsmodels kpss
    out = kpss(x, "auto", regression="ct")
    np.testing.assert_allclose(out.statistic[0], ref.statistic, rtol=RTOL)
    np.testing.assert_allclose(out.pvalue[0], ref.pvalue, rtol=RTOL)
    assert out.lags[0] == ref.lags


def test_kpss_pvalue_interpolates_table_1():
    # KPSS (1992) Table 1, level stationarity: 10 % 0.347, 5 % 0.463, 2.5 % 0.574, 1 % 0.739
    np.testing.assert_array_equal(unitroot.KPSS_CRIT["c"], [0.347, 0.463, 0.574, 0.739])
    rng = np.random.default_rng(8)
    Y = np.cumsum(rng.standard_normal((400, 120)), axis=1) * rng.uniform(0, 1, (400, 1)) + rng.standard_normal((400, 120))
    out = kpss(Y, 4)
    expect = np.interp(out.statistic, [0.347, 0.463, 0.574, 0.739], [0.10, 0.05, 0.025, 0.01])
    np.testing.assert_allclose(out.pvalue, expect, rtol=1e-14)
    assert out.pvalue.min() == 0.01 and out.pvalue.max() == 0.10


def test_kpss_ragged_batch_equals_one_at_a_time():
    rng = np.random.default_rng(6)
    rows = [np.cumsum(rng.standard_normal(n)) * s + rng.standard_normal(n) for n, s in ((80, 0.1), (500, 1), (33, 0), (210, 0.3))]
    Y = right_align(rows, 512)
    for nl in ("auto", "legacy", 6):
        batch = kpss(Y, nl)
        for g, x in enumerate(rows):
            ref = _sm_kpss(x, nlags=nl)  # reference: statsmodels kpss
            np.testing.assert_allclose(batch.statistic[g], ref.statistic, rtol=RTOL)
            np.testing.assert_allclose(batch.pvalue[g], ref.pvalue, rtol=RTOL)
            assert batch.lags[g] == ref.lags
            assert batch.statistic[g] == pytest.approx(kpss(x, nl).statistic[0], rel=1e-12)


def test_kpss_too_short_gives_nan():
    Y = right_align([np.arange(n, dtype=float) for n in (0, 1, 2, 10)] + [np.full(10, 3.0)])
    out = kpss(Y)
    assert np.isnan(out.statistic[[0, 1, 2, 4]]).all() and np.isnan(out.pvalue[[0, 1, 2, 4]]).all()
    assert np.isfinite(out.statistic[3])
    assert np.isnan(kpss(np.arange(8.0), 8).statistic[0])  # nlags >= n (statsmodels raises)
