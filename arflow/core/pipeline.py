"""The core run on one panel: fit -> unit roots -> diagnostics -> forecasts -> gates.

Pure arrays in and out; the frame adapters key the results back to the user's
columns. Everything is batched over series.
"""

from __future__ import annotations

from dataclasses import dataclass, fields, replace

import numpy as np

from ..settings import Settings
from . import autoreg, backtest, diagnostics, gates, outliers, unitroot
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


def residual_test(fit: autoreg.ARFit, modelled: np.ndarray, acf: diagnostics.AcfResult, settings: Settings):
    """The configured residual autocorrelation test, one p-value per series."""
    g = settings.gates
    K = g.residual_lags
    if g.residual_test == "ljung-box":
        return diagnostics.ljung_box(acf, K, model_df=fit.n_lags)
    if g.residual_test == "breusch-godfrey":
        X = np.nan_to_num(autoreg.lag_design(modelled, fit.lags))
        return diagnostics.breusch_godfrey(fit.resid, X, fit.lag_mask, K)
    # per-lag t tests, Holm step-down across lags unless switched off
    p = acf.pvalue
    if g.lag_correction == "holm":
        p = diagnostics.holm(p)
    with np.errstate(invalid="ignore"):
        pmin = np.where(np.all(np.isnan(p), axis=1), np.nan, np.nanmin(np.where(np.isnan(p), np.inf, p), axis=1))
        tmax = np.nanmax(np.where(np.isnan(acf.t_stat), -np.inf, np.abs(acf.t_stat)), axis=1)
    tmax = np.where(np.isfinite(tmax), tmax, np.nan)
    return diagnostics.TestResult(tmax, pmin, np.full(len(pmin), float(K)))


#: Series per block inside the core: small blocks keep the (series, lags,
#: periods) designs in cache, which is about 3x faster than one huge batch.
BLOCK_SERIES = 1024


def adf_from_fit(fit: autoreg.ARFit) -> unitroot.AdfResult:
    """The ADF t statistic of each fitted level model, without another regression.

    An AR model with lags 1..p is the ADF regression with p - 1 lagged
    differences, reparametrised: ``gamma = sum(phi) - 1``, so the ADF
    statistic is ``(sum(phi) - 1) / se(sum(phi))`` on the same sample (equal to
    statsmodels ``adfuller(y, maxlag=p - 1, autolag=None)``). The lag length is
    thus the one the configured criterion chose for the model. P-values:
    MacKinnon (1994); critical values: MacKinnon (2010) at T = n_obs.
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        stat = (np.nansum(fit.coef, axis=1) - 1.0) / fit.persistence_se
    stat = np.where(fit.fitted, stat, np.nan)
    pval = unitroot.mackinnon_pvalue(stat, "c")
    crit = unitroot.mackinnon_crit(np.where(fit.fitted, fit.n_obs, np.nan).astype(np.float64), "c")
    used = np.where(fit.fitted, np.max(np.where(fit.lag_mask, fit.lags[None, :], 1), axis=1) - 1, -1)
    return unitroot.AdfResult(stat, pval, used, np.where(fit.fitted, fit.n_obs, -1), crit[:, 0], crit[:, 1], crit[:, 2])


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
    adf = adf_from_fit(fit)
    kp = unitroot.kpss(np.where(fit.fitted[:, None], Y, np.nan))
    with np.errstate(invalid="ignore"):
        persistence = np.nansum(fit.coef, axis=1)
        persistent = persistence >= 1.0 - ms.unit_root_bias / np.maximum(fit.n_obs, 1)
        unit_root = fit.fitted & (adf.pvalue > ms.unit_root_alpha) & persistent
    differenced = np.zeros(G, dtype=bool)
    modelled = Y
    if ms.unit_root == "difference" and unit_root.any():
        idx = np.flatnonzero(unit_root)
        D = _diff_right_aligned(Y[idx])
        sub = autoreg.fit_ar(D, **fit_kw)
        fit = autoreg.splice(fit, sub, idx)
        differenced[idx] = True
        modelled = Y.copy()
        modelled[idx] = D

    # ---- additive outliers (arflow.core.outliers) ----------------------------------------
    Yf, excluded, orep = Y, None, None
    if ms.outliers != "off":
        found, tr = outliers.detect_and_treat(modelled, fit)
        effect = np.where(found.flagged, found.size, np.nan)
        passed = ~found.any & ~found.too_many
        if ms.outliers == "treat" and tr is not None:
            fit, excluded = tr.fit, tr.excluded
            effect = np.where(tr.treated[:, None], tr.effect, effect)
            passed = ~found.too_many & ~tr.failed
            Yf = outliers.cleaned_levels(Y, tr.effect, differenced)
        orep = OutlierReport(found.statistic, found.threshold, found.count, passed, effect)

    # ---- residual diagnostics -------------------------------------------------------------
    acf = diagnostics.residual_acf(fit.resid, gs.residual_lags)
    rtest = residual_test(fit, modelled, acf, settings)
    arch = diagnostics.arch_lm(fit.resid, gs.arch_lags) if gs.arch_test else None

    # ---- forecasts -------------------------------------------------------------------------------
    width = max(int(fit.lags.max()), 1) + 1
    hist = np.nan_to_num(Yf[:, -width:]) if Y.shape[1] else np.zeros((G, 1))
    if hist.shape[1] < width:  # a lag (e.g. a long seasonal one) reaches before every series: zeros, never used
        hist = np.concatenate([np.zeros((G, width - hist.shape[1])), hist], axis=1)
    fc = forecast_ar(
        hist,
        np.nan_to_num(fit.intercept),
        np.nan_to_num(fit.phi()),
        np.nan_to_num(fit.sigma),
        fs.horizon,
        fs.coverage,
        differenced,
        **_interval_terms(fit, modelled, fs, excluded),
    )
    bt = None
    bs = settings.backtest
    if bs.enabled:
        bt = backtest.rolling_origin(
            Yf,
            fit.lag_mask,
            fit.lags,
            differenced,
            origins=bs.origins,
            horizon=bs.horizon or fs.horizon,
            coverage=fs.coverage,
            season=seasonal,
            min_train=gs.min_observations,
            parameter_uncertainty=fs.parameter_uncertainty,
        )
    return dict(fit=fit, differenced=differenced, unit_root=unit_root, adf=adf, kpss=kp, acf=acf,
                residual_test=rtest, arch=arch, forecasts=fc, backtest=bt, outliers=orep)


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


def _in_processes(pieces: list[Panel], settings: Settings, workers: int) -> list[dict]:
    import multiprocessing as mp
    from concurrent.futures import ProcessPoolExecutor

    methods = mp.get_all_start_methods()
    ctx = mp.get_context("fork" if "fork" in methods else methods[0])
    with ProcessPoolExecutor(max_workers=min(workers, len(pieces)), mp_context=ctx) as pool:
        return list(pool.map(_run_block, pieces, [settings] * len(pieces)))


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
    if workers > 1 and len(pieces) > 1:
        blocks = _in_processes(pieces, settings, workers)
    else:
        blocks = [_run_block(p, settings) for p in pieces]
    parts = {k: _concat([b[k] for b in blocks]) for k in blocks[0]}
    fit, fc, rtest, arch = parts["fit"], parts["forecasts"], parts["residual_test"], parts["arch"]
    bt = parts["backtest"]
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
