"""Residual diagnostics against outside references.

Reference implementation: statsmodels 0.15 (``acf``, ``acorr_ljungbox``,
``acorr_breusch_godfrey``, ``het_arch``, ``multipletests``) on datasets that
statsmodels ships and on seeded simulated series; distribution tables: NIST/
SEMATECH e-Handbook of Statistical Methods, sections 1.3.6.7.2 (Student t) and
1.3.6.7.4 (chi-square).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

import statsmodels.api as sm
from statsmodels.stats.diagnostic import acorr_breusch_godfrey, acorr_ljungbox, het_arch
from statsmodels.stats.multitest import multipletests
from statsmodels.tsa.stattools import acf as sm_acf

from arflow.core import ols
from arflow.sample.simulate import right_align
from arflow.core.diagnostics import (
    AcfResult,
    arch_lm,
    benjamini_hochberg,
    breusch_godfrey,
    holm,
    ljung_box,
    residual_acf,
)

RTOL = 1e-6


def _series() -> dict[str, np.ndarray]:
    rng = np.random.default_rng(20240601)
    ar2 = np.zeros(260)
    eps = rng.standard_normal(260)
    for t in range(2, 260):
        ar2[t] = 0.6 * ar2[t - 1] - 0.3 * ar2[t - 2] + eps[t]
    garch_like = rng.standard_normal(300) * np.sqrt(1 + 0.5 * np.sin(np.arange(300) / 7) ** 2)
    return {
        # statsmodels-shipped datasets
        "sunspots": sm.datasets.sunspots.load_pandas().data["SUNACTIVITY"].to_numpy(float),
        "nile": sm.datasets.nile.load_pandas().data["volume"].to_numpy(float),
        "infl": sm.datasets.macrodata.load_pandas().data["infl"].to_numpy(float),
        # seeded simulations
        "ar2": ar2[60:],
        "hetero": garch_like,
    }


SERIES = _series()


def _lagmat(y: np.ndarray, p: int) -> tuple[np.ndarray, np.ndarray]:
    """Lag matrix of y (rows p..n-1) built with numpy: column j is y_{t-j-1}."""
    X = np.column_stack([y[p - j - 1 : len(y) - j - 1] for j in range(p)])
    return X, y[p:]


def _sm_ar_fit(y: np.ndarray, p: int):
    X, yy = _lagmat(y, p)
    return sm.OLS(yy, sm.add_constant(X)).fit(), X


# ----------------------------------------------------------------------------- ACF


@pytest.mark.parametrize("name", list(SERIES))
def test_residual_acf_matches_statsmodels(name):
    res, _ = _sm_ar_fit(SERIES[name], 3)
    e = res.resid
    out = residual_acf(e, 12)
    # reference: statsmodels.tsa.stattools.acf (adjusted=False: denominator over all n)
    ref = sm_acf(e, nlags=12, fft=False)[1:]
    np.testing.assert_allclose(out.acf[0], ref, rtol=1e-10, atol=1e-12)
    n = len(e)
    assert out.nobs[0] == n
    np.testing.assert_allclose(out.t_stat[0], ref * np.sqrt(n), rtol=1e-10)
    # two-tailed Student t with n - 2 df (scipy.stats.t, checked against NIST below)
    np.testing.assert_allclose(out.pvalue[0], 2 * stats.t.sf(np.abs(ref * np.sqrt(n)), n - 2), rtol=1e-9)


# ----------------------------------------------------------------------------- Ljung-Box


@pytest.mark.parametrize("name", list(SERIES))
@pytest.mark.parametrize("p", [1, 3])
def test_ljung_box_matches_statsmodels(name, p):
    res, _ = _sm_ar_fit(SERIES[name], p)
    e = res.resid
    for lags in (6, 10, 15):
        # reference: statsmodels acorr_ljungbox(..., model_df=p)
        ref = acorr_ljungbox(e, lags=[lags], model_df=p)
        out = ljung_box(e, lags, p)
        np.testing.assert_allclose(out.statistic[0], ref["lb_stat"].iloc[0], rtol=RTOL)
        np.testing.assert_allclose(out.pvalue[0], ref["lb_pvalue"].iloc[0], rtol=RTOL, atol=1e-12)
        assert out.df[0] == lags - p


def test_ljung_box_from_acf_and_array_model_df():
    rows, dfs = [], []
    for p, name in zip([1, 2, 3], ["sunspots", "nile", "ar2"]):
        rows.append(_sm_ar_fit(SERIES[name], p)[0].resid)
        dfs.append(p)
    E = right_align(rows)
    a = residual_acf(E, 10)
    assert isinstance(a, AcfResult)
    via_acf = ljung_box(a, 10, np.array(dfs))
    direct = ljung_box(E, 10, np.array(dfs))
    np.testing.assert_allclose(via_acf.statistic, direct.statistic, rtol=1e-14)
    for g, (e, p) in enumerate(zip(rows, dfs)):
        # reference: statsmodels acorr_ljungbox with per-series model_df
        ref = acorr_ljungbox(e, lags=[10], model_df=p)
        np.testing.assert_allclose(via_acf.statistic[g], ref["lb_stat"].iloc[0], rtol=RTOL)
        np.testing.assert_allclose(via_acf.pvalue[g], ref["lb_pvalue"].iloc[0], rtol=RTOL)


def test_ljung_box_df_floored_at_one():
    e = SERIES["ar2"]
    out = ljung_box(e, 4, 6)
    assert out.df[0] == 1.0
    # our documented convention (statsmodels gives NaN here): chi2 with 1 df
    assert out.pvalue[0] == pytest.approx(stats.chi2.sf(out.statistic[0], 1), rel=1e-12)


# ----------------------------------------------------------------------------- Breusch-Godfrey


@pytest.mark.parametrize("name", list(SERIES))
@pytest.mark.parametrize("p,nlags", [(1, 1), (2, 4), (3, 8)])
def test_breusch_godfrey_matches_statsmodels(name, p, nlags):
    res, X = _sm_ar_fit(SERIES[name], p)
    # reference: statsmodels acorr_breusch_godfrey on the OLS AR(p) results
    ref = acorr_breusch_godfrey(res, nlags=nlags, result_object=True)
    out = breusch_godfrey(res.resid, X[None], None, nlags)
    np.testing.assert_allclose(out.statistic[0], ref.lm, rtol=RTOL)
    np.testing.assert_allclose(out.pvalue[0], ref.lmpval, rtol=RTOL, atol=1e-14)
    assert out.df[0] == nlags


def test_breusch_godfrey_mask_drops_regressors():
    y = SERIES["infl"]
    X, yy = _lagmat(y, 4)
    keep = np.array([True, False, False, True])  # subset AR with lags 1 and 4
    res = sm.OLS(yy, sm.add_constant(X[:, keep])).fit()
    ref = acorr_breusch_godfrey(res, nlags=4, result_object=True)  # reference: statsmodels
    out = breusch_godfrey(res.resid, X[None], keep[None], 4)
    np.testing.assert_allclose(out.statistic[0], ref.lm, rtol=RTOL)
    np.testing.assert_allclose(out.pvalue[0], ref.lmpval, rtol=RTOL)


# ----------------------------------------------------------------------------- ARCH LM


@pytest.mark.parametrize("name", list(SERIES))
@pytest.mark.parametrize("q", [1, 4, 12])
def test_arch_lm_matches_statsmodels(name, q):
    e = _sm_ar_fit(SERIES[name], 2)[0].resid
    ref = het_arch(e, nlags=q, result_object=True)  # reference: statsmodels het_arch (ddof=0)
    out = arch_lm(e, q)
    np.testing.assert_allclose(out.statistic[0], ref.lm, rtol=RTOL)
    np.testing.assert_allclose(out.pvalue[0], ref.lmpval, rtol=RTOL, atol=1e-14)


# ----------------------------------------------------------------------------- ragged batch


def test_ragged_batch_equals_one_at_a_time():
    rows, Xs = [], []
    lens = [40, 300, 97, 12, 158]
    rng = np.random.default_rng(7)
    for n in lens:
        y = np.cumsum(rng.standard_normal(n + 2)) * 0.1 + rng.standard_normal(n + 2)
        X, yy = _lagmat(y, 2)
        res = sm.OLS(yy, sm.add_constant(X)).fit()
        rows.append(res.resid)
        Xs.append((X, res))
    T = max(len(r) for r in rows) + 5  # extra all-NaN leading columns
    E = right_align(rows, T)
    Xp = np.full((len(rows), T, 2), np.nan)
    for g, (X, _) in enumerate(Xs):
        Xp[g, T - len(X) :] = X
    acf_b, lb_b = residual_acf(E, 8), ljung_box(E, 8, 2)
    bg_b, ar_b = breusch_godfrey(E, Xp, None, 3), arch_lm(E, 3)
    for g, e in enumerate(rows):
        acf_1 = residual_acf(e, 8)
        np.testing.assert_allclose(acf_b.acf[g], acf_1.acf[0], rtol=1e-12, atol=1e-14, equal_nan=True)
        np.testing.assert_allclose(acf_b.pvalue[g], acf_1.pvalue[0], rtol=1e-10, atol=1e-14, equal_nan=True)
        np.testing.assert_allclose(lb_b.statistic[g], ljung_box(e, 8, 2).statistic[0], rtol=1e-12, equal_nan=True)
        one = breusch_godfrey(e, Xs[g][0][None], None, 3)
        np.testing.assert_allclose(bg_b.statistic[g], one.statistic[0], rtol=1e-9, equal_nan=True)
        np.testing.assert_allclose(ar_b.statistic[g], arch_lm(e, 3).statistic[0], rtol=1e-9, equal_nan=True)
        if len(e) > 30:
            # and each equals statsmodels (reference)
            ref = acorr_breusch_godfrey(Xs[g][1], nlags=3, result_object=True)
            np.testing.assert_allclose(bg_b.statistic[g], ref.lm, rtol=RTOL)
            np.testing.assert_allclose(lb_b.statistic[g], acorr_ljungbox(e, lags=[8])["lb_stat"].iloc[0], rtol=RTOL)
            np.testing.assert_allclose(ar_b.statistic[g], het_arch(e, nlags=3, result_object=True).lm, rtol=RTOL)


def test_too_short_series_give_nan():
    rng = np.random.default_rng(3)
    E = right_align([rng.standard_normal(n) for n in (0, 1, 2, 4, 6, 50)])
    E[4] = np.nan
    E[4, -6:] = 2.0  # constant residuals
    X = np.where(np.isnan(E), np.nan, 1.0)[:, :, None] * rng.standard_normal(E.shape + (1,))
    a = residual_acf(E, 5)
    assert np.isnan(a.acf[:2]).all() and np.isnan(a.pvalue[:3]).all()
    assert a.acf[2, 0] == pytest.approx(-0.5) and np.isnan(a.acf[2, 1:]).all()  # n = 2: r_1 defined, no t df
    assert np.isnan(a.acf[3, 3:]).all() and np.isfinite(a.acf[3, :3]).all()
    assert np.isnan(a.acf[4]).all()
    lb = ljung_box(E, 5)
    assert np.isnan(lb.statistic[:5]).all() and np.isnan(lb.pvalue[:5]).all() and np.isfinite(lb.pvalue[5])
    bg = breusch_godfrey(E, X, None, 2)
    assert np.isnan(bg.pvalue[:4]).all() and np.isfinite(bg.pvalue[5])
    ar = arch_lm(E, 2)
    assert np.isnan(ar.pvalue[:5]).all() and np.isfinite(ar.pvalue[5])


def test_interior_nan_is_rejected():
    e = np.arange(10.0)
    e[4] = np.nan
    with pytest.raises(ValueError, match="right-aligned"):
        ljung_box(e, 2)


# ----------------------------------------------------------------------------- multiplicity


def test_holm_matches_multipletests():
    rng = np.random.default_rng(11)
    P = rng.uniform(size=(12, 8)) ** 3
    P[0, :3] = 0.01  # ties
    out = holm(P)
    for g in range(P.shape[0]):
        # reference: statsmodels multipletests(method="holm")
        np.testing.assert_allclose(out[g], multipletests(P[g], method="holm")[1], rtol=1e-12)
    assert (out >= P).all() and (out <= 1).all()
    # monotone in the raw p-values within a row
    for g in range(P.shape[0]):
        o = np.argsort(P[g])
        assert np.all(np.diff(out[g, o]) >= 0)


def test_benjamini_hochberg_matches_multipletests_nan_aware():
    rng = np.random.default_rng(12)
    p = np.concatenate([rng.uniform(size=300), rng.uniform(size=40) * 1e-3])
    p[[5, 77, 200]] = np.nan
    out = benjamini_hochberg(p)
    ok = ~np.isnan(p)
    assert np.isnan(out[~ok]).all()
    # reference: statsmodels multipletests(method="fdr_bh") on the non-NaN p-values
    np.testing.assert_allclose(out[ok], multipletests(p[ok], method="fdr_bh")[1], rtol=1e-12)
    P = rng.uniform(size=(6, 5))
    P[2, 1] = np.nan
    h = holm(P)
    assert np.isnan(h[2, 1])
    np.testing.assert_allclose(h[2, [0, 2, 3, 4]], multipletests(P[2, [0, 2, 3, 4]], method="holm")[1], rtol=1e-12)


# ----------------------------------------------------------------------------- tables


def test_scipy_quantiles_match_nist_tables():
    # NIST/SEMATECH e-Handbook 1.3.6.7.2: t, two-tailed 5 % (upper 2.5 %) at 16 df = 2.120
    assert round(stats.t.ppf(0.975, 16), 3) == 2.120
    # NIST/SEMATECH e-Handbook 1.3.6.7.4: chi-square upper 5 % points, 1..12 df
    nist = [3.841, 5.991, 7.815, 9.488, 11.070, 12.592, 14.067, 15.507, 16.919, 18.307, 19.675, 21.026]
    np.testing.assert_allclose(stats.chi2.isf(0.05, np.arange(1, 13)), nist, atol=5e-4)
    # and the tests' p-values are those distributions: a statistic at the 5 % point has p = 0.05
    assert ljung_box(SERIES["ar2"], 4, 0).pvalue[0] == pytest.approx(
        stats.chi2.sf(ljung_box(SERIES["ar2"], 4, 0).statistic[0], 4), rel=1e-12
    )


# ----------------------------------------------------------------------------- size by simulation


def _ar1_panel(rng: np.random.Generator, G: int, n: int, phi: float) -> np.ndarray:
    burn = 50
    eps = rng.standard_normal((G, n + burn))
    x = np.zeros_like(eps)
    for t in range(1, n + burn):
        x[:, t] = phi * x[:, t - 1] + eps[:, t]
    return x[:, burn:]


def test_ljung_box_size_on_white_noise():
    # nominal 5 % test, G = 2000 independent white-noise series of length 200
    e = np.random.default_rng(2024).standard_normal((2000, 200))
    rate = np.mean(ljung_box(e, 10).pvalue < 0.05)
    assert 0.035 <= rate <= 0.065, rate


def test_breusch_godfrey_size_on_ar1_residuals():
    # G = 2000 AR(1) series (phi = 0.5), fitted by batched OLS; BG(4) at nominal 5 %
    x = _ar1_panel(np.random.default_rng(2025), 2000, 200, 0.5)
    X, y = x[:, :-1, None], x[:, 1:]
    res = ols.fit(X, y, np.ones_like(y))
    rate = np.mean(breusch_godfrey(res.resid, X, None, 4).pvalue < 0.05)
    assert 0.035 <= rate <= 0.065, rate


# ----------------------------------------------------------------------------- the pipeline's residual test


@pytest.mark.parametrize("lags", [6, 12])
def test_pipeline_ljung_box_df_is_lags_minus_p_for_contiguous_ar(lags):
    # Contiguous AR(p) models (lags 1..p, no seasonal lag): the pipeline refers Ljung-Box Q at
    # `residual_lags` K to chi-square with K - p degrees of freedom (Ljung & Box 1978; statsmodels
    # acorr_ljungbox(resid, lags=[K], model_df=p)), and the gates table carries that p-value.
    from statsmodels.tsa.ar_model import AutoReg

    from arflow.core.pipeline import run_core
    from arflow.sample.simulate import simulate_ar, to_panel
    from arflow.settings import BacktestSettings, GateSettings, ModelSettings, Settings

    Y = simulate_ar({1: 0.5, 2: 0.2}, 4, 120, 404)
    for p in (1, 2, 3):
        s = Settings(
            frequency="step",
            model=ModelSettings(order=p, seasonal_lag="off", unit_root="ignore"),
            gates=GateSettings(residual_lags=lags),
            backtest=BacktestSettings(enabled=False),
        )
        core = run_core(to_panel(Y), s)
        assert core.fit.lag_mask.sum(axis=1).tolist() == [p] * 4
        assert core.residual_test.df.tolist() == [float(lags - p)] * 4
        row = core.outcome.gates["residual_autocorrelation"]
        for g in range(4):
            resid = AutoReg(Y[g], p, trend="c").fit().resid
            ref = acorr_ljungbox(resid, lags=[lags], model_df=p)  # statsmodels reference
            np.testing.assert_allclose(row.statistic[g], ref["lb_stat"].iloc[0], rtol=1e-9)
            np.testing.assert_allclose(row.pvalue[g], ref["lb_pvalue"].iloc[0], rtol=1e-9)


# ----------------------------------------------------------------------------- edges found by mutation testing


def test_residual_acf_is_scale_free_and_allows_one_lag():
    # autocorrelations do not depend on the residuals' units (definition): tiny residuals give
    # statsmodels' numbers too, and a single lag is a valid request
    e = SERIES["ar2"] * 1e-4
    a = residual_acf(e, 1)
    assert a.acf.shape == (1, 1)
    np.testing.assert_allclose(a.acf[0], sm_acf(e, nlags=1, adjusted=False, fft=False)[1:], rtol=1e-10)
    lb = ljung_box(e, 1)  # one lag: statsmodels acorr_ljungbox(e, lags=[1])
    np.testing.assert_allclose(lb.statistic[0], acorr_ljungbox(e, lags=[1])["lb_stat"].iloc[0], rtol=RTOL)
    assert lb.df[0] == 1.0


def test_residual_acf_of_three_values_has_a_t_p_value():
    # n = 3: r_1 is defined and its t test has n - 2 = 1 degree of freedom (scipy reference)
    e = np.array([1.0, -2.0, 0.5])
    a = residual_acf(e, 2)
    r1 = sm_acf(e, nlags=1, adjusted=False, fft=False)[1]
    np.testing.assert_allclose(a.acf[0, 0], r1, rtol=1e-12)
    np.testing.assert_allclose(a.pvalue[0, 0], 2 * stats.t.sf(abs(r1) * np.sqrt(3), 1), rtol=1e-10)


def test_more_lags_than_periods_give_nan_columns():
    a = residual_acf(np.array([[1.0, 3.0, 2.0, 5.0]]), 8)
    assert a.acf.shape == (1, 8) and np.isfinite(a.acf[0, :3]).all() and np.isnan(a.acf[0, 3:]).all()


@pytest.mark.parametrize("row", [[1.0, np.nan], [np.nan, 1.0, np.nan, 2.0]])
def test_nan_after_the_start_is_rejected(row):
    with pytest.raises(ValueError, match=r"^panel is not right-aligned: NaN inside a series \(only leading NaN allowed\)$"):
        ljung_box(np.array([row]), 1)


def test_argument_errors_name_the_problem():
    e = SERIES["ar2"]
    with pytest.raises(ValueError, match="^max_lag must be >= 1$"):
        residual_acf(e, 0)
    with pytest.raises(ValueError, match="^lags must be >= 1$"):
        ljung_box(e, 0)
    with pytest.raises(ValueError, match="^AcfResult has 5 lags, need 10$"):
        ljung_box(residual_acf(e, 5), 10)
    with pytest.raises(ValueError, match="^nlags must be >= 1$"):
        breusch_godfrey(e, None, None, 0)
    with pytest.raises(ValueError, match="^nlags must be >= 1$"):
        arch_lm(e, 0)
    with pytest.raises(ValueError, match=r"^X shape \(1, 5, 1\) does not match resid shape \(1, 200\)$"):
        breusch_godfrey(e, np.zeros((1, 5, 1)), None, 2)
    with pytest.raises(ValueError, match=r"^resid must be a \(G, T\) panel or a 1-D series, got shape \(2, 2, 2\)$"):
        arch_lm(np.zeros((2, 2, 2)), 1)


def test_breusch_godfrey_without_regressors_and_with_a_2d_design():
    y = SERIES["nile"]
    # no regressors beyond the constant: statsmodels acorr_breusch_godfrey on OLS(y, 1)
    ref0 = acorr_breusch_godfrey(sm.OLS(y, np.ones((len(y), 1))).fit(), nlags=3, result_object=True)
    out0 = breusch_godfrey(y - y.mean(), None, None, 3)
    np.testing.assert_allclose(out0.statistic[0], ref0.lm, rtol=RTOL)
    np.testing.assert_allclose(out0.pvalue[0], ref0.lmpval, rtol=RTOL)
    # one series given as a 1-D residual vector and a 2-D (T, k) design
    res, X = _sm_ar_fit(y, 2)
    out = breusch_godfrey(np.asarray(res.resid), X, None, 4)
    ref = acorr_breusch_godfrey(res, nlags=4, result_object=True)
    np.testing.assert_allclose(out.statistic[0], ref.lm, rtol=RTOL)
    assert out.df[0] == 4.0


def test_lm_tests_are_computed_down_to_their_documented_minimum_length():
    rng = np.random.default_rng(9)
    # Breusch-Godfrey: NaN when n <= 1 + k + nlags (k regressors), a number from n = 2 + k + nlags
    k, nlags = 1, 2
    for n, finite in ((2 + k + nlags, True), (1 + k + nlags, False)):
        e, X = rng.standard_normal(n), rng.standard_normal((n, k))
        assert np.isfinite(breusch_godfrey(e, X, None, nlags).statistic[0]) == finite, n
    # ARCH LM: T' = n - q rows; NaN when T' <= q + 1, a number from T' = q + 2
    q = 2
    for n, finite in ((2 * q + 2, True), (2 * q + 1, False)):
        out = arch_lm(rng.standard_normal(n), q)
        assert np.isfinite(out.statistic[0]) == finite, n
        assert out.df[0] == q


def test_multiplicity_adjustments_keep_shape_and_axis():
    rng = np.random.default_rng(13)
    # a scalar stays a scalar (one p-value: nothing to adjust)
    assert np.ndim(holm(0.03)) == 0 and holm(0.03) == 0.03
    assert np.ndim(benjamini_hochberg(0.2)) == 0 and benjamini_hochberg(0.2) == 0.2
    # 1-D input, and a 2-D panel adjusted along either axis (statsmodels multipletests per slice)
    p1 = rng.uniform(size=9) ** 2
    np.testing.assert_allclose(holm(p1), multipletests(p1, method="holm")[1], rtol=1e-12)
    P = rng.uniform(size=(4, 7)) ** 2
    for axis in (0, 1):
        for fn, method in ((holm, "holm"), (benjamini_hochberg, "fdr_bh")):
            out = fn(P, axis=axis)
            assert out.shape == P.shape
            for i in range(P.shape[1 - axis]):
                sl = (slice(None), i) if axis == 0 else (i, slice(None))
                np.testing.assert_allclose(out[sl], multipletests(P[sl], method=method)[1], rtol=1e-12)
    Q = rng.uniform(size=(2, 3, 5))
    np.testing.assert_allclose(benjamini_hochberg(Q, axis=2)[1, 2], multipletests(Q[1, 2], method="fdr_bh")[1], rtol=1e-12)
