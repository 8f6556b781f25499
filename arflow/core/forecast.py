"""Chain forecasts and psi-weight prediction intervals for a batch of AR fits.

Each step feeds the next: ``y(T+h) = b0 + sum_j phi_j y(T+h-j)`` with
forecasts standing in for unknown values. The h-step forecast error of an AR
model is ``sum_{j<h} psi_j e(T+h-j)``, so its variance is
``sigma^2 * sum_{j<h} psi_j^2`` with ``psi_0 = 1`` and
``psi_j = sum_i phi_i psi_{j-i}``. Intervals are Gaussian:
``forecast +/- z_{(1+c)/2} * sd``. For a model fitted to first differences,
forecasts are cumulated onto the last level and the level psi-weights are the
running sums of the difference model's psi-weights, so intervals are for levels.

Parameter uncertainty (``coef_cov`` given): the forecast error with
estimated coefficients is the error with known ones plus the estimation error
of the forecast, ``y(T+h) - yhat(T+h) = sum psi_j e(T+h-j) + (f_h(theta) - f_h(theta_hat))``.
Its variance is approximated, conditionally on the observed last values, by
``sigma^2 sum psi_j^2 + g_h' V g_h`` with ``g_h = d yhat(T+h) / d theta`` (the
derivatives of the chain forecast with respect to the intercept and the AR
coefficients, by forward recursion) and ``V`` the OLS covariance of
``theta_hat``: the delta-method estimator of the prediction-error variance
with estimated parameters of Fuller & Hasza (1981, JASA 76, 155-161; Fuller
1996, Introduction to Statistical Time Series, 2nd ed., section 8.5 -- section number from memory). The
``1/n`` term is the same order as Yamamoto's (1976) asymptotic correction.
With ``df_resid`` given the quantiles are Student t with the residual degrees
of freedom instead of Gaussian. For differenced models the level derivatives
are the running sums of the difference model's, so the drift's uncertainty
grows with the square of the horizon, as it should.

These intervals still assume the model's form (its lags, Gaussian
innovations of constant variance); they do not cover model error.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from .arrays import nan_to_num
from .distributions import norm_ppf, t_ppf


@dataclass(frozen=True)
class Forecasts:
    """``mean`` and ``sd`` (G, H); ``lower``/``upper`` (C, G, H) for the coverage levels."""

    mean: np.ndarray
    sd: np.ndarray
    coverage: tuple[float, ...]
    lower: np.ndarray
    upper: np.ndarray


def psi_weights(phi: np.ndarray, horizon: int) -> np.ndarray:
    """psi_0..psi_{H-1} (G, H) of the AR polynomial ``phi`` (G, L), lag j in column j-1."""
    G, L = phi.shape
    used = _used_lags(phi)
    psi = np.zeros((horizon, G))  # step-major: each update is one pass over the series
    if horizon:
        psi[0] = 1.0
    phit = np.ascontiguousarray(phi[:, used - 1].T) if len(used) else np.zeros((0, G))
    for j in range(1, horizon):
        # psi_j = sum_{i=1..min(j, L)} phi_i psi_{j-i}, over the lags some series uses
        acc = None
        for k, lag in enumerate(used):
            if lag > j:
                break
            term = phit[k] * psi[j - lag]
            acc = term if acc is None else acc + term
        if acc is not None:
            psi[j] = acc
    return np.ascontiguousarray(psi.T)


def chain_forecast(history: np.ndarray, intercept: np.ndarray, phi: np.ndarray, horizon: int) -> np.ndarray:
    """h = 1..H forecasts (G, H) from the last L values of ``history`` (G, >= L, right-aligned, finite)."""
    G, L = phi.shape
    used = _used_lags(phi)
    buf = np.zeros((L + horizon, G))  # step-major: each update is one pass over the series
    if L:
        buf[:L] = history[:, history.shape[1] - L :].T
    phit = np.ascontiguousarray(phi[:, used - 1].T) if len(used) else np.zeros((0, G))
    for h in range(horizon):
        # lag j value sits at row L + h - j
        acc = None
        for k, lag in enumerate(used):
            term = phit[k] * buf[L + h - lag]
            acc = term if acc is None else acc + term
        buf[L + h] = intercept if acc is None else intercept + acc
    return np.ascontiguousarray(buf[L:].T)


def _used_lags(phi: np.ndarray) -> np.ndarray:
    """The lags (1-based, increasing) whose coefficient is nonzero (or NaN) in some series."""
    return np.flatnonzero(np.any(phi != 0, axis=0)) + 1


def forecast_ar(
    history: np.ndarray,
    intercept: np.ndarray,
    phi: np.ndarray,
    sigma: np.ndarray,
    horizon: int,
    coverage: tuple[float, ...] = (0.8, 0.95),
    differenced: np.ndarray | None = None,
    coef_cov: np.ndarray | None = None,
    df_resid: np.ndarray | None = None,
    coef_cov_lags: np.ndarray | None = None,
) -> Forecasts:
    """Forecasts with intervals for all series at once.

    ``history`` (G, T) right-aligned levels; ``phi`` (G, L); ``sigma`` (G,);
    ``differenced`` (G,) bool marks models fitted to first differences (their
    ``intercept``/``phi`` describe the differences; output is in levels).
    ``coef_cov`` (G, L+1, L+1): covariance of ``[intercept, phi_1..phi_L]``
    (see :func:`coef_covariance`); when given, the interval variance includes
    the parameter-estimation term. ``df_resid`` (G,): Student-t quantiles.
    ``coef_cov_lags`` (K,): ``coef_cov`` is the compact (G, K+1, K+1) covariance of
    ``[intercept, phi at these lags]`` instead (``cov_from_gram(..., dense=False)``).

    >>> f = forecast_ar(np.array([[0.0, 1.0]]), np.array([0.0]), np.array([[0.5]]), np.array([1.0]), 3, (0.95,))
    >>> f.mean.round(3).tolist(), f.sd.round(4).tolist()
    ([[0.5, 0.25, 0.125]], [[1.0, 1.118, 1.1456]])
    """
    history = np.asarray(history, dtype=np.float64)
    G, L = phi.shape
    diff = np.zeros(G, dtype=bool) if differenced is None else np.asarray(differenced, dtype=bool)
    src = history
    if diff.any():
        d = np.diff(history, axis=1)
        src = np.where(diff[:, None], np.concatenate([np.full((G, 1), np.nan), d], axis=1), history)
    srcz = nan_to_num(src, copy=src is history)
    mean = chain_forecast(srcz, intercept, phi, horizon)
    psi = psi_weights(phi, horizon)
    var_param = None
    if coef_cov is not None:
        var_param = parameter_variance(srcz, intercept, phi, coef_cov, horizon, diff, coef_cov_lags)
    if diff.any():
        last = history[:, -1]
        mean = np.where(diff[:, None], last[:, None] + np.cumsum(mean, axis=1), mean)
        psi = np.where(diff[:, None], np.cumsum(psi, axis=1), psi)
    var = sigma[:, None] ** 2 * np.cumsum(psi * psi, axis=1)
    if var_param is not None:
        var = var + var_param
    sd = np.sqrt(var)
    cov = tuple(float(c) for c in coverage)
    upper_p = 0.5 + np.asarray(cov) / 2.0
    if df_resid is None:
        z = np.broadcast_to(norm_ppf(upper_p)[:, None], (len(cov), G))
    else:
        df = np.asarray(df_resid, dtype=np.float64)
        df = np.where(np.isfinite(df) & (df >= 1), df, np.nan)
        z = t_ppf(upper_p[:, None], df[None, :])
    lower = mean[None] - z[:, :, None] * sd[None]
    upper = mean[None] + z[:, :, None] * sd[None]
    return Forecasts(mean, sd, cov, lower, upper)


def parameter_variance(
    src: np.ndarray, intercept: np.ndarray, phi: np.ndarray, coef_cov: np.ndarray, horizon: int, diff: np.ndarray,
    cov_lags: np.ndarray | None = None,
) -> np.ndarray:
    """The delta-method term ``g_h' V g_h`` (G, H) of the forecast-error variance (module notes).

    ``src`` (G, >= L) is the modelled history (differences where ``diff``).
    The derivatives of the chain forecast follow its own recursion:
    ``d yhat_h / d b0 = 1 + sum_j phi_j d yhat_(h-j) / d b0`` and
    ``d yhat_h / d phi_i = yhat_(h-i) + sum_j phi_j d yhat_(h-j) / d phi_i``
    (observed values have zero derivative). Only the last L derivatives are
    kept, so memory is (G, L, L+1) whatever the horizon. ``cov_lags``: ``coef_cov``
    is compact over ``[intercept, phi at cov_lags]`` (the same numbers as the dense form).
    """
    G, L = phi.shape
    out = np.zeros((G, horizon))
    V = np.asarray(coef_cov, dtype=np.float64)
    # only the lags some series uses (phi or V nonzero): a compact parameter vector
    # (NaN/inf are zeroed on the compact block only: the dense one is mostly zeros)
    diagv = nan_to_num(np.diagonal(V, axis1=1, axis2=2)[:, 1:])
    if cov_lags is None:
        used = np.flatnonzero(np.any(diagv != 0, axis=0) | np.any(phi != 0, axis=0)) + 1
        sel = np.concatenate([[0], used])
        Vc = nan_to_num(V[:, sel[:, None], sel[None, :]], copy=False)
    else:
        cand = np.asarray(cov_lags, dtype=np.int64)
        in_v = np.zeros(L + 1, dtype=bool)
        in_v[cand[np.any(diagv != 0, axis=0)]] = True
        used = np.flatnonzero(in_v[1:] | np.any(phi != 0, axis=0)) + 1
        pos = np.searchsorted(cand, used)
        have = (pos < len(cand)) & (cand[np.minimum(pos, len(cand) - 1)] == used)
        sel = np.concatenate([[0], pos[have] + 1])  # positions in the compact covariance
        dst = np.concatenate([[0], np.flatnonzero(have) + 1])  # positions in the used-lag vector
        Vc = np.zeros((G, len(used) + 1, len(used) + 1))
        Vc[:, dst[:, None], dst[None, :]] = nan_to_num(V[:, sel[:, None], sel[None, :]], copy=False)
    K = len(used)
    P = K + 1
    # everything is held parameter-major, (P, G) / (T, G): each update is one pass over the
    # series axis (with (G, P) and P of 2..13 the per-row overhead of the short loops dominated)
    phit = np.ascontiguousarray(phi[:, used - 1].T)
    Vt = np.ascontiguousarray(Vc.transpose(1, 2, 0))  # (P, P, G)
    buf = np.zeros((L + horizon, G))  # the modelled history, then the chain forecasts
    if L:
        buf[:L] = src[:, src.shape[1] - L :].T
    R = max(L, 1)
    ring = np.zeros((R, P, G))  # derivatives of positions p - R .. p - 1, at index p % R
    cum = np.zeros((P, G))
    all_diff = G > 0 and bool(diff.all())
    mixed = bool(diff.any()) and not all_diff
    CH = 64  # steps per batched quadratic form (bounds memory at long horizons)
    grads = np.zeros((min(horizon, CH), P, G))
    for h in range(horizon):
        p = L + h
        g = np.empty((P, G))
        g[0] = 1.0
        acc = None
        for k in range(K):
            y = buf[p - used[k]]
            g[k + 1] = y
            acc = phit[k] * y if acc is None else acc + phit[k] * y
        buf[p] = intercept if acc is None else intercept + acc
        for k in range(K):
            g += phit[k] * ring[(p - used[k]) % R]
        ring[p % R] = g
        if mixed:
            cum = np.where(diff[None, :], cum + g, g)
        elif all_diff:
            cum += g
        else:
            cum = g
        grads[h % CH] = cum
        if h % CH == CH - 1 or h == horizon - 1:
            h0 = h - h % CH
            gm = grads[: h - h0 + 1]  # (steps, P, G)
            # the quadratic form g' V g over the parameter pairs (V symmetric)
            q = np.zeros((h - h0 + 1, G))
            for a in range(P):
                t = Vt[a, a] * gm[:, a]
                for b in range(a + 1, P):
                    t += 2.0 * Vt[a, b] * gm[:, b]
                q += gm[:, a] * t
            out[:, h0 : h + 1] = q.T
    return np.maximum(out, 0.0)


def coef_covariance(X: np.ndarray, w: np.ndarray, mask: np.ndarray, lags: np.ndarray, sigma: np.ndarray) -> np.ndarray:
    """OLS covariance (G, L+1, L+1) of ``[intercept, phi_1..phi_L]`` in the dense lag layout.

    ``X`` (G, T, K) lag design of the modelled series (finite where ``w`` > 0),
    ``w`` (G, T) the fitted sample's 0/1 row weights, ``mask`` (G, K) each
    series' lags among ``lags`` (K,), ``sigma`` (G,) the residual standard
    deviation (RSS / (n - k)). ``s^2 (Z'Z)^-1`` with ``Z = [1, X_used]``:
    slopes from the centred Gram matrix, ``Var(b0) = s^2/n + xbar' V xbar``
    and ``Cov(b0, b) = -V xbar``. Zero rows for lags a series does not use.
    """
    from . import ols

    G, T, K = X.shape
    L = int(lags.max()) if len(lags) else 0
    if G == 0 or K == 0:
        return np.zeros((G, L + 1, L + 1))
    X = nan_to_num(np.where(w[:, :, None] > 0, X, 0.0), copy=False)  # = where(w > 0, nan_to_num(X), 0)
    return cov_from_gram(ols.gram(X, np.zeros((G, T)), w), mask, lags, sigma)


def cov_from_gram(g, mask: np.ndarray, lags: np.ndarray, sigma: np.ndarray, shift: np.ndarray | None = None,
                  inverse: np.ndarray | None = None, dense: bool = True) -> np.ndarray:
    """:func:`coef_covariance` from an :class:`arflow.core.ols.Gram` of the lag columns.

    ``shift`` (G,): the series were shifted by this before the Gram was formed
    (``b0 = a + m (1 - sum b)``), so the lag columns' own means are ``xmean + m``.
    ``inverse``: the inverse of the masked Gram matrix when the caller has it
    (:func:`arflow.core.ols.solve_with_inverse`). ``dense=False``: the compact
    (G, K+1, K+1) covariance of ``[intercept, coefficients of lags]`` (for
    ``forecast_ar(..., coef_cov_lags=lags)``).
    """
    from . import ols

    G = g.xty.shape[0]
    L = int(lags.max()) if len(lags) else 0
    if inverse is None:
        A, _, m = ols._masked(g, mask)
        Ainv = ols._inv(A, m)
    else:
        m = ~g.degenerate if mask is None else (np.asarray(mask, dtype=bool) & ~g.degenerate)
        Ainv = inverse
    sc = m.astype(np.float64) / g.scale
    s2 = np.asarray(sigma, dtype=np.float64) ** 2
    Vb = Ainv * (sc[:, :, None] * sc[:, None, :]) * s2[:, None, None]
    xbar = g.xmean if shift is None else g.xmean + np.asarray(shift, dtype=np.float64)[:, None]
    xbar = xbar * m
    Vx = np.einsum("gij,gj->gi", Vb, xbar)
    with np.errstate(divide="ignore", invalid="ignore"):
        v0 = s2 / np.where(g.nobs > 0, g.nobs, np.nan) + np.einsum("gi,gi->g", xbar, Vx)
    if dense:
        out = np.zeros((G, L + 1, L + 1))
        idx = np.asarray(lags, dtype=np.int64)  # lag j -> dense position j
    else:
        out = np.zeros((G, len(lags) + 1, len(lags) + 1))
        idx = np.arange(1, len(lags) + 1)
    out[:, 0, 0] = v0
    out[:, 0, idx] = -Vx
    out[:, idx, 0] = -Vx
    out[:, idx[:, None], idx[None, :]] = Vb
    return out
