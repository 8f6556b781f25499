"""Forecasts and prediction intervals against statsmodels AutoReg; ADF read off the fit vs adfuller."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats
from statsmodels.tsa.ar_model import AutoReg
from statsmodels.tsa.stattools import adfuller

from arflow.core.autoreg import fit_ar
from arflow.core.forecast import forecast_ar, psi_weights
from arflow.core.pipeline import adf_from_fit


def _series():
    return {
        "sunspots": sm.datasets.sunspots.load_pandas().data["SUNACTIVITY"].to_numpy(float),
        "inflation": sm.datasets.macrodata.load_pandas().data["infl"].to_numpy(float),
        "nile": sm.datasets.nile.load_pandas().data["volume"].to_numpy(float),
    }


@pytest.mark.parametrize("name", ["sunspots", "inflation", "nile"])
@pytest.mark.parametrize("p", [1, 3])
def test_forecasts_and_intervals_match_autoreg(name, p):
    y = _series()[name]
    f = fit_ar(y[None], order=p)
    n, k = f.n_obs[0], p + 1
    # statsmodels AutoReg's prediction intervals use sigma^2 = RSS/n; ours use RSS/(n-k).
    # Feed the RSS/n sigma to compare the mechanics exactly.
    sigma_ml = f.sigma * np.sqrt((n - k) / n)
    fc = forecast_ar(y[None], f.intercept, f.phi(), sigma_ml, 24, (0.8, 0.95))
    pred = AutoReg(y, p, trend="c").fit().get_prediction(start=len(y), end=len(y) + 23)
    np.testing.assert_allclose(fc.mean[0], pred.predicted_mean, rtol=1e-9)
    for ci, level in enumerate((0.8, 0.95)):
        band = pred.conf_int(alpha=1 - level)
        np.testing.assert_allclose(fc.lower[ci, 0], band[:, 0], rtol=1e-9)
        np.testing.assert_allclose(fc.upper[ci, 0], band[:, 1], rtol=1e-9)


def test_stationary_forecasts_converge_to_mean_reverting_level():
    y = _series()["sunspots"]
    f = fit_ar(y[None], order=2)
    assert f.stationary[0]
    fc = forecast_ar(y[None], f.intercept, f.phi(), f.sigma, 400, (0.95,))
    # common practice: the long-run forecast of a stationary AR(p) is b0 / (1 - sum b)
    assert abs(fc.mean[0, -1] - f.mean_level[0]) < 1e-6 * abs(f.mean_level[0])
    # and the interval width converges to that of the unconditional variance
    assert np.all(np.diff(fc.sd[0]) >= -1e-12)
    # common practice (Box & Jenkins): the h-step error variance sigma^2 sum_{j<h} psi_j^2 tends to
    # the unconditional variance gamma_0 of the AR(2) process; for AR(2) (Box, Jenkins & Reinsel,
    # chapter 3, from memory): gamma_0 = (1 - phi2) sigma^2 / ((1 + phi2) ((1 - phi2)^2 - phi1^2))
    p1, p2 = f.coef[0, 0], f.coef[0, 1]
    gamma0 = (1 - p2) * f.sigma[0] ** 2 / ((1 + p2) * ((1 - p2) ** 2 - p1**2))
    np.testing.assert_allclose(fc.sd[0, -1] ** 2, gamma0, rtol=1e-10)
    z95 = stats.norm.ppf(0.975)  # scipy reference for the standard normal quantile
    np.testing.assert_allclose(fc.upper[0, 0, -1] - fc.mean[0, -1], z95 * np.sqrt(gamma0), rtol=1e-9)


@pytest.mark.parametrize("phi", [0.9, 0.5, -0.6])
def test_ar1_interval_variance_converges_to_the_unconditional_variance(phi):
    # common practice (Box & Jenkins): AR(1) h-step error variance sigma^2 (1 - phi^2h) / (1 - phi^2),
    # tending to the unconditional variance sigma^2 / (1 - phi^2)
    sigma, H = 1.7, 300
    fc = forecast_ar(np.array([[3.0]]), np.array([0.4]), np.array([[phi]]), np.array([sigma]), H, (0.95,))
    h = np.arange(1, H + 1)
    np.testing.assert_allclose(fc.sd[0] ** 2, sigma**2 * (1 - phi ** (2 * h)) / (1 - phi**2), rtol=1e-12)
    np.testing.assert_allclose(fc.sd[0, -1] ** 2, sigma**2 / (1 - phi**2), rtol=1e-12)
    # the point forecast tends to the mean b0 / (1 - phi)
    np.testing.assert_allclose(fc.mean[0, -1], 0.4 / (1 - phi), rtol=1e-12)


def test_psi_weights_of_ar1_are_powers():
    # common practice: AR(1) psi_j = phi^j
    psi = psi_weights(np.array([[0.7]]), 6)
    np.testing.assert_allclose(psi[0], 0.7 ** np.arange(6))


def test_differenced_model_forecasts_levels():
    rng = np.random.default_rng(4)
    level = np.cumsum(rng.normal(size=150)) + 20
    d = np.diff(level)
    f = fit_ar(d[None], order=2)
    n = f.n_obs[0]
    sig = f.sigma * np.sqrt((n - 3) / n)
    fc = forecast_ar(level[None], f.intercept, f.phi(), sig, 8, (0.9,), np.array([True]))
    ref = AutoReg(d, 2, trend="c").fit()  # statsmodels AutoReg on the differences
    pd_ = ref.get_prediction(start=len(d), end=len(d) + 7).predicted_mean
    np.testing.assert_allclose(fc.mean[0], level[-1] + np.cumsum(pd_), rtol=1e-10)
    # level psi-weights are running sums of the difference model's: widening intervals
    assert np.all(np.diff(fc.sd[0]) > 0)
    # h=1 level error variance equals the difference model's sigma^2
    assert abs(fc.sd[0, 0] - sig[0]) < 1e-12
    # common practice: the level forecast error after h steps sums the differences' errors, so its
    # psi-weights are the running sums of the difference model's psi-weights (from statsmodels' fit)
    p1, p2 = ref.params[1], ref.params[2]
    psi = [1.0, p1]
    for _ in range(6):
        psi.append(p1 * psi[-1] + p2 * psi[-2])
    level_psi = np.cumsum(psi)
    np.testing.assert_allclose(fc.sd[0], sig[0] * np.sqrt(np.cumsum(level_psi**2)), rtol=1e-10)


@pytest.mark.parametrize("name", ["sunspots", "inflation", "nile"])
@pytest.mark.parametrize("p", [1, 2, 5])
def test_adf_read_off_the_level_fit_matches_adfuller(name, p):
    y = _series()[name]
    f = fit_ar(y[None], order=p)
    a = adf_from_fit(f)
    # statsmodels adfuller with p-1 lagged differences and no lag search is the same regression
    ref = adfuller(y, maxlag=p - 1, autolag=None, regression="c")
    assert abs(a.statistic[0] - ref[0]) < 1e-8 * max(1.0, abs(ref[0]))
    assert abs(a.pvalue[0] - ref[1]) < 1e-8
    assert a.nobs[0] == ref[3]
    for key, col in (("1%", a.crit_1), ("5%", a.crit_5), ("10%", a.crit_10)):
        assert abs(col[0] - ref[4][key]) < 1e-8


def test_batch_of_level_and_differenced_models_equals_each_alone():
    # a batch mixing level and differenced models gives every series the numbers it gets alone
    # (the difference models' forecasts are cumulated per series, never across series)
    rng = np.random.default_rng(8)
    Y = np.vstack([np.cumsum(rng.normal(size=80)) + 10, rng.normal(size=80), np.cumsum(rng.normal(size=80)) - 5])
    intercept = np.array([0.1, 0.3, -0.2])
    phi = np.array([[0.4, 0.1], [0.5, 0.0], [-0.3, 0.2]])
    sigma = np.array([1.0, 2.0, 0.5])
    diff = np.array([True, False, True])
    batch = forecast_ar(Y, intercept, phi, sigma, 6, (0.8, 0.95), diff)
    for g in range(3):
        one = forecast_ar(Y[g : g + 1], intercept[g : g + 1], phi[g : g + 1], sigma[g : g + 1], 6, (0.8, 0.95), diff[g : g + 1])
        np.testing.assert_allclose(batch.mean[g], one.mean[0], rtol=1e-13)
        np.testing.assert_allclose(batch.sd[g], one.sd[0], rtol=1e-13)
        np.testing.assert_allclose(batch.lower[:, g], one.lower[:, 0], rtol=1e-13)
    # the differenced series' first step: last level + the difference model's one-step forecast
    d = np.diff(Y[0])
    np.testing.assert_allclose(batch.mean[0, 0], Y[0, -1] + 0.1 + 0.4 * d[-1] + 0.1 * d[-2], rtol=1e-13)
