"""Specifications are never silently changed, series of any length never raise, and the
subset-AR residual test and the unit-root decision are checked against outside references."""

from __future__ import annotations

import datetime as dt

import numpy as np
import polars as pl
import pytest
import statsmodels.api as sm
from hypothesis import HealthCheck, given, settings as hsettings, strategies as st
from statsmodels.stats.diagnostic import acorr_ljungbox

import arflow
from arflow.core import autoreg, diagnostics, unitroot
from arflow.core.gates import REASONS
from arflow.core.panel import CONSTANT, build_panel
from arflow.core.pipeline import adf_from_fit, residual_test_lags, run_core
from arflow.errors import SchemaError, SettingsError
from arflow.sample.simulate import simulate_ar, to_panel
from arflow.settings import FREQUENCIES, SEASONAL_PERIOD, GateSettings, ModelSettings, Settings

LARGEST_LAG = max(p for p in SEASONAL_PERIOD.values() if p)  # 52 (weekly)


def reasons_of(result, g: int) -> list[str]:
    return [REASONS[i] for i in np.flatnonzero(result.outcome.reasons[g])]


# ---------------------------------------------------------------------------------------------
# 1. any length, any frequency, any order: quarantined with a reason, never an exception
# ---------------------------------------------------------------------------------------------


@pytest.mark.slow
@hsettings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    lengths=st.lists(st.integers(0, LARGEST_LAG + 6), min_size=1, max_size=4),
    frequency=st.sampled_from(FREQUENCIES),
    order=st.sampled_from(["auto", 1, 3, 8]),
    seed=st.integers(0, 2**16),
)
def test_core_never_raises_and_short_series_carry_a_reason(lengths, frequency, order, seed):
    rng = np.random.default_rng(seed)
    codes, periods, values = [], [], []
    for g, n in enumerate(lengths):
        codes += [g] * n
        periods += list(range(100 - n, 100))
        values += list(50 + np.cumsum(rng.normal(size=n)) * 0.3 + rng.normal(size=n))
    ms = ModelSettings(order=order)
    gs = GateSettings(min_observations=max(3, ms.min_observations_for_order()))
    s = Settings(frequency=frequency, model=ms, gates=gs)
    panel = build_panel(np.array(codes, int), np.array(periods, int), np.array(values, float), len(lengths),
                        as_of=99, min_observations=gs.min_observations)
    r = run_core(panel, s)
    for g, n in enumerate(lengths):
        if not r.fit.fitted[g]:
            assert reasons_of(r, g), f"unfitted series of length {n} has no reason"


@pytest.mark.slow
@hsettings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(n=st.integers(0, LARGEST_LAG + 6), frequency=st.sampled_from(["day", "week", "month", "quarter", "year"]),
       order=st.sampled_from(["auto", 2]))
def test_forecast_call_never_raises_on_a_whole_block_of_short_series(n, frequency, order):
    # a 1,024-series block in which every series has n points (the reported crash: all shorter than lag 52)
    G = 1024
    start = dt.date(2001, 1, 1)
    step = {"day": "1d", "week": "1w", "month": "1mo", "quarter": "3mo", "year": "1y"}[frequency]
    if n == 0:
        return
    periods = pl.date_range(start, start + dt.timedelta(days=400 * 366), step, eager=True)[:n]
    rng = np.random.default_rng(n)
    df = pl.DataFrame({
        "k": np.repeat(np.arange(G), n),
        "p": pl.concat([periods] * G),
        "v": (50 + rng.normal(size=G * n)),
    })
    ms = ModelSettings(order=order)
    s = Settings(model=ms, gates=GateSettings(min_observations=max(3, ms.min_observations_for_order())))
    if n < 3:
        # too few distinct periods to tell the frequency: it must be given
        with pytest.raises(SchemaError):
            arflow.forecast(df, keys="k", period="p", value="v")
    run = arflow.forecast(df, keys="k", period="p", value="v", frequency=frequency, settings=s)
    assert run.models.height == G
    unpublished = run.models.filter(pl.col("decision") == "quarantined")
    assert all(len(r) for r in unpublished["reasons"].to_list())


# ---------------------------------------------------------------------------------------------
# 5. no silent specification changes
# ---------------------------------------------------------------------------------------------


def test_fixed_order_the_data_cannot_carry_is_flagged_not_refitted():
    # AR(20) on 40 points (the reported case): not fitted, marked, never refitted as AR(1)
    Y = simulate_ar({1: 0.5}, 3, 40, 1)
    f = autoreg.fit_ar(Y, order=20)
    assert not f.fitted.any() and f.order_unsupported.all()
    assert np.all(f.n_lags == 0)
    # 46 points carry it: n - p = 26 rows >= 20 coefficients + intercept + 5 residual df
    f = autoreg.fit_ar(simulate_ar({1: 0.5}, 3, 46, 1), order=20)
    assert f.fitted.all() and not f.order_unsupported.any() and np.all(f.n_lags == 20)


def test_order_the_gate_cannot_guarantee_is_refused_at_settings_level():
    # n - p >= p + 1 + 5 rows: AR(20) needs 46 observations
    assert ModelSettings(order=20).min_observations_for_order() == 46
    with pytest.raises(SettingsError, match="raise gates.min_observations to 46") as e:
        Settings(model=ModelSettings(order=20), gates=GateSettings(min_observations=40))
    assert "\n" not in str(e.value)
    Settings(model=ModelSettings(order=20), gates=GateSettings(min_observations=46))


def test_order_not_supported_is_its_own_reason():
    from arflow.core.gates import GateInputs, decide

    G = 2
    nan = np.full(G, np.nan)
    x = GateInputs(flags=np.zeros(G, int), n=np.array([40, 40]), stale_periods=np.zeros(G), fitted=np.array([False, True]),
                   unit_root=np.zeros(G, bool), differenced=np.zeros(G, bool), adf_statistic=nan, adf_pvalue=nan,
                   max_root_modulus=np.array([np.nan, 0.5]), residual_statistic=nan, residual_pvalue=np.array([np.nan, 0.5]),
                   forecast_min=nan, forecast_max=nan, forecast_finite=np.array([False, True]),
                   order_unsupported=np.array([True, False]))
    out = decide(x, GateSettings(), "difference")
    names = out.reason_lists()
    assert "order_not_supported" in names[0] and "fit_failed" not in names[0]
    assert "order_not_supported" not in names[1]


def test_short_series_select_among_the_orders_they_carry_and_are_recorded():
    Y = simulate_ar({1: 0.5}, 200, 24, 3)
    r = run_core(to_panel(Y), Settings(frequency="month"))
    row = r.outcome.gates["order_candidates"]
    assert r.fit.fitted.all()
    assert (~row.passed).all()  # 24 points: orders above 3 and the lag-12 candidate were not tried
    assert np.all(row.statistic == 3)
    assert r.fit.n_lags.max() <= 3
    # the record never quarantines by itself
    assert r.outcome.published.mean() > 0.85


def test_order_zero_is_a_candidate_and_white_noise_selects_it():
    rng = np.random.default_rng(5)
    Y = 10 + rng.normal(size=(400, 120))
    f = autoreg.fit_ar(Y, order="auto", max_order=8, criterion="bic")
    # BIC is consistent: white noise selects order 0 in the large majority (common practice)
    assert np.mean(f.n_lags == 0) > 0.9
    # order 0 fitted values: the mean, sigma the sample s.d. (ddof 1) -- numpy as the reference
    g = int(np.flatnonzero(f.n_lags == 0)[0])
    np.testing.assert_allclose(f.intercept[g], Y[g].mean(), rtol=1e-12)
    np.testing.assert_allclose(f.sigma[g], Y[g].std(ddof=1), rtol=1e-10)


def test_constant_test_is_scale_free():
    n = 30
    wiggle = np.sin(np.arange(n))
    for scale in (1e-20, 1e-9, 1.0, 1e12):
        varying = build_panel(np.zeros(n, int), np.arange(n), scale * (1 + 1e-3 * wiggle), 1)
        flat = build_panel(np.zeros(n, int), np.arange(n), scale * (1 + 1e-15 * wiggle), 1)
        assert not varying.flags[0] & CONSTANT, scale
        assert flat.flags[0] & CONSTANT, scale


def test_forecast_frequency_argument_inference_and_clear_errors():
    rng = np.random.default_rng(0)
    days = pl.date_range(dt.date(2024, 1, 1), dt.date(2024, 6, 30), "1d", eager=True)
    df = pl.DataFrame({"k": "a", "d": days, "v": rng.normal(size=len(days))})
    assert arflow.forecast(df, keys="k", period="d", value="v").settings.frequency == "day"
    assert arflow.forecast(df, keys="k", period="d", value="v", frequency="day").models["n_obs"][0] > 100
    with pytest.raises(SchemaError, match="daily periods but the frequency is 'month'") as e:
        arflow.forecast(df, keys="k", period="d", value="v", settings=Settings())
    assert "\n" not in str(e.value)
    with pytest.raises(SchemaError, match="cannot tell the frequency"):
        arflow.forecast(df.head(2), keys="k", period="d", value="v")
    with pytest.raises(SchemaError, match="frequency = 'fortnight'"):
        arflow.forecast(df, keys="k", period="d", value="v", frequency="fortnight")
    weeks = pl.date_range(dt.date(2020, 1, 6), dt.date(2023, 12, 25), "1w", eager=True)
    wf = pl.DataFrame({"k": "a", "w": weeks, "v": rng.normal(size=len(weeks))})
    assert arflow.forecast(wf, keys="k", period="w", value="v").settings.frequency == "week"
    steps = pl.DataFrame({"k": "a", "t": np.arange(40), "v": rng.normal(size=40)})
    assert arflow.forecast(steps, keys="k", period="t", value="v").settings.frequency == "step"


# ---------------------------------------------------------------------------------------------
# 2. unit-root pieces against outside references
# ---------------------------------------------------------------------------------------------


def test_adf_read_off_a_model_with_a_gap_is_the_restricted_adf_regression():
    # J = {1, 12}: dy_t on 1, y_{t-1}, (y_{t-1} - y_{t-12}); statsmodels OLS on that regression is the reference
    y = simulate_ar({1: 0.3, 12: 0.5}, 1, 150, 8)[0]
    f = autoreg.fit_ar(y[None], order=1, seasonal_lag=12, seasonal_alpha=0.999)
    assert list(f.lags[f.lag_mask[0]]) == [1, 12]
    a = adf_from_fit(f)
    t = np.arange(12, len(y))
    X = sm.add_constant(np.column_stack([y[t - 1], y[t - 1] - y[t - 12]]))
    ref = sm.OLS(y[t] - y[t - 1], X).fit()
    np.testing.assert_allclose(a.statistic[0], ref.tvalues[1], rtol=1e-9)
    assert a.used_lag[0] == 11


def test_mackinnon_quantile_inverts_the_p_value():
    # MacKinnon (2010) Table 1, N = 1, constant: asymptotic 1%, 5%, 10% values -3.43035, -2.86154, -2.56677
    # (the 1994 p-value approximation and the 2010 response surface agree to about 0.01)
    for level, ref in ((0.01, -3.43035), (0.05, -2.86154), (0.10, -2.56677)):
        assert abs(unitroot.mackinnon_quantile(level, "c") - ref) < 0.01


# ---------------------------------------------------------------------------------------------
# 3. residual tests for subset AR models
# ---------------------------------------------------------------------------------------------


def test_seasonal_lag_beyond_residual_lags_is_tested():
    assert list(residual_test_lags(Settings(frequency="week"))) == list(range(1, 13)) + [52]
    s = Settings(frequency="month", gates=GateSettings(residual_lags=6))
    assert list(residual_test_lags(s)) == [1, 2, 3, 4, 5, 6, 12]
    assert list(residual_test_lags(Settings(frequency="month"))) == list(range(1, 13))


def test_ljung_box_degrees_of_freedom_for_subset_models():
    # Box & Pierce (1970), McLeod (1978): n Cov(r_hat) = I - X (X'X)^-1 X', X[k, j] = psi_{k - l_j}.
    # AR(1) with coefficient phi, tested lags 1..m: the trace is m - (1 - phi^(2m)) (closed form)
    phi, m = 0.5, 12
    A = diagnostics.ar_residual_acf_cov(np.array([[phi]]), np.array([[True]]), np.array([1]), np.arange(1, m + 1))
    assert np.trace(A[0]) == pytest.approx(m - (1 - phi ** (2 * m)), rel=1e-9)
    # a pure lag-52 model removes nothing from lags 1..12 ...
    A = diagnostics.ar_residual_acf_cov(np.array([[0.5]]), np.array([[True]]), np.array([52]), np.arange(1, 13))
    assert np.trace(A[0]) == pytest.approx(12.0, abs=1e-12)
    # ... and, with lag 52 tested too, only its leading term: 13 - (1 - 0.5^2)
    tested = np.r_[np.arange(1, 13), 52]
    A = diagnostics.ar_residual_acf_cov(np.array([[0.5]]), np.array([[True]]), np.array([52]), tested)
    assert np.trace(A[0]) == pytest.approx(13 - 0.75, rel=1e-9)
    # the degrees of freedom the Ljung-Box test uses are then exactly these (A is a projection
    # when every constraint lies in the tested lags: Satterthwaite's b = tr(A))
    r = np.zeros((1, m))
    A = diagnostics.ar_residual_acf_cov(np.array([[1e-9]]), np.array([[True]]), np.array([1]), np.arange(1, m + 1))
    res = diagnostics.ljung_box_subset(r, np.arange(1, m + 1), np.array([200]), A)
    assert res.df[0] == pytest.approx(m - 1, abs=1e-6)


def test_ljung_box_subset_statistic_matches_statsmodels_on_contiguous_lags():
    # on lags 1..h with the h - p convention the statistic and p-value equal statsmodels acorr_ljungbox
    rng = np.random.default_rng(3)
    e = rng.normal(size=300)
    r, n = diagnostics.acf_at(e[None], np.arange(1, 11))
    got = diagnostics.ljung_box_subset(r, np.arange(1, 11), n, None, model_df=2)
    ref = acorr_ljungbox(e, lags=[10], model_df=2)
    np.testing.assert_allclose(got.statistic[0], ref["lb_stat"].iloc[0], rtol=1e-10)
    np.testing.assert_allclose(got.pvalue[0], ref["lb_pvalue"].iloc[0], rtol=1e-8)


def test_pipeline_uses_the_subset_df_for_a_weekly_seasonal_model():
    Y = simulate_ar({1: 0.3, 52: 0.5}, 4, 400, 4)
    s = Settings(frequency="week", model=ModelSettings(order=1, unit_root="ignore"))
    r = run_core(to_panel(Y), s)
    assert r.fit.lag_mask[:, list(r.fit.lags).index(52)].all()
    tested = residual_test_lags(s)
    A = diagnostics.ar_residual_acf_cov(r.fit.coef, r.fit.lag_mask, r.fit.lags, tested)
    tr, tr2 = np.trace(A, axis1=1, axis2=2), np.einsum("gij,gij->g", A, A)
    np.testing.assert_allclose(r.residual_test.df, tr * tr / tr2, rtol=1e-12)
    # between the naive counts: 13 - 2 (both lags counted) and 13 - 1 (lag 52 not counted)
    assert np.all((r.residual_test.df > 11) & (r.residual_test.df < 12.5))


def test_finite_sample_critical_values_match_statsmodels():
    # statsmodels adfuller at T = 100 rows, constant only: -3.49750, -2.89091, -2.58243 (MacKinnon 2010
    # response surface); our asymptotic part comes from inverting the 1994 p-value, so about 1e-3 apart
    from statsmodels.tsa.adfvalues import mackinnoncrit

    for level, ref in zip((0.01, 0.05, 0.10), mackinnoncrit(N=1, regression="c", nobs=100)):
        assert abs(unitroot.finite_sample_crit(level, 100.0) - ref) < 2e-3
    assert abs(unitroot.finite_sample_crit(0.05, 100.0) - (-2.89091)) < 2e-3


@pytest.mark.parametrize("policy", ["difference", "quarantine", "ignore"])
def test_unit_root_policies_still_work(policy):
    rng = np.random.default_rng(9)
    walks = 50 + np.cumsum(rng.normal(size=(200, 120)), axis=1)
    r = run_core(to_panel(walks), Settings(frequency="month", model=ModelSettings(unit_root=policy)))
    flagged = r.unit_root.mean()
    assert flagged > 0.85  # the decision itself does not depend on the policy
    held = r.outcome.reasons[:, REASONS.index("unit_root")].mean()
    if policy == "difference":
        assert np.array_equal(r.differenced, r.unit_root) and held == 0
    elif policy == "quarantine":
        assert not r.differenced.any() and held == pytest.approx(flagged)
    else:
        assert not r.differenced.any() and held == 0


def test_short_weekly_series_are_tested_without_the_seasonal_lag_not_failed():
    # lag 52 needs at least 104 residuals; shorter weekly series are tested on lags 1..12 (df then
    # counts 12 lags), never left without a p-value (which a fail-closed gate would quarantine)
    for test in ("ljung-box", "breusch-godfrey", "lag-t"):
        for T in (40, 80, 200):
            r = run_core(to_panel(simulate_ar({1: 0.5}, 50, T, 2)),
                         Settings(frequency="week", gates=GateSettings(residual_test=test)))
            p = r.residual_test.pvalue[r.fit.fitted]
            assert np.isfinite(p).all(), (test, T)
            if test == "breusch-godfrey":
                assert np.all(r.residual_test.df[r.fit.fitted] == (13 if T >= 110 else 12))


def test_job_file_refuses_an_order_min_observations_cannot_carry(tmp_path):
    from arflow.job_file import load_job
    from arflow.sample.panels import default_job, job_toml

    job = default_job()
    job["model"] = {"order": 20}
    path = tmp_path / "job.toml"
    path.write_text(job_toml(job), encoding="utf-8")
    with pytest.raises(SettingsError, match="model.order = 20 needs at least 46 observations") as e:
        load_job(path)
    assert e.value.exit_code == 2 and "\n" not in str(e.value)


def test_ar_autocovariance_matches_statsmodels_arma_acovf():
    # statsmodels arma_acovf (unit innovation variance) is the reference for the Yule-Walker solve
    from statsmodels.tsa.arima_process import arma_acovf

    for phi in ({1: 0.5}, {1: 0.3, 12: 0.5}, {1: 0.6, 2: -0.3, 4: 0.2}):
        L = max(phi)
        dense = np.zeros(L)
        for lag, c in phi.items():
            dense[lag - 1] = c
        got = diagnostics.ar_autocovariance(dense[None])[0]
        ref = arma_acovf(np.r_[1.0, -dense], np.array([1.0]), nobs=L + 1, sigma2=1.0)
        np.testing.assert_allclose(got, ref, rtol=1e-8)


@pytest.mark.parametrize("interval, start, expected", [
    ("1d", dt.date(2020, 1, 1), "day"), ("1w", dt.date(2020, 1, 6), "week"), ("1mo", dt.date(2020, 1, 1), "month"),
    ("3mo", dt.date(2015, 1, 1), "quarter"), ("1y", dt.date(2000, 1, 1), "year"),
])
def test_infer_frequency_from_dates_text_and_timestamps(interval, start, expected):
    from arflow.api import infer_frequency

    periods = pl.date_range(start, start + dt.timedelta(days=365 * 20), interval, eager=True)[:40]
    for col in (periods, periods.cast(pl.String), periods.cast(pl.Datetime)):
        assert infer_frequency(pl.DataFrame({"p": col}), "p") == expected
    if expected == "month":  # month-end labels too
        assert infer_frequency(pl.DataFrame({"p": periods.dt.month_end()}), "p") == "month"
