"""Selection-aware prediction intervals: the forecast-error variance over the candidate models.

The published model was chosen from candidates (orders 0..``max_order`` by the
criterion; levels or first differences by the unit-root decision). An interval
computed as if that choice were known is too narrow when the data cannot tell
the candidates apart: at 40-60 points the one-step 80% interval covers about
78% and the 12-step interval of persistent series 71-76%.

Method (an unconditional variance over the candidate set; Buckland, Burnham &
Augustin 1997, Biometrics 53, 603-618; Burnham & Anderson 2002, Model
Selection and Multimodel Inference, section 4.3.2 -- section number from
memory). Every candidate ``k`` (levels AR(p), and with the difference policy
first differences AR(p), p = 0..cap, the selected seasonal lag kept as
selected) is fitted by OLS on one common sample. Its weight is
``w_k ~ exp(-IC_k / 2)`` with the job's criterion (the BIC weights approximate
posterior model probabilities, Kass & Raftery 1995, JASA 90, 773-795; for
AIC they are Akaike weights). Levels and differences are weighed on the same
response: ``y_t - yhat_t = dy_t - dyhat_t``, so their likelihoods compare
directly (the difference model is the level AR(p + 1) whose coefficients sum
to one). The interval is centred on the published forecast ``f`` with variance

    V(h) = sum_k w_k [ v_k(h) + (f_k(h) - f(h))^2 ]

where ``f_k`` is candidate k's forecast and ``v_k`` its forecast-error variance:
the published model's own (with the parameter-uncertainty term) for the
candidate it is, and for the others ``s_k^2 [sum_{j<h} psi_j^2 (1 + p/m) +
(sum_{j<h} psi_j)^2 / m]`` (the plug-in variance, the slopes' average one-step
term ``p/m`` and the intercept's term, which for differences is the drift's
``h^2 s^2 / m``; m rows). Quantiles are Student t on the published model's
residual degrees of freedom. When one candidate dominates (clear data) the
interval is the published model's own.
"""

from __future__ import annotations

import numpy as np

from . import autoreg, ols
from .distributions import norm_cdf, norm_ppf, t_ppf
from .forecast import Forecasts, chain_forecast, psi_weights


def _diff(Y: np.ndarray) -> np.ndarray:
    D = np.full_like(Y, np.nan)
    D[:, 1:] = Y[:, 1:] - Y[:, :-1]
    return D


def candidate_interval(
    Y: np.ndarray,
    fit: autoreg.ARFit,
    differenced: np.ndarray,
    fc: Forecasts,
    df_resid: np.ndarray,
    *,
    order: int | str,
    max_order: int,
    criterion: str,
    seasonal_lag: int | None,
    differences: bool,
) -> Forecasts:
    """``fc`` with selection-aware bounds (module notes); ``mean`` unchanged.

    ``Y`` (G, T) right-aligned levels the forecasts start from (outliers
    removed); ``fit`` the published fits (of differences where ``differenced``).
    """
    G, T = Y.shape
    H = fc.mean.shape[1]
    n = np.isfinite(Y).sum(axis=1)
    auto = order == "auto"
    P = int(max_order if auto else order)
    p_cap = autoreg.candidate_limits(n, order, max_order, None)[0]
    s = int(seasonal_lag) if seasonal_lag and int(seasonal_lag) > P else None
    lags = np.arange(1, P + 1) if s is None else np.append(np.arange(1, P + 1), s)
    K = len(lags)
    has_s = np.zeros(G, dtype=bool)
    if s is not None:
        has_s = fit.lag_mask[:, list(fit.lags).index(s)] if s in fit.lags else has_s
    sel_p = (fit.lag_mask & (fit.lags <= P)[None, :]).sum(axis=1)
    ok = fit.fitted & (p_cap >= 0) & np.isfinite(fc.sd).all(axis=1) & (fc.sd.shape[1] > 0)
    if not ok.any() or H == 0:
        return fc
    # one common sample for every candidate: the largest lag, plus one row for the differences
    hold = np.maximum(np.maximum(p_cap, 0), np.where(has_s, s or 0, 0)) + 1
    col = np.arange(T)[None, :]
    w = (col >= (T - n + hold)[:, None]) & ok[:, None]
    m = w.sum(axis=1).astype(np.float64)
    D = _diff(Y)
    transforms = [(Y, False)] + ([(D, True)] if differences else [])
    orders = np.arange(P + 1) if auto else np.array([P])
    C = len(transforms) * len(orders)
    ic = np.full((G, C), np.inf)
    fk = np.zeros((G, C, H))
    vk = np.zeros((G, C, H))
    is_sel = np.zeros((G, C), dtype=bool)
    wf = w.astype(np.float64)
    L = int(lags.max()) if K else 0
    c = 0
    for M, dif in transforms:
        X = np.nan_to_num(autoreg.lag_design(M, lags))
        g = ols.gram(X, np.nan_to_num(M), wf)
        hist = np.nan_to_num(M[:, max(T - L, 0):]) if L else np.zeros((G, 0))
        if hist.shape[1] < L:
            hist = np.concatenate([np.zeros((G, L - hist.shape[1])), hist], axis=1)
        for p in orders:
            mask = ((lags <= p)[None, :] | ((lags == s)[None, :] & has_s[:, None])) & ok[:, None]
            valid = ok & (p <= p_cap) & (m > mask.sum(axis=1) + 1)
            with np.errstate(divide="ignore", invalid="ignore"):
                r = ols.solve(g, mask)
                k = mask.sum(axis=1)
                ic[:, c] = np.where(valid, autoreg.information_criteria(r.rss, m, k + 1)[criterion], np.inf)
                s2 = r.rss / np.maximum(m - k - 1, 1)
            phi = np.zeros((G, L))
            if L:
                phi[:, lags - 1] = np.where(mask, np.nan_to_num(r.beta), 0.0)
            b0 = np.nan_to_num(r.intercept)
            f = chain_forecast(hist, b0, phi, H)
            psi = psi_weights(phi, H)
            if dif:
                f = Y[:, -1:] + np.cumsum(f, axis=1)
                psi = np.cumsum(psi, axis=1)
            with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
                v = s2[:, None] * (np.cumsum(psi * psi, axis=1) * (1.0 + k / m)[:, None]
                                   + np.cumsum(psi, axis=1) ** 2 / m[:, None])
            fk[:, c] = f
            vk[:, c] = v
            is_sel[:, c] = (differenced == dif) & (sel_p == p)
            c += 1
    ic = np.where(np.isfinite(ic), ic, np.inf)
    # the published model stands in for its own candidate (its forecast and exact variance);
    # where it matches none (a fixed lag set refitted after outliers) it takes the best one's place
    best = np.argmin(ic, axis=1)
    none = ~is_sel.any(axis=1)
    is_sel[none, best[none]] = True
    first = np.argmax(is_sel, axis=1)
    is_sel = np.zeros_like(is_sel)
    is_sel[np.arange(G), first] = True
    fk = np.where(is_sel[:, :, None], fc.mean[:, None, :], fk)
    vk = np.where(is_sel[:, :, None], (fc.sd**2)[:, None, :], vk)
    with np.errstate(over="ignore", invalid="ignore"):
        rel = ic - ic.min(axis=1, keepdims=True)
        wt = np.where(np.isfinite(rel), np.exp(-0.5 * rel), 0.0)
        wt = wt / wt.sum(axis=1, keepdims=True)
    good = ok & np.isfinite(wt).all(axis=1) & np.isfinite(fk).all(axis=(1, 2)) & np.isfinite(vk).all(axis=(1, 2))
    # the heaviest candidates carry the interval (the rest weigh < 1e-3 together in practice)
    top = np.argsort(-np.where(good[:, None], wt, 0.0), axis=1)[:, :TOP]
    wt = np.take_along_axis(wt, top, axis=1)
    wt = wt / np.where(wt.sum(axis=1, keepdims=True) > 0, wt.sum(axis=1, keepdims=True), 1.0)
    b = np.take_along_axis(fk, top[:, :, None], axis=1) - fc.mean[:, None, :]
    sk = np.sqrt(np.maximum(np.take_along_axis(vk, top[:, :, None], axis=1), 0.0))
    mixed = good & (wt[:, 0] < 1.0 - 1e-9)
    lower, upper = fc.lower.copy(), fc.upper.copy()
    sd = fc.sd.copy()
    if not mixed.any():
        return fc
    idx = np.flatnonzero(mixed)
    wt, b, sk = wt[idx], b[idx], np.maximum(sk[idx], 1e-300)
    df = np.where(np.isfinite(df_resid) & (df_resid >= 1), df_resid, np.nan)[idx]
    for ci, level in enumerate(fc.coverage):
        half = mixture_half_width(wt, b, sk, float(level))
        z = norm_ppf(0.5 + level / 2.0)
        tq = t_ppf(0.5 + level / 2.0, df)
        half = half * (tq / z)[:, None]
        own = (fc.upper[ci, idx] - fc.lower[ci, idx]) / 2.0
        half = np.where(np.isfinite(half), np.maximum(half, own), own)
        lower[ci, idx] = fc.mean[idx] - half
        upper[ci, idx] = fc.mean[idx] + half
        if ci == len(fc.coverage) - 1:
            sd[idx] = half / tq[:, None]
    return Forecasts(fc.mean, sd, fc.coverage, lower, upper)


#: candidates that carry a mixed interval (by weight)
TOP = 4


def mixture_half_width(w: np.ndarray, b: np.ndarray, s: np.ndarray, level: float, iterations: int = 30) -> np.ndarray:
    """Half-width d (G, H) with ``sum_k w_k P(|b_k + s_k Z| <= d) = level``, Z standard normal.

    ``w`` (G, C) weights summing to one, ``b``/``s`` (G, C, H) offsets and scales.
    Safeguarded Newton on the increasing mixture probability (bisection when a
    step leaves the bracket).
    """
    wk = w[:, :, None]
    lo = np.zeros((b.shape[0], b.shape[2]))
    q = norm_ppf(1.0 - (1.0 - level) / 4.0)
    hi = np.max(np.abs(b) + q * s, axis=1)
    d = np.sqrt(np.einsum("gc,gch->gh", w, s * s + b * b)) * norm_ppf(0.5 + level / 2.0)
    d = np.clip(d, lo, hi)
    for _ in range(iterations):
        up, dn = (d[:, None, :] - b) / s, (-d[:, None, :] - b) / s
        F = (wk * (norm_cdf(up) - norm_cdf(dn))).sum(axis=1) - level
        dF = (wk * (np.exp(-0.5 * up * up) + np.exp(-0.5 * dn * dn)) / s).sum(axis=1) / np.sqrt(2 * np.pi)
        lo = np.where(F < 0, d, lo)
        hi = np.where(F >= 0, d, hi)
        with np.errstate(divide="ignore", invalid="ignore"):
            step = d - F / dF
        d = np.where((step > lo) & (step < hi), step, 0.5 * (lo + hi))
        if np.all(np.abs(F) < 1e-10):
            break
    return d
