"""AR fitting, order selection and batched OLS against outside references.

References: statsmodels 0.15 ``AutoReg`` / ``ar_select_order`` / ``OLS``
(reference library), NIST StRD "Longley" certified values, and the AR(9)
sunspot estimates kept in statsmodels' own test results (another package's output).
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from statsmodels.tsa.ar_model import AutoReg, ar_select_order

from arflow.core import ols
from arflow.core.autoreg import fit_ar


def sunspots() -> np.ndarray:
    return sm.datasets.sunspots.load_pandas().data["SUNACTIVITY"].to_numpy(dtype=float)


def inflation() -> np.ndarray:
    return sm.datasets.macrodata.load_pandas().data["infl"].to_numpy(dtype=float)


def nile() -> np.ndarray:
    return sm.datasets.nile.load_pandas().data["volume"].to_numpy(dtype=float)


def simulated(seed: int, phi=(0.5, -0.3), n: int = 200) -> np.ndarray:
    rng = np.random.default_rng(seed)
    y = np.zeros(n + 100)
    e = rng.normal(size=n + 100)
    for t in range(len(phi), n + 100):
        y[t] = 3.0 + sum(p * y[t - j - 1] for j, p in enumerate(phi)) + e[t]
    return y[100:]


DATASETS = {
    "sunspots": sunspots,
    "inflation": inflation,
    "nile": nile,
    "sim_a": lambda: simulated(1),
    "sim_b": lambda: simulated(2, phi=(0.9,), n=150),
}


def rel(a, b):
    a, b = np.asarray(a, float), np.asarray(b, float)
    return np.max(np.abs(a - b) / np.maximum(np.abs(b), 1e-300))


# ------------------------------------------------------------------ NIST Longley
LONGLEY_CERTIFIED = [  # NIST StRD Longley certified estimates (B0..B6)
    -3482258.63459582, 15.0618722713733, -0.358191792925910e-01, -2.02022980381683,
    -1.03322686717359, -0.511041056535807e-01, 1829.15146461355,
]
LONGLEY_CERTIFIED_SD = [  # NIST StRD Longley certified standard deviations
    890420.383607373, 84.9149257747669, 0.334910077722432e-01, 0.488399681651699,
    0.214274163161675, 0.226073200069370, 455.478499142212,
]


def test_longley_certified_values():
    d = sm.datasets.longley.load_pandas().data
    y = d["TOTEMP"].to_numpy()
    X = d[["GNPDEFL", "GNP", "UNEMP", "ARMED", "POP", "YEAR"]].to_numpy()
    r = ols.fit(X[None], y[None], np.ones((1, 16)))
    est = np.r_[r.intercept, r.beta[0]]
    se = np.r_[r.intercept_std_error, r.std_errors[0]]
    # NIST StRD Longley: at least 7 significant digits required (we get ~14)
    assert rel(est, LONGLEY_CERTIFIED) < 1e-9
    assert rel(se, LONGLEY_CERTIFIED_SD) < 1e-9
    # NIST StRD Longley: residual SD 304.854073561965, R^2 0.995479004577296, RSS 836424.055505915
    assert abs(np.sqrt(r.sigma2[0]) / 304.854073561965 - 1) < 1e-9
    assert abs(r.r_squared[0] - 0.995479004577296) < 1e-12
    assert abs(r.rss[0] / 836424.055505915 - 1) < 1e-9


def test_longley_in_a_batch_of_other_problems():
    # the same problem inside a batch with unrelated regressions gives the same numbers
    d = sm.datasets.longley.load_pandas().data
    y = d["TOTEMP"].to_numpy()
    X = d[["GNPDEFL", "GNP", "UNEMP", "ARMED", "POP", "YEAR"]].to_numpy()
    rng = np.random.default_rng(0)
    Xb = np.stack([rng.normal(size=X.shape), X, rng.normal(size=X.shape)])
    yb = np.stack([rng.normal(size=16), y, rng.normal(size=16)])
    r = ols.fit(Xb, yb, np.ones((3, 16)))
    assert rel(np.r_[r.intercept[1], r.beta[1]], LONGLEY_CERTIFIED) < 1e-9  # NIST StRD Longley


def test_ols_matches_statsmodels_with_mask_and_weights():
    rng = np.random.default_rng(3)
    X = rng.normal(size=(4, 60, 3))
    y = X @ np.array([1.0, -0.5, 0.25]) + rng.normal(size=(4, 60))
    w = np.ones((4, 60))
    w[1, :10] = 0
    mask = np.ones((4, 3), dtype=bool)
    mask[2, 1] = False
    r = ols.fit(X, y, w, mask)
    for g in range(4):
        keep = w[g] > 0
        cols = np.flatnonzero(mask[g])
        ref = sm.OLS(y[g, keep], sm.add_constant(X[g, keep][:, cols])).fit()  # statsmodels OLS
        assert rel(np.r_[r.intercept[g], r.beta[g, cols]], ref.params) < 1e-10
        assert rel(r.std_errors[g, cols], ref.bse[1:]) < 1e-10
        assert abs(r.intercept_std_error[g] / ref.bse[0] - 1) < 1e-10
        assert np.all(r.beta[g, ~mask[g]] == 0)


# ------------------------------------------------------------------ AR fits vs statsmodels AutoReg
@pytest.mark.parametrize("name", list(DATASETS))
@pytest.mark.parametrize("p", [1, 2, 4])
def test_fixed_order_matches_autoreg(name, p):
    y = DATASETS[name]()
    f = fit_ar(y[None], order=p)
    ref = AutoReg(y, p, trend="c").fit()  # statsmodels AutoReg, constant trend, OLS
    n, k = f.n_obs[0], p + 1
    assert n == ref.nobs
    assert rel(np.r_[f.intercept, f.coef[0]], ref.params) < 1e-8
    # statsmodels' AutoReg uses sigma^2 = RSS/n for its standard errors; ours are RSS/(n-k):
    conv = np.sqrt((n - k) / n)
    assert rel(f.std_err[0] * conv, ref.bse[1:]) < 1e-8
    assert rel(f.intercept_se * conv, ref.bse[:1]) < 1e-8
    assert rel(f.sigma * conv, np.sqrt(ref.sigma2)) < 1e-8
    assert rel(f.aic, ref.aic) < 1e-8
    assert rel(f.bic, ref.bic) < 1e-8
    assert rel(f.hqic, ref.hqic) < 1e-8
    assert rel(f.resid[0, -n:], ref.resid) < 1e-6 or np.max(np.abs(f.resid[0, -n:] - ref.resid)) < 1e-8
    roots = np.abs(1.0 / ref.roots).max()  # statsmodels gives roots of the lag polynomial
    assert abs(f.max_root_modulus[0] - roots) < 1e-8
    if f.stationary[0]:
        assert rel(f.mean_level, ref.params[0] / (1 - ref.params[1:].sum())) < 1e-8


def test_sunspots_ar9_published_values():
    # Yearly sunspots AR(9) OLS with constant, 300 usable observations: reference results from
    # another statistics package kept in statsmodels' own test results.
    published = [6.7430535917332, 1.1649421971129, -0.40535742259304, -0.16653934246587,
                 0.14980629416032, -0.09462417064796, 0.00491001240749, 0.0504665930841,
                 -0.08635349190816, 0.25349103194757]
    f = fit_ar(sunspots()[None], order=9)
    assert f.n_obs[0] == 300
    assert rel(np.r_[f.intercept, f.coef[0]], published) < 1e-9
    # same source: residual RMSE with SSR/(T-k) = 15.1279294937327
    assert abs(f.sigma[0] / 15.1279294937327 - 1) < 1e-9
    # same source: std errors with variance SSR/T: constant 2.413485601, lag1 0.0560359041, lag2 0.0874490762
    conv = np.sqrt(290 / 300)
    assert rel(np.r_[f.intercept_se[0], f.std_err[0, :2]] * conv, [2.413485601, 0.0560359041, 0.0874490762]) < 1e-8


@pytest.mark.parametrize("criterion", ["aic", "bic", "hqic"])
@pytest.mark.parametrize("name", list(DATASETS))
def test_selected_order_matches_ar_select_order(name, criterion):
    y = DATASETS[name]()
    # statsmodels ar_select_order fits every order on a common sample (hold_back = maxlag);
    # the criteria are AutoReg's, -2 llf + penalty * (k + 1): the same definitions as ours.
    ref = ar_select_order(y, 8, ic=criterion, trend="c")
    f = fit_ar(y[None], order="auto", max_order=8, criterion=criterion)
    assert list(f.lags[f.lag_mask[0]]) == list(ref.ar_lags)
    # the chosen order is refitted on its own (longer) sample, like AutoReg(y, p)
    fit = AutoReg(y, ref.ar_lags, trend="c").fit()
    assert rel(np.r_[f.intercept, f.coef[0][f.lag_mask[0]]], fit.params) < 1e-8


def test_seasonal_candidate_agrees_with_autoreg_on_same_lags():
    rng = np.random.default_rng(5)
    y = np.zeros(400)
    e = rng.normal(size=400)
    for t in range(4, 400):
        y[t] = 0.2 * y[t - 1] + 0.5 * y[t - 4] + e[t]
    f = fit_ar(y[None], order=1, seasonal_lag=4)
    lags = list(f.lags[f.lag_mask[0]])
    assert lags == [1, 4]
    ref = AutoReg(y, [1, 4], trend="c").fit()  # statsmodels AutoReg with an explicit lag list
    assert rel(np.r_[f.intercept, f.coef[0][f.lag_mask[0]]], ref.params) < 1e-8


def test_ragged_batch_equals_one_at_a_time():
    ys = [simulated(10 + i, phi=(0.6, 0.2), n=n) for i, n in enumerate([40, 75, 120, 200, 61])]
    T = max(len(y) for y in ys)
    Y = np.full((len(ys), T), np.nan)
    for i, y in enumerate(ys):
        Y[i, T - len(y):] = y
    batch = fit_ar(Y, order="auto", max_order=6, seasonal_lag=12)
    for i, y in enumerate(ys):
        alone = fit_ar(y[None], order="auto", max_order=6, seasonal_lag=12)
        assert np.array_equal(batch.lag_mask[i], alone.lag_mask[0])
        np.testing.assert_allclose(batch.coef[i], alone.coef[0], rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(batch.sigma[i], alone.sigma[0], rtol=1e-10)
        np.testing.assert_allclose(batch.aic[i], alone.aic[0], rtol=1e-12)


def test_too_short_and_constant_series_do_not_raise():
    Y = np.full((3, 50), np.nan)
    Y[0, -5:] = [1, 2, 3, 4, 5]
    Y[1, :] = 7.0
    Y[2, :] = simulated(3, n=50)
    f = fit_ar(Y, order="auto", max_order=4)
    # five values cannot carry an AR model with MIN_RESID_DF residual degrees of freedom: not
    # fitted, and every number is NaN (never a zero that could pass for an estimate)
    assert not f.fitted[0]
    assert f.n_obs[0] == 0 and not f.lag_mask[0].any()
    for name in ("intercept", "sigma", "aic", "max_root_modulus"):
        assert np.isnan(getattr(f, name)[0]), name
    assert np.isnan(f.coef[0]).all() and np.isnan(f.resid[0]).all()
    # a constant series is fitted exactly by its own level: y_t = 7 + 0 * y_(t-1), zero residuals,
    # sigma 0 and undefined t statistics (0 / 0). The pipeline flags it "constant_series" and never
    # fits or publishes it (test_constant_series_is_quarantined_by_the_pipeline).
    assert f.fitted[1] and f.n_obs[1] == 49
    assert f.lags[f.lag_mask[1]].tolist() == [1]
    assert f.intercept[1] == 7.0 and np.all(f.coef[1] == 0.0)
    assert f.sigma[1] == 0.0 and np.all(f.resid[1, -49:] == 0.0)
    assert np.isnan(f.t_stat[1, f.lag_mask[1]]).all()
    assert f.mean_level[1] == 7.0
    assert f.fitted[2]
    ref = AutoReg(Y[2], list(f.lags[f.lag_mask[2]]), trend="c").fit()  # statsmodels AutoReg
    assert rel(np.r_[f.intercept[2], f.coef[2][f.lag_mask[2]]], ref.params) < 1e-8


def test_constant_series_is_quarantined_by_the_pipeline():
    from arflow.core.gates import REASONS
    from arflow.core.pipeline import run_core
    from arflow.sample.simulate import to_panel
    from arflow.settings import Settings

    Y = np.vstack([np.full(60, 7.0), simulated(4, phi=(0.5,), n=60)])
    core = run_core(to_panel(Y), Settings(frequency="step"))
    assert not core.fit.fitted[0] and core.fit.fitted[1]
    assert core.outcome.reason_lists()[0] == ["constant_series"]
    assert core.outcome.published.tolist() == [False, True]
    assert core.outcome.reasons[0, REASONS.index("constant_series")]
