"""The core run on one panel: fit -> unit roots -> diagnostics -> forecasts -> gates.

Pure arrays in and out; the frame adapters key the results back to the user's
columns. Everything is batched over series.
"""

from __future__ import annotations

from dataclasses import dataclass, fields, replace

import numpy as np

from ..settings import SEASONAL_PERIOD, Settings
from . import autoreg, backtest, diagnostics, gates, intervals, outliers, unitroot
from .distributions import t_sf
from .forecast import Forecasts, coef_covariance, forecast_ar
from .panel import CONSTANT, NO_DATA, Panel


@dataclass(frozen=True)
class CoreResult:
    """Everything computed for one panel (arrays lead with the series axis)."""

    panel: Panel
    fit: autoreg.ARFit
    differenced: np.ndarray
    unit_root: np.ndarray
    adf: unitroot.AdfResult
    kpss: unitroot.KpssResult
    acf: diagnostics.AcfResult
    residual_test: diagnostics.TestResult
    arch: diagnostics.TestResult | None
    forecasts: Forecasts
    outcome: gates.GateOutcome
    backtest: backtest.BacktestResult | None = None
    outliers: "OutlierReport | None" = None


@dataclass(frozen=True)
class OutlierReport:
    """Additive outliers per series: ``statistic``/``threshold`` (G,) of the detector,
    ``count`` (G,), ``passed`` (G,) for the gate, ``effect`` (G, T) the estimated effect
    at each flagged period (panel column), NaN elsewhere."""

    statistic: np.ndarray
    threshold: np.ndarray
    count: np.ndarray
    passed: np.ndarray
    effect: np.ndarray


def _diff_right_aligned(Y: np.ndarray) -> np.ndarray:
    """First differences, right-aligned, same width (one more leading NaN)."""
    D = np.full_like(Y, np.nan)
    D[:, 1:] = Y[:, 1:] - Y[:, :-1]
    return D


#: floor of n Var(r_k) in the per-lag t tests (see :func:`residual_test`)
LAG_T_MIN_VARIANCE = 0.05


def residual_test_lags(settings: Settings) -> np.ndarray:
    """The lags the residual gate tests: 1..``residual_lags``, plus the seasonal lag when it lies beyond.

    The seasonal lag is the model's (``seasonal_lag``), or the frequency's own
    (52 weekly, 12 monthly, ...) when the model does not try one, so that an
    omitted seasonal dependence is still looked for.
    """
    K = settings.gates.residual_lags
    # the frequency's seasonal lag is tested even when the model does not try it
    s = settings.model.seasonal_for(settings.frequency) or SEASONAL_PERIOD.get(settings.frequency)
    lags = list(range(1, K + 1))
    if s is not None and s > K:
        lags.append(int(s))
    return np.array(lags, dtype=np.int64)


def residual_test(fit: autoreg.ARFit, modelled: np.ndarray, acf: diagnostics.AcfResult, settings: Settings):
    """The configured residual autocorrelation test, one p-value per series.

    The tested lags are 1..``residual_lags`` and the seasonal lag when it lies
    beyond (52 for weekly data), for every test alike; the seasonal lag only
    where the series has at least twice that many residuals. Ljung-Box: the
    statistic over those lags, referred to the Box & Pierce (1970) / McLeod
    (1978) asymptotic distribution of residual autocorrelations of the fitted
    (subset) AR model (:func:`arflow.core.diagnostics.ar_residual_acf_cov`):
    only the part of each model lag's constraint that falls on the tested lags
    is subtracted, so a lag-52 coefficient removes nothing from lags 1..12
    (the usual ``h - p`` when the tested lags carry every constraint).
    Breusch-Godfrey: lagged residuals at the same lags, chi-square on their
    number. Lag-t: per-lag t tests at the same lags with the standard error
    ``sqrt(A_kk / n)`` from the same asymptotic covariance (``1/sqrt(n)``,
    the white-noise value, overstates it after a fit and made the lag-1 test
    reject about 0.1% at 5%), floored at ``LAG_T_MIN_VARIANCE / n``; Holm
    across them.
    """
    g = settings.gates
    tested = residual_test_lags(settings)
    extra = tested[tested > acf.acf.shape[1]]
    r = acf.acf[:, : len(tested) - len(extra)]
    n = acf.nobs
    # a lag beyond residual_lags is tested where at least two of its spans were observed
    # (n >= 2 s residuals); a shorter series is tested on 1..residual_lags only
    use = np.ones((len(n), len(tested)), dtype=bool)
    if len(extra):
        r_extra, _ = diagnostics.acf_at(fit.resid, extra)
        r = np.concatenate([r, r_extra], axis=1)
        use[:, len(tested) - len(extra) :] = n[:, None] >= 2 * extra[None, :]
    if g.residual_test == "ljung-box":
        cov = diagnostics.ar_residual_acf_cov(fit.coef, fit.lag_mask & fit.fitted[:, None], fit.lags, tested)
        count = (fit.lag_mask & (np.isin(fit.lags, tested)[None, :])).sum(axis=1)
        count = count - (fit.lag_mask & np.isin(fit.lags, extra)[None, :] & ~use[:, -1:]).sum(axis=1) if len(extra) else count
        # every model lag among the tested lags 1..K (a contiguous AR with no lag beyond K): the
        # classic K - p (Ljung & Box 1978; statsmodels acorr_ljungbox model_df=p), which the
        # subset-model distribution approaches as the psi-weights die out within K
        inside = ~np.any(fit.lag_mask & (fit.lags[None, :] > g.residual_lags), axis=1)
        classic = inside & ~use[:, len(tested) - len(extra) :].any(axis=1) if len(extra) else inside
        cov = np.where(classic[:, None, None], np.nan, cov)
        return diagnostics.ljung_box_subset(r, tested, n, cov, model_df=count, use=use)
    if g.residual_test == "breusch-godfrey":
        X = np.nan_to_num(autoreg.lag_design(modelled, fit.lags))
        return diagnostics.breusch_godfrey(fit.resid, X, fit.lag_mask, len(tested), lag_set=tested, lag_use=use)
    r = np.where(use, r, np.nan)
    # per-lag t tests with the fitted model's standard errors sqrt(A_kk / n) (McLeod 1978;
    # floored at 0.05 / n so a lag the fit pins down is tested conservatively, not divided by ~0;
    # 1/sqrt(n) where A is not available), Holm step-down across lags unless switched off
    cov = diagnostics.ar_residual_acf_cov(fit.coef, fit.lag_mask & fit.fitted[:, None], fit.lags, tested)
    var = np.diagonal(cov, axis1=1, axis2=2)
    var = np.where(np.isfinite(var), np.maximum(var, LAG_T_MIN_VARIANCE), 1.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        t_stat = r * np.sqrt(n)[:, None] / np.sqrt(var)
        dft = (n - 2).astype(np.float64)[:, None]
        p = np.where(dft > 0, 2.0 * t_sf(np.abs(t_stat), np.where(dft > 0, dft, 1.0)), np.nan)
    p = np.where(np.isnan(t_stat), np.nan, p)
    if g.lag_correction == "holm":
        p = diagnostics.holm(p)
    with np.errstate(invalid="ignore"):
        pmin = np.where(np.all(np.isnan(p), axis=1), np.nan, np.nanmin(np.where(np.isnan(p), np.inf, p), axis=1))
        tmax = np.nanmax(np.where(np.isnan(t_stat), -np.inf, np.abs(t_stat)), axis=1)
    tmax = np.where(np.isfinite(tmax), tmax, np.nan)
    return diagnostics.TestResult(tmax, pmin, use.sum(axis=1).astype(np.float64))


#: Series per block inside the core: small blocks keep the (series, lags,
#: periods) designs in cache, which is about 3x faster than one huge batch.
BLOCK_SERIES = 1024


def adf_from_fit(fit: autoreg.ARFit) -> unitroot.AdfResult:
    """The ADF t statistic of each fitted level model, without another regression.

    Any AR model ``y_t = b0 + sum_{j in J} phi_j y_{t-j}`` is reparametrised as
    ``dy_t = b0 + gamma y_{t-1} + sum_{i=1}^{L-1} beta_i dy_{t-i}`` with
    ``gamma = sum(phi) - 1``, ``L = max(J)`` and ``beta_i = -sum_{j in J, j > i} phi_j``;
    the statistic is ``(sum(phi) - 1) / se(sum(phi))`` on the model's sample.

    * Contiguous lags ``J = 1..p``: this is the ADF regression with p - 1
      lagged differences, unrestricted (equal to statsmodels
      ``adfuller(y, maxlag=p - 1, autolag=None)``).
    * Lags with a gap (e.g. ``J = {1, 12}``): the same ADF regression with
      ``L - 1`` lagged differences whose coefficients are **restricted** (here
      ``beta_1 = ... = beta_11 = -phi_12``), i.e. the t ratio of ``gamma`` in
      ``dy_t`` on ``1, y_{t-1}, y_{t-1} - y_{t-12}``; under a unit root the
      lagged-difference terms are stationary, so the Dickey-Fuller limit is
      the same (Said & Dickey 1984 for the augmentation), but the lag choice
      was pre-tested on levels. The unit-root decision
      (:func:`unit_root_decision`) therefore also uses the contiguous form.
    * No lags (order 0): NaN.

    P-values: MacKinnon (1994); critical values: MacKinnon (2010) at T = n_obs.
    ``used_lag`` is ``L - 1``.
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        stat = (np.nansum(fit.coef, axis=1) - 1.0) / fit.persistence_se
    has = fit.fitted & fit.lag_mask.any(axis=1)
    stat = np.where(has & np.isfinite(stat), stat, np.nan)
    pval = unitroot.mackinnon_pvalue(stat, "c")
    crit = unitroot.mackinnon_crit(np.where(has, fit.n_obs, np.nan).astype(np.float64), "c")
    used = np.where(has, np.max(np.where(fit.lag_mask, fit.lags[None, :], 1), axis=1) - 1, -1)
    return unitroot.AdfResult(stat, pval, used, np.where(has, fit.n_obs, -1), crit[:, 0], crit[:, 1], crit[:, 2])


def _splice_adf(base: unitroot.AdfResult, other: unitroot.AdfResult, idx: np.ndarray) -> unitroot.AdfResult:
    out = {}
    for f in fields(unitroot.AdfResult):
        a = getattr(base, f.name).copy()
        a[idx] = getattr(other, f.name)
        out[f.name] = a
    return unitroot.AdfResult(**out)


@dataclass(frozen=True)
class UnitRootDecision:
    """The unit-root decision per series (arrays (G,)) and the evidence behind it.

    ``adf``: the contiguous-lag ADF test used; ``persistence``: sum of the
    level model's AR coefficients, against ``persistence_threshold`` (for a
    model with a gap the larger of it and its contiguous refit's is compared);
    ``lr_statistic``: the level model's advantage over the difference
    candidate (NaN where that comparison was not needed), against
    ``lr_threshold``. ``difference_fit`` holds the difference candidates of
    the series at ``candidates`` (None when there are none).
    """

    unit_root: np.ndarray
    adf: unitroot.AdfResult
    persistence: np.ndarray
    persistence_threshold: np.ndarray
    lr_statistic: np.ndarray
    lr_threshold: float
    candidates: np.ndarray
    difference_fit: autoreg.ARFit | None


def unit_root_decision(Y: np.ndarray, fit: autoreg.ARFit, ms, fit_kw: dict) -> UnitRootDecision:
    """Does each series carry a unit root? Three conditions, all required.

    1. **ADF does not reject** at ``ms.unit_root_alpha`` (Dickey & Fuller 1979;
       Said & Dickey 1984 augmentation), judged against the finite-sample
       critical value at the test's own rows (MacKinnon 2010 response surface,
       :func:`arflow.core.unitroot.finite_sample_crit`; the reported p-value is
       MacKinnon's 1994 asymptotic one). The test is
       read off the level model when its lags are contiguous (1..p, p >= 1).
       For a model with a gap (a seasonal lag beyond p) it is computed in two
       valid forms, the model's own restricted augmentation (which carries the
       seasonal dynamics) and an AR(p >= 1) refit without the seasonal lag
       (free of the seasonal pre-test: when a seasonal lag selected on the
       levels of a random walk was kept in the regression, ADF rejected about
       30% of random walks), and a unit root is rejected only when both
       reject; the larger statistic is reported. Order 0: the refit.
    2. **Persistence guard**: the level model's persistence (sum of its AR
       coefficients) is at least ``max(1 - unit_root_bias / n_obs,
       unit_root_min_persistence)``. The first term is the Dickey-Fuller
       normalised-bias bound (about the 1% point of ``n (rho - 1)``, Fuller
       1996); the floor keeps the guard from vanishing as n approaches
       ``unit_root_bias``: a short series with persistence 0.4 is not called a
       random walk however little power ADF has at 24 points. For a model with
       a gap the guard, like the test in 1., is passed when either form (the
       model or its contiguous AR(p >= 1) refit) passes it: a seasonal lag
       selected on a random walk's levels takes a negative coefficient and
       pulled the sum of about one 40-point walk in seven below the floor.
    3. **The difference candidate is not clearly worse than the level
       model.** Both are fitted (each with its own selected lags) and compared
       on the observations both explain, as models of y_t:
       ``LR = n log(RSS_diff / RSS_level) - c(n) (k_level - k_diff - 1)``
       with ``c(n)`` the selection criterion's penalty per parameter. When the
       difference candidate is the level model with its coefficients
       restricted to sum to one, ``LR`` is the likelihood-ratio form of the
       Dickey-Fuller test, asymptotically ``tau^2`` under a unit root (Dickey &
       Fuller 1981), so it is held to ``tau_alpha^2`` (the squared MacKinnon
       1994 quantile at ``unit_root_alpha``; 8.19 at 5%). A stationary
       series with dynamics the difference candidate cannot carry (e.g.
       ``0.3 y(t-1) + 0.5 y(t-12)``: differencing leaves a non-invertible
       moving-average unit root that no finite AR captures) shows a far larger
       ``LR`` and stays on levels; this is the seasonal-lag-aware part of the
       decision (in the spirit of Hylleberg, Engle, Granger & Yoo 1990, who
       test the zero-frequency root without ignoring the seasonal dynamics).
       Exception: a level model with a root on or outside the unit circle
       cannot be published, so when 1 and 2 hold the difference candidate is
       taken whatever the comparison says.
    """
    G = Y.shape[0]
    alpha = ms.unit_root_alpha
    # ---- 1. the ADF test on a contiguous augmentation
    adf = adf_from_fit(fit)
    maxlag = np.max(np.where(fit.lag_mask, fit.lags[None, :], 0), axis=1)
    aux = fit.fitted & (maxlag != fit.n_lags) | (fit.fitted & (fit.n_lags == 0))
    persistence = np.where(fit.fitted, np.nansum(fit.coef, axis=1), np.nan)
    guard = persistence.copy()
    if aux.any():
        idx = np.flatnonzero(aux)
        kw = dict(fit_kw, seasonal_lag=None)
        sfit = autoreg.fit_ar(Y[idx], min_order=1, **kw)
        sub = adf_from_fit(sfit)
        # the persistence guard, like the test, is passed when either form passes it: a seasonal
        # lag selected on the levels of a random walk takes a negative coefficient (y_(t-12)
        # stands in for part of y_(t-1)) and pulled the sum of coefficients of about one walk
        # in seven at 40 points below the floor
        sp = np.where(sfit.fitted, np.nansum(sfit.coef, axis=1), np.nan)
        guard[idx] = np.where(np.isfinite(sp) & ~(guard[idx] >= sp), sp, guard[idx])
        # a model with a gap: both forms are valid augmentations under a unit root (the
        # restricted one carries the seasonal dynamics, the contiguous one is free of the
        # seasonal pre-test); a unit root is rejected only when both reject, and the less
        # rejecting statistic is the one reported
        own = adf.statistic[idx]
        use = ~(own > sub.statistic)  # NaN own (order 0) -> the refit
        keep = np.flatnonzero(use)
        adf = _splice_adf(adf, unitroot.AdfResult(*(getattr(sub, f.name)[keep] for f in fields(unitroot.AdfResult))),
                          idx[keep])
    # ---- 2. persistence guard
    with np.errstate(divide="ignore", invalid="ignore"):
        threshold = np.maximum(1.0 - ms.unit_root_bias / np.maximum(fit.n_obs, 1), ms.unit_root_min_persistence)
        crit = unitroot.finite_sample_crit(alpha, np.where(adf.nobs > 0, adf.nobs, np.nan), "c")
        candidates = fit.fitted & (adf.statistic > crit) & (guard >= threshold)
    # ---- 3. level model vs difference candidate on a common sample
    tau = unitroot.mackinnon_quantile(alpha, "c")
    lr = np.full(G, np.nan)
    unit_root = candidates.copy()
    dfit = None
    if candidates.any():
        idx = np.flatnonzero(candidates)
        dfit = autoreg.fit_ar(_diff_right_aligned(Y[idx]), **fit_kw)
        rl = fit.resid[idx]
        rd = dfit.resid
        W = min(rl.shape[1], rd.shape[1])
        rl, rd = rl[:, rl.shape[1] - W :], rd[:, rd.shape[1] - W :]
        both = np.isfinite(rl) & np.isfinite(rd)
        nc = both.sum(axis=1).astype(np.float64)
        with np.errstate(divide="ignore", invalid="ignore"):
            rss_l = np.where(both, rl, 0.0) ** 2
            rss_d = np.where(both, rd, 0.0) ** 2
            pen = autoreg.CRITERION_PENALTY[fit_kw["criterion"]](nc)
            stat = nc * np.log(rss_d.sum(axis=1) / rss_l.sum(axis=1)) - pen * (
                fit.n_lags[idx] - dfit.n_lags - 1
            )
        ok = dfit.fitted & np.isfinite(stat)
        lr[idx] = np.where(ok, stat, np.nan)
        # a difference candidate that cannot be fitted is no evidence against the unit root
        # a level model with a root on or outside the unit circle cannot be used: when ADF
        # does not reject, the difference candidate is the specification that remains
        unit_root[idx] = ~ok | (stat <= tau * tau) | ~fit.stationary[idx]
    return UnitRootDecision(unit_root, adf, persistence, threshold, lr, tau * tau, candidates, dfit)


def _interval_terms(fit: autoreg.ARFit, modelled: np.ndarray, fs, exclude: np.ndarray | None = None) -> dict:
    """Keyword arguments of :func:`forecast_ar` for parameter-uncertainty intervals (empty when off).

    ``exclude`` (G, T) bool: rows of the fitted sample taken out by intervention terms.
    """
    if not fs.parameter_uncertainty:
        return {}
    w = np.isfinite(fit.resid)
    if exclude is not None:
        w = w & ~exclude[:, -w.shape[1]:]
    M = modelled[:, -w.shape[1]:]
    X = autoreg.lag_design(M, fit.lags)
    cov = coef_covariance(X, w.astype(np.float64), fit.lag_mask, fit.lags, np.nan_to_num(fit.sigma))
    df = np.where(fit.fitted, fit.n_obs - fit.n_lags - 1, np.nan).astype(np.float64)
    return dict(coef_cov=np.where(fit.fitted[:, None, None], np.nan_to_num(cov), 0.0), df_resid=df)


# overflow and 0/0 in degenerate series (values near +-1e308, exact fits) become NaN/inf,
# which the gates then fail closed on; numpy's floating-point warnings would only be noise
@np.errstate(over="ignore", invalid="ignore", divide="ignore", under="ignore")
def _run_block(panel: Panel, settings: Settings) -> dict:
    ms, gs, fs = settings.model, settings.gates, settings.forecast
    Y = panel.values
    if Y.shape[1] < 2:  # no series has two values (e.g. all NULL): NaN columns keep every shape valid
        Y = np.concatenate([np.full((Y.shape[0], 2 - Y.shape[1]), np.nan), Y], axis=1)
    G = Y.shape[0]
    seasonal = ms.seasonal_for(settings.frequency)
    usable = (panel.n >= max(gs.min_observations, 3)) & ((panel.flags & (NO_DATA | CONSTANT)) == 0)
    fit_kw = dict(
        order=ms.order,
        max_order=ms.max_order,
        criterion=ms.criterion,
        seasonal_lag=seasonal,
        seasonal_alpha=ms.seasonal_alpha,
    )
    fit = autoreg.fit_ar(Y, fit_mask=usable, **fit_kw)

    # ---- unit roots on levels -------------------------------------------------------
    urd = unit_root_decision(Y, fit, ms, fit_kw)
    adf, unit_root = urd.adf, urd.unit_root
    kp = unitroot.kpss(np.where(fit.fitted[:, None], Y, np.nan))
    differenced = np.zeros(G, dtype=bool)
    modelled = Y
    if ms.unit_root == "difference" and unit_root.any():
        cand = np.flatnonzero(urd.candidates)
        pick = unit_root[cand]
        idx = cand[pick]
        fit = autoreg.splice(fit, autoreg.take(urd.difference_fit, np.flatnonzero(pick)), idx)
        differenced[idx] = True
        modelled = Y.copy()
        modelled[idx] = _diff_right_aligned(Y[idx])

    # ---- additive outliers (arflow.core.outliers) ----------------------------------------
    Yf, excluded, orep = Y, None, None
    if ms.outliers != "off":
        found, tr = outliers.detect_and_treat(modelled, fit)
        effect = np.where(found.flagged, found.size, np.nan)
        passed = ~found.any & ~found.too_many
        if ms.outliers == "treat" and tr is not None:
            # the refit keeps the specification: its candidate-set records carry over
            fit, excluded = replace(tr.fit, selection_cut=fit.selection_cut, order_unsupported=fit.order_unsupported), tr.excluded
            effect = np.where(tr.treated[:, None], tr.effect, effect)
            passed = ~found.too_many & ~tr.failed
            Yf = outliers.cleaned_levels(Y, tr.effect, differenced)
            # the order was selected with the outliers in the data (a spike can make the
            # constant mean win): re-select on the cleaned series, and where that picks other
            # lags, use the fit on the cleaned series (the additive-outlier model fitted to
            # the series with the estimated effects removed)
            tidx = np.flatnonzero(tr.treated & fit.fitted)
            if tidx.size:
                Mc = np.where(differenced[tidx, None], _diff_right_aligned(Yf[tidx]), Yf[tidx])
                re = autoreg.fit_ar(Mc, **fit_kw)
                other = re.fitted & np.any(re.lag_mask != fit.lag_mask[tidx], axis=1)
                if other.any():
                    keep = np.flatnonzero(other)
                    fit = autoreg.splice(fit, autoreg.take(re, keep), tidx[keep])
        orep = OutlierReport(found.statistic, found.threshold, found.count, passed, effect)

    # ---- residual diagnostics -------------------------------------------------------------
    acf = diagnostics.residual_acf(fit.resid, gs.residual_lags)
    rtest = residual_test(fit, modelled, acf, settings)
    arch = diagnostics.arch_lm(fit.resid, gs.arch_lags) if gs.arch_test else None

    # ---- forecasts -------------------------------------------------------------------------------
    width = max(int(fit.lags.max()), 1) + 1
    # left-padded to the model's width: a block whose series are all shorter than the
    # largest candidate lag must not break the forecast's broadcasting (those series are unfitted)
    hist = np.zeros((G, width))
    if Y.shape[1]:
        hist[:, width - min(width, Y.shape[1]) :] = np.nan_to_num(Yf[:, -width:])
    terms = _interval_terms(fit, modelled, fs, excluded)
    fc = forecast_ar(
        hist,
        np.nan_to_num(fit.intercept),
        np.nan_to_num(fit.phi()),
        np.nan_to_num(fit.sigma),
        fs.horizon,
        fs.coverage,
        differenced,
        **terms,
    )
    if terms and fs.selection_uncertainty:  # model-choice uncertainty (arflow.core.intervals)
        fc = intervals.candidate_interval(Yf, fit, differenced, fc, terms["df_resid"], order=ms.order,
                                          max_order=ms.max_order, criterion=ms.criterion, seasonal_lag=seasonal,
                                          differences=ms.unit_root == "difference")
    # the backtest runs on the whole panel afterwards (run_core): its blocks group series by lag set
    return dict(fit=fit, differenced=differenced, unit_root=unit_root, adf=adf, kpss=kp, acf=acf,
                residual_test=rtest, arch=arch, forecasts=fc, outliers=orep,
                backtest_levels=Yf if settings.backtest.enabled else None)


def _backtest(levels: np.ndarray, fit: autoreg.ARFit, differenced: np.ndarray, settings: Settings,
              mapper=None) -> backtest.BacktestResult:
    """The rolling-origin backtest of every series' final specification (outlier-cleaned levels)."""
    bs, fs, gs = settings.backtest, settings.forecast, settings.gates
    return backtest.rolling_origin(
        levels,
        fit.lag_mask,
        fit.lags,
        differenced,
        origins=bs.origins,
        horizon=bs.horizon or fs.horizon,
        coverage=fs.coverage,
        season=settings.model.seasonal_for(settings.frequency),
        min_train=gs.min_observations,
        fitted=fit.fitted,
        parameter_uncertainty=fs.parameter_uncertainty,
        mapper=mapper,
    )


def _concat(objs: list, axis: int = 0):
    """Concatenate dataclasses of per-series arrays (resid-like 2-D arrays are left-padded)."""
    first = objs[0]
    if first is None:
        return None
    if isinstance(first, np.ndarray):
        if first.ndim == 2 and first.dtype.kind == "f" and axis == 0 and len({o.shape[1] for o in objs}) > 1:
            W = max(o.shape[1] for o in objs)
            objs = [np.concatenate([np.full((o.shape[0], W - o.shape[1]), np.nan), o], axis=1) for o in objs]
        return np.concatenate(objs, axis=axis)
    if isinstance(first, np.ndarray) and first.ndim == 0 or not hasattr(first, "__dataclass_fields__"):
        return first  # scalars and tuples shared by every block
    cls = type(first)
    out = {}
    for f in fields(cls):
        vals = [getattr(o, f.name) for o in objs]
        if f.name == "lags":
            out[f.name] = vals[0]
        elif f.name in ("lower", "upper", "coverage_rate", "coverage_rate_all"):
            out[f.name] = np.concatenate(vals, axis=1)
        elif f.name == "origin_columns":
            out[f.name] = vals[0]
        else:
            out[f.name] = _concat(vals)
    return cls(**out)


def _pool(workers: int):
    import multiprocessing as mp
    from concurrent.futures import ProcessPoolExecutor

    methods = mp.get_all_start_methods()
    ctx = mp.get_context("fork" if "fork" in methods else methods[0])
    return ProcessPoolExecutor(max_workers=workers, mp_context=ctx)


def _relative_interval_width(panel: Panel, fc: Forecasts) -> np.ndarray:
    """Narrowest published interval half-width (any step, any level) over the series' standard deviation.

    Computed from the published bounds themselves, so an interval that
    rounding collapsed to a point shows as zero; NaN where it cannot be computed
    (the gate then fails closed).
    """
    G = panel.n_series
    if fc.lower.size == 0 or panel.values.shape[1] < 2:
        return np.full(G, np.nan)
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        half = np.min(fc.upper - fc.lower, axis=(0, 2)) / 2.0
        Y = panel.values
        m = np.isfinite(Y).sum(axis=1)
        mean = np.nansum(Y, axis=1) / m
        scale = np.sqrt(np.nansum((Y - mean[:, None]) ** 2, axis=1) / np.maximum(m - 1, 1))
        rel = half / scale
    return np.where(np.isfinite(rel), rel, np.nan)


def run_core(panel: Panel, settings: Settings, workers: int = 1) -> CoreResult:
    """Run the statistical core on a panel with the given settings.

    Series are processed in blocks of :data:`BLOCK_SERIES` (vectorised within
    a block; the loop is over blocks, never over series). ``workers`` > 1 runs
    blocks in that many worker processes. Processes, not threads: the work is
    memory-bound numpy, and threads sharing one address space were measured
    several times slower than one thread on a small virtual machine (page
    faults and TLB shootdowns), while processes scale.
    """
    ms, gs, fs = settings.model, settings.gates, settings.forecast
    G = panel.n_series
    starts = list(range(0, max(G, 1), BLOCK_SERIES))
    pieces = [panel.take(np.arange(s, min(s + BLOCK_SERIES, G))) for s in starts] if G > BLOCK_SERIES else [panel]
    pool = _pool(min(workers, len(pieces))) if workers > 1 and len(pieces) > 1 else None
    try:
        if pool is not None:
            blocks = list(pool.map(_run_block, pieces, [settings] * len(pieces)))
        else:
            blocks = [_run_block(p, settings) for p in pieces]
        parts = {k: _concat([b[k] for b in blocks]) for k in blocks[0]}
        fit, fc, rtest, arch = parts["fit"], parts["forecasts"], parts["residual_test"], parts["arch"]
        bt = None
        if settings.backtest.enabled:
            with np.errstate(over="ignore", invalid="ignore", divide="ignore", under="ignore"):
                bt = _backtest(parts["backtest_levels"], fit, parts["differenced"], settings,
                               None if pool is None else pool.map)
    finally:
        if pool is not None:
            pool.shutdown()
    rp = rtest.pvalue
    if gs.series_fdr is not None:
        # Benjamini-Hochberg across all series of the run
        rp = diagnostics.benjamini_hochberg(np.where(fit.fitted, rp, np.nan))
        rtest = diagnostics.TestResult(rtest.statistic, rp, rtest.df)
    finite = np.isfinite(fc.mean).all(axis=1) & np.isfinite(fc.sd).all(axis=1)
    interval_width = _relative_interval_width(panel, fc)
    with np.errstate(over="ignore", invalid="ignore"):  # overflowing errors give inf/NaN: the gate fails closed
        naive_stat = None if bt is None else bt.relative_rmse_over(settings.backtest.naive_steps)
    inputs = gates.GateInputs(
        flags=panel.flags,
        n=panel.n,
        stale_periods=panel.as_of - panel.last_period,
        fitted=fit.fitted,
        unit_root=parts["unit_root"],
        differenced=parts["differenced"],
        adf_statistic=parts["adf"].statistic,
        adf_pvalue=parts["adf"].pvalue,
        max_root_modulus=fit.max_root_modulus,
        residual_statistic=rtest.statistic,
        residual_pvalue=rp,
        forecast_min=fc.mean.min(axis=1) if fs.horizon else np.full(G, np.nan),
        forecast_max=fc.mean.max(axis=1) if fs.horizon else np.full(G, np.nan),
        forecast_finite=finite,
        arch_statistic=None if arch is None else arch.statistic,
        arch_pvalue=None if arch is None else arch.pvalue,
        naive_statistic=naive_stat,
        naive_threshold=1.0 + settings.backtest.naive_tolerance,
        order_unsupported=fit.order_unsupported,
        selection_cut=fit.selection_cut,
        order_cap=autoreg.candidate_limits(panel.n, ms.order, ms.max_order, None)[0].astype(np.float64),
        max_order=ms.max_order if ms.order == "auto" else int(ms.order),
        interval_relative_width=interval_width,
    )
    orep = parts["outliers"]
    if orep is not None:
        inputs = replace(inputs, outlier_statistic=orep.statistic, outlier_threshold=orep.threshold,
                         outlier_passed=orep.passed)
    bs = settings.backtest
    cov_mode = bs.coverage_gate if bt is not None else "off"
    if cov_mode != "off":
        cstat, cp = bt.coverage_test(bs.coverage_steps)
        inputs = replace(inputs, coverage_statistic=cstat, coverage_pvalue=cp, coverage_alpha=bs.coverage_alpha)
    outcome = gates.decide(inputs, gs, ms.unit_root, settings.backtest.naive_gate if bt is not None else "off", cov_mode)
    return CoreResult(panel, fit, parts["differenced"], parts["unit_root"], parts["adf"], parts["kpss"],
                      parts["acf"], rtest, arch, fc, outcome, bt, orep)
