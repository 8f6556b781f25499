"""Selection-aware prediction intervals: the forecast distribution over the candidate models.

The published model was chosen from candidates (orders 0..``max_order`` by the
criterion; levels or first differences by the unit-root decision). An interval
computed as if that choice were known is too narrow when the data cannot tell
the candidates apart: at 40-60 points the one-step 80% interval covered about
78% and the 12-step interval of persistent series 71-77%.

Method. Every candidate ``k`` (levels AR(p) and, with the difference policy,
first differences AR(p), p = 0..the series' cap, the seasonal lag kept as
selected) is fitted by OLS on one common sample (one raw-sum matrix gives both
transforms; one nested sweep gives every order's RSS). Its weight is
``w_k ~ exp(-IC_k / 2)`` with the job's criterion: BIC weights approximate
posterior model probabilities (Kass & Raftery 1995, JASA 90, 773-795), with
AIC they are Akaike weights; Buckland, Burnham & Augustin (1997, Biometrics 53,
603-618) and Burnham & Anderson (2002, Model Selection and Multimodel
Inference) use them for intervals that carry model-selection uncertainty.
Levels and differences are weighed on the same response (``y_t - yhat_t =
dy_t - dyhat_t``; the difference model is the level AR(p + 1) whose
coefficients sum to one). The ``TOP`` heaviest candidates (the published one
always among them) form a normal mixture centred on their forecasts ``f_k``
with standard deviations ``s_k``; the interval is centred on the published
forecast ``f`` with the half-width ``d`` solving ``sum_k w_k P(|f_k + s_k Z -
f| <= d) = c``, scaled to Student t on the published model's residual degrees
of freedom, and never narrower than the model's own. ``s_k`` is the published
model's own (with the parameter term) for its candidate, and for the others
``s^2 [sum_{j<h} psi_j^2 (1 + p/m) + (sum_{j<h} psi_j)^2 / m]`` (plug-in
variance, the slopes' average one-step term, the intercept's term, which for
differences is the drift's ``h^2 s^2 / m``; m rows). The candidates'
coefficients are first corrected for the small-sample bias of OLS AR
estimates (:func:`bias_map`; Kilian's stationarity shrinkage), and the
published model's component moves by its candidate's correction; models with
a seasonal lag are not corrected. Where the other candidates weigh less than
``MIN_WEIGHT`` together the interval is the published model's own.
"""

from __future__ import annotations

import dataclasses
import functools
import warnings

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
    bias_correction: bool = True,
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
    # a degenerate model (an exact fit: zero residuals) keeps its own interval, so that the
    # forecast_interval gate still holds it back (degenerate_interval); the mixture must not hide it
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN rows (unfitted series)
        scale = np.nanstd(np.where(np.isfinite(Y), Y, np.nan), axis=1) if T else np.zeros(G)
        ok &= (fc.sd.min(axis=1, initial=np.inf) > DEGENERATE * scale) & np.isfinite(scale)
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
    L = int(lags.max()) if K else 0
    wf = w.astype(np.float64)
    # ---- pass 1: every candidate's RSS and criterion on the common sample (one nested sweep per
    # transform: orders 1..P, after the seasonal lag where the published model has it)
    ic = np.full((G, C), np.inf)
    rss = np.zeros((G, C))
    ks = np.zeros((G, C))
    c_dif = np.zeros(C, dtype=bool)
    c_p = np.zeros(C, dtype=np.int64)
    is_sel = np.zeros((G, C), dtype=bool)
    grams = []
    base = np.flatnonzero(lags <= P)
    hs = np.flatnonzero(has_s)
    c = 0
    for (M, dif), g in zip(transforms, _grams(Y, lags, wf, differences)):
        grams.append(g)
        nested = np.concatenate([g.yty[:, None], ols.nested_rss(g, base)], axis=1)  # orders 0..P
        if hs.size:
            scol = int(np.flatnonzero(lags == s)[0])
            nested[hs] = ols.nested_rss(_take_gram(g, hs), np.concatenate([[scol], base]))
        for p in orders:
            k = p + has_s
            valid = ok & (p <= p_cap) & (m > k + 1)
            with np.errstate(divide="ignore", invalid="ignore"):
                ic[:, c] = np.where(valid, autoreg.information_criteria(nested[:, p], m, k + 1)[criterion], np.inf)
            rss[:, c], ks[:, c] = nested[:, p], k
            c_dif[c], c_p[c] = dif, p
            is_sel[:, c] = (differenced == dif) & (sel_p == p)
            c += 1
    ic = np.where(np.isfinite(ic), ic, np.inf)
    # the published model stands in for its own candidate (its forecast and exact variance);
    # where it matches none (a lag set refitted after outliers) it takes the best one's place
    best = np.argmin(ic, axis=1)
    none = ~is_sel.any(axis=1)
    is_sel[none, best[none]] = True
    sel = np.argmax(is_sel, axis=1)
    with np.errstate(over="ignore", invalid="ignore"):
        rel = ic - ic.min(axis=1, keepdims=True)
        wt = np.where(np.isfinite(rel), np.exp(-0.5 * rel), 0.0)
        wt = wt / wt.sum(axis=1, keepdims=True)
    good = ok & np.isfinite(wt).all(axis=1)
    # ---- pass 2: forecasts of the heaviest candidates only (the published one always among them)
    wsel = np.where(good[:, None], wt, 0.0)
    wsel[np.arange(G), sel] = np.inf
    top = np.argsort(-wsel, axis=1)[:, :TOP]
    wt = np.take_along_axis(np.where(good[:, None], wt, 0.0), top, axis=1)
    # where the other candidates weigh less than MIN_WEIGHT together the interval is the model's own
    # (they could move its coverage by less than that)
    mixed = good & (1.0 - wt[:, 0] >= MIN_WEIGHT)  # column 0 is the published model
    if not mixed.any():
        return fc
    idx = np.flatnonzero(mixed)
    Gm, Tk = len(idx), top.shape[1]
    tk = top[idx]
    rows = np.repeat(idx, Tk)
    cand = tk.ravel()
    dif = c_dif[cand]
    p_row = c_p[cand]
    m_row = m[rows]
    # coefficients of those candidates only: one solve per transform on their rows' Gram matrices
    phi = np.zeros((len(rows), L))
    phi_ols = np.zeros((len(rows), L))
    b0 = np.zeros(len(rows))
    b0_ols = np.zeros(len(rows))
    for t, g in enumerate(grams):
        r_ = np.flatnonzero(dif == (t == 1))
        if not r_.size:
            continue
        gr = _take_gram(g, rows[r_])
        mask = (lags[None, :] <= p_row[r_, None]) | ((lags == s)[None, :] & has_s[rows[r_], None])
        with np.errstate(divide="ignore", invalid="ignore"):
            sol = ols.solve(gr, mask)
        if L:
            phi[r_[:, None], (lags - 1)[None, :]] = np.where(mask, np.nan_to_num(sol.beta), 0.0)
        b0[r_] = np.nan_to_num(sol.intercept)
        phi_ols[r_], b0_ols[r_] = phi[r_], b0[r_]
        if bias_correction:
            # every order at once: each row's bias map padded to the block's widest order
            q = r_[(p_row[r_] >= 1) & ~has_s[rows[r_]]]
            if q.size:
                sub = np.searchsorted(r_, q)
                phi[q], b0[q] = _bias_corrected(phi[q], gr.ymean[sub], gr.xmean[sub], lags, p_row[q], m_row[q])
    hist_l = _last(Y, L)[rows]
    hist_d = _last(D, L)[rows]
    hist = np.where(dif[:, None], hist_d, hist_l)
    f = chain_forecast(hist, b0, phi, H)
    f_ols = chain_forecast(hist, b0_ols, phi_ols, H)
    psi = psi_weights(phi, H)
    f = np.where(dif[:, None], np.cumsum(f, axis=1), f)
    f_ols = np.where(dif[:, None], np.cumsum(f_ols, axis=1), f_ols)
    psi = np.where(dif[:, None], np.cumsum(psi, axis=1), psi)
    shift = f - f_ols  # the bias correction's move of the forecast
    f = np.where(dif[:, None], Y[rows, -1:] + f, f)
    k = ks[rows, cand]
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        s2 = rss[rows, cand] / np.maximum(m_row - ks[rows, cand] - 1, 1)
        v = s2[:, None] * (np.cumsum(psi * psi, axis=1) * (1.0 + k / m_row)[:, None]
                                        + np.cumsum(psi, axis=1) ** 2 / m_row[:, None])
    f, shift, v = f.reshape(Gm, Tk, H), shift.reshape(Gm, Tk, H), v.reshape(Gm, Tk, H)
    own = (tk == sel[idx, None])[:, :, None]
    # the published model: its own forecast moved by its candidate's bias correction, its exact variance
    f = np.where(own, fc.mean[idx, None, :] + shift, f)
    v = np.where(own, (fc.sd[idx] ** 2)[:, None, :], v)
    wt = wt[idx]
    wt = wt / wt.sum(axis=1, keepdims=True)
    b = f - fc.mean[idx, None, :]
    sk = np.sqrt(np.maximum(v, 0.0))
    fine = np.isfinite(b).all(axis=(1, 2)) & np.isfinite(sk).all(axis=(1, 2)) & (sk > 0).all(axis=(1, 2))
    idx, wt, b, sk = idx[fine], wt[fine], b[fine], sk[fine]
    lower, upper, sd = fc.lower.copy(), fc.upper.copy(), fc.sd.copy()
    if not idx.size:
        return fc
    df = np.where(np.isfinite(df_resid) & (df_resid >= 1), df_resid, np.nan)[idx]
    for ci, level in enumerate(fc.coverage):
        half = mixture_half_width(wt, b, sk, float(level))
        z = norm_ppf(0.5 + level / 2.0)
        tq = t_ppf(0.5 + level / 2.0, df)
        # Student t on the published model's degrees of freedom, as its own interval
        half = half * (tq / z)[:, None]
        own_half = (fc.upper[ci, idx] - fc.lower[ci, idx]) / 2.0
        half = np.where(np.isfinite(half), np.maximum(half, own_half), own_half)
        lower[ci, idx] = fc.mean[idx] - half
        upper[ci, idx] = fc.mean[idx] + half
        if ci == len(fc.coverage) - 1:
            sd[idx] = half / tq[:, None]
    return Forecasts(fc.mean, sd, fc.coverage, lower, upper)


def _grams(Y: np.ndarray, lags: np.ndarray, w: np.ndarray, differences: bool) -> list[ols.Gram]:
    """Gram matrices of the level regression (``y_t`` on ``y_(t-j)``, j in ``lags``) and, with
    ``differences``, of the difference regression (``dy_t`` on ``dy_(t-j)``) over the rows weighted by ``w``.

    One raw-sum matrix of ``y_t`` and its lags j and j + 1 (each series shifted by its mean, as
    :func:`arflow.core.autoreg.fit_ar` forms them) gives both: the difference columns are
    linear combinations ``y_(t-j) - y_(t-j-1)`` of the level columns. Means in original units.
    """
    need = np.unique(np.concatenate([lags, lags + 1])) if differences else np.asarray(lags)
    ZT, shift = autoreg.shifted_lag_stack(Y, need)
    ZT *= w[:, None, :]  # 0/1 weights: masking one factor in place is masking both (no weighted copy)
    S = np.matmul(ZT, np.swapaxes(ZT, 1, 2))
    tot = ZT.sum(axis=2)
    n = w.sum(axis=1)
    R, K = len(need) + 1, len(lags)
    row = {int(j): i for i, j in enumerate(need)}
    A = np.zeros((K + 1, R))
    A[np.arange(K), [row[int(j)] for j in lags]] = 1.0
    A[K, R - 1] = 1.0
    out = []
    g = ols.gram_from_sums(A @ S @ A.T, tot @ A.T, n)
    out.append(dataclasses.replace(g, xmean=g.xmean + shift[:, None], ymean=g.ymean + shift))
    if differences:
        Dm = A.copy()
        Dm[np.arange(K), [row[int(j) + 1] for j in lags]] = -1.0
        Dm[K, row[1]] = -1.0
        out.append(ols.gram_from_sums(Dm @ S @ Dm.T, tot @ Dm.T, n))
    return out


def _take_gram(g: ols.Gram, rows: np.ndarray) -> ols.Gram:
    """The Gram matrices of some rows (every field leads with the series axis)."""
    return ols.Gram(*(getattr(g, f.name)[rows] for f in dataclasses.fields(g)))


def _last(M: np.ndarray, L: int) -> np.ndarray:
    """The last ``L`` columns of ``M`` (G, T), NaN as 0, left-padded with zeros."""
    G, T = M.shape
    out = np.zeros((G, L))
    if L:
        w = min(L, T)
        out[:, L - w:] = np.nan_to_num(M[:, T - w:])
    return out


#: candidates that carry a mixed interval (by weight)
TOP = 4
#: total weight of the other candidates below which the model's own interval stands
MIN_WEIGHT = 1e-3
#: own interval standard deviation below this share of the series' own: degenerate, left alone
DEGENERATE = 1e-9
#: probability tolerance of the mixture quantile
TOLERANCE = 1e-6


@functools.lru_cache(maxsize=None)
def bias_map(p: int) -> tuple[np.ndarray, np.ndarray]:
    """``(c, M)`` of the first-order bias of OLS AR(p) estimates with an intercept: ``E phi_hat - phi = -(c + M phi) / T``.

    From Pope's (1990, J. Time Series Analysis 11, 249-258) formula for the
    companion form, ``B = G [(I - A')^-1 + A'(I - A'^2)^-1 + sum_l l (I - l A')^-1] Gamma_0^-1``
    (A the companion matrix, l its eigenvalues, G the innovation covariance,
    Gamma_0 the state covariance), whose first row is linear in phi (Shaman &
    Stine 1988, JASA 83, 842-848): evaluated at phi = 0 and at the unit
    vectors. For p = 1 it is Kendall's (1954) ``(1 + 3 phi) / T``.
    """
    def first_row(phi: np.ndarray) -> np.ndarray:
        A = np.zeros((p, p))
        A[0] = phi
        A[np.arange(1, p), np.arange(p - 1)] = 1.0
        # autocovariances gamma_0..gamma_p (unit innovation variance) from the Yule-Walker equations
        YW = np.eye(p + 1)
        for k in range(p + 1):
            for j in range(1, p + 1):
                YW[k, abs(k - j)] -= phi[j - 1]
        gam = np.linalg.solve(YW, np.eye(p + 1)[0])
        G0 = gam[np.abs(np.subtract.outer(np.arange(p), np.arange(p)))]
        I = np.eye(p)
        At = A.T
        S = sum(lam * np.linalg.inv(I - lam * At) for lam in np.linalg.eigvals(A))
        inner = np.linalg.inv(I - At) + At @ np.linalg.inv(I - At @ At) + S
        return np.real(inner[0] @ np.linalg.inv(G0))

    eps = 0.1
    c = first_row(np.zeros(p))
    M = np.column_stack([first_row(eps * e) - c for e in np.eye(p)]) / eps
    return c, M


def _bias_corrected(phi: np.ndarray, ybar: np.ndarray, xbar: np.ndarray, lags: np.ndarray, p: np.ndarray,
                    m: np.ndarray):
    """Bias-corrected lags 1..p_r of each row of ``phi`` (R, L) and the intercept that keeps the sample means.

    ``phi_bc = phi + (c + M phi) / m`` (:func:`bias_map` of each row's order
    ``p`` (R,), padded with zeros to the widest); where that is not
    stationary the correction is halved until it is (Kilian 1998, REStat 80,
    218-230, shrinks it the same way), and dropped after eight halvings. The
    intercept follows the OLS identity ``b0 = ybar - sum_j phi_j xbar_j`` with
    the response's and lag columns' sample means (``ybar`` (R,), ``xbar`` (R, K)).
    """
    p = np.broadcast_to(np.asarray(p, dtype=np.int64), (phi.shape[0],))
    W = int(p.max(initial=0))
    cs, Ms = _padded_bias_maps(W)
    c, M = cs[p], Ms[p]  # (R, W), (R, W, W); zero beyond each row's order
    with np.errstate(divide="ignore", invalid="ignore"):
        delta = (c + np.einsum("rij,rj->ri", M, phi[:, :W])) / m[:, None]
    delta = np.where(np.isfinite(delta), delta, 0.0)
    check = np.arange(phi.shape[0])  # only rows whose correction changed are checked again
    for it in range(9):
        new = phi[check, :W] + delta[check]
        risky = check[np.abs(new).sum(axis=1) >= MAX_MODULUS]  # sum |phi| < 1: stationary
        if not risky.size:
            break
        bad = risky[autoreg.max_root_modulus(phi[risky, :W] + delta[risky], p[risky]) >= MAX_MODULUS]
        if not bad.size:
            break
        delta[bad] *= 0.5 if it < 8 else 0.0
        check = bad
    out = phi.copy()
    out[:, :W] += delta
    b0 = ybar - np.einsum("rk,rk->r", out[:, lags - 1], xbar)
    return out, np.nan_to_num(b0)


@functools.lru_cache(maxsize=None)
def _padded_bias_maps(W: int) -> tuple[np.ndarray, np.ndarray]:
    """:func:`bias_map` of orders 0..W stacked, zero-padded to width W: (W+1, W) and (W+1, W, W)."""
    cs, Ms = np.zeros((W + 1, W)), np.zeros((W + 1, W, W))
    for p in range(1, W + 1):
        c, M = bias_map(p)
        cs[p, :p], Ms[p, :p, :p] = c, M
    return cs, Ms


#: a bias correction may not push the largest root beyond this modulus
MAX_MODULUS = 0.999


def mixture_half_width(w: np.ndarray, b: np.ndarray, s: np.ndarray, level: float, iterations: int = 60) -> np.ndarray:
    """Half-width d (G, H) with ``sum_k w_k P(|b_k + s_k Z| <= d) = level``, Z standard normal.

    ``w`` (G, C) weights summing to one, ``b``/``s`` (G, C, H) offsets and scales.
    Starts from the Cornish-Fisher quantile of the mixture's second and fourth
    moments (Cornish & Fisher 1937) and takes a few safeguarded Newton steps on
    the increasing mixture probability (a bisection step when a Newton step
    leaves the bracket); the result is checked against a root finder in the tests.
    """
    wk = w[:, :, None]
    lo = np.zeros((b.shape[0], b.shape[2]))
    q = norm_ppf(1.0 - (1.0 - level) / 4.0)
    hi = np.max(np.abs(b) + q * s, axis=1)
    b2, s2 = b * b, s * s
    m2 = np.einsum("gc,gch->gh", w, s2 + b2)
    m4 = np.einsum("gc,gch->gh", w, b2 * b2 + 6.0 * b2 * s2 + 3.0 * s2 * s2)
    z = float(norm_ppf(0.5 + level / 2.0))
    with np.errstate(divide="ignore", invalid="ignore"):
        kurt = np.clip(m4 / (m2 * m2) - 3.0, 0.0, 6.0)
    d = np.clip(np.sqrt(m2) * (z + (z**3 - 3.0 * z) * kurt / 24.0), lo, hi)
    # work on the flattened (series, step) cells; converged cells leave the working set
    G, C, H = b.shape
    bf = b.transpose(0, 2, 1).reshape(G * H, C)
    sf = s.transpose(0, 2, 1).reshape(G * H, C)
    wf = np.repeat(w, H, axis=0)
    d, lo, hi = d.ravel(), lo.ravel(), hi.ravel()
    act = np.arange(G * H)
    for _ in range(iterations):
        bb, ss, ww, dd = bf[act], sf[act], wf[act], d[act]
        up, dn = (dd[:, None] - bb) / ss, (-dd[:, None] - bb) / ss
        F = (ww * (norm_cdf(up) - norm_cdf(dn))).sum(axis=1) - level
        dF = (ww * (np.exp(-0.5 * up * up) + np.exp(-0.5 * dn * dn)) / ss).sum(axis=1) / np.sqrt(2 * np.pi)
        l, h = np.where(F < 0, dd, lo[act]), np.where(F >= 0, dd, hi[act])
        lo[act], hi[act] = l, h
        with np.errstate(divide="ignore", invalid="ignore"):
            step = dd - F / dF
        done = np.abs(F) <= TOLERANCE
        d[act] = np.where(done, dd, np.where((step >= l) & (step <= h), step, 0.5 * (l + h)))
        keep = ~done & (h - l > 1e-12 * h)
        act = act[keep]
        if not act.size:
            break
    return d.reshape(G, H)
