"""AR(p) with intercept by OLS for every series of a panel at once.

Design: one lag design ``X`` (G, T, K) holds every candidate lag column (1..P
and the seasonal lag s). A model is a column mask over it, a sample is a row
weight, so every candidate order of every series is solved from one set of
cross-products (:mod:`arflow.core.ols`), and the final fit of all series, each
with its own lags and sample, is one batched regression.

Order selection uses a common estimation sample per series (the first
``max(P, s)`` observations are held back for every candidate, so criteria are
comparable); the chosen lags are then refitted on the longest sample they
allow. Criteria follow the Gaussian conditional log-likelihood with
``sigma^2 = RSS / n`` and count ``k + 1`` parameters (the k regression
coefficients including the intercept, plus the variance):
``AIC = -2 llf + 2 (k + 1)``, ``BIC = -2 llf + log(n) (k + 1)``,
``HQIC = -2 llf + 2 log(log(n)) (k + 1)`` (the definitions statsmodels'
``AutoReg`` uses, so selected orders agree with it).

The seasonal candidate adds lag s to the selected lags; it is kept when it
lowers the criterion, or when its coefficient is significant at
``seasonal_alpha`` (t test), i.e. when leaving it out would leave residual
autocorrelation at the seasonal lag.
"""

from __future__ import annotations

from dataclasses import dataclass, fields, replace

import numpy as np
from .distributions import f_sf

from . import ols
from .arrays import nan_to_num

CRITERION_PENALTY = {
    "aic": lambda n: 2.0 * np.ones_like(n),
    "bic": lambda n: np.log(n),
    "hqic": lambda n: 2.0 * np.log(np.log(n)),
}

#: residual degrees of freedom a fit needs beyond its parameters
MIN_RESID_DF = 5


@dataclass(frozen=True)
class ARFit:
    """Fitted AR models of G series (arrays lead with the series axis).

    ``lags`` are the K candidate lag columns; ``lag_mask`` (G, K) marks the
    lags each series uses; ``coef``/``std_err``/``t_stat`` are (G, K) with
    zeros (NaN for t) in unused columns. ``resid`` (G, T) is right-aligned
    like the panel, NaN outside the fitted sample. ``fitted`` is False where a
    series was too short to fit (all its numbers are NaN).
    """

    lags: np.ndarray
    lag_mask: np.ndarray
    intercept: np.ndarray
    intercept_se: np.ndarray
    coef: np.ndarray
    std_err: np.ndarray
    t_stat: np.ndarray
    sigma: np.ndarray
    n_obs: np.ndarray
    r_squared: np.ndarray
    aic: np.ndarray
    bic: np.ndarray
    hqic: np.ndarray
    max_root_modulus: np.ndarray
    stationary: np.ndarray
    mean_level: np.ndarray
    persistence_se: np.ndarray
    resid: np.ndarray
    fitted: np.ndarray
    #: fitted, but the sample could not carry every candidate (orders above
    #: ``candidate_limits``' cap or the seasonal lag were not tried)
    selection_cut: np.ndarray | None = None
    #: a fixed order longer than the series can carry (not fitted, flagged)
    order_unsupported: np.ndarray | None = None

    @property
    def n_lags(self) -> np.ndarray:
        return self.lag_mask.sum(axis=1)

    @property
    def rss(self) -> np.ndarray:
        return self.sigma**2 * (self.n_obs - self.n_lags - 1)

    def phi(self, width: int | None = None) -> np.ndarray:
        """Dense lag polynomial (G, L): ``phi[:, j-1]`` is the coefficient of lag j."""
        L = int(self.lags.max()) if len(self.lags) else 0
        width = max(width or 0, L)
        out = np.zeros((self.coef.shape[0], width))
        if len(self.lags):
            out[:, self.lags - 1] = self.coef
        return out


def lag_design(Y: np.ndarray, lags: np.ndarray, fill: float = np.nan) -> np.ndarray:
    """(G, T, K) matrix whose column j at row t is ``Y[:, t - lags[j]]`` (``fill`` before the start).

    Returned as a transposed view of a (G, K, T) array: the layout in which
    the batched cross-products run fastest.
    """
    G, T = Y.shape
    Xt = np.empty((G, len(lags), T))
    for j, lag in enumerate(lags):
        lag = min(int(lag), T)
        Xt[:, j, :lag] = fill
        Xt[:, j, lag:] = Y[:, : T - lag]
    return Xt.transpose(0, 2, 1)


def shifted_lag_stack(Y: np.ndarray, lags: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(G, K+1, T) stack of the K lag rows and the series itself, each series shifted by its mean.

    The shift keeps raw-sum Gram matrices (:func:`arflow.core.ols.gram_from_sums`)
    accurate and leaves the slope estimates unchanged; missing values become 0
    (callers weight those rows out). Returns the stack and the shifts (G,).
    """
    G, T = Y.shape
    n = np.isfinite(Y).sum(axis=1)
    with np.errstate(invalid="ignore"):
        shift = np.where(n > 0, np.nansum(Y, axis=1) / np.maximum(n, 1), 0.0)
    Yz = nan_to_num(Y - shift[:, None], copy=False)
    K = len(lags)
    ZT = np.empty((G, K + 1, T))
    for j, lag in enumerate(lags):
        lag = min(int(lag), T)
        ZT[:, j, :lag] = 0.0
        ZT[:, j, lag:] = Yz[:, : T - lag]
    ZT[:, K, :] = Yz
    return ZT, shift


def information_criteria(rss: np.ndarray, nobs: np.ndarray, n_params: np.ndarray) -> dict[str, np.ndarray]:
    """AIC, BIC and HQIC of Gaussian regressions (``n_params`` counts the intercept; +1 for the variance)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        n = np.asarray(nobs, dtype=np.float64)
        llf = -0.5 * n * (np.log(2 * np.pi) + np.log(rss / n) + 1.0)
        k = np.asarray(n_params, dtype=np.float64) + 1.0
        return {name: -2.0 * llf + pen(n) * k for name, pen in CRITERION_PENALTY.items()}


def _sample_weights(n: np.ndarray, T: int, hold_back: np.ndarray) -> np.ndarray:
    t = np.arange(T)[None, :]
    start = (T - n + hold_back)[:, None]
    return (t >= start).astype(np.float64)


def candidate_limits(
    n: np.ndarray, order: int | str, max_order: int, seasonal_lag: int | None
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """What each series' sample can carry: ``(p_cap, seasonal_ok, order_unsupported)``, all (G,).

    A candidate with highest lag ``L`` and ``k`` lag coefficients is fitted on
    ``n - L`` rows and needs ``n - L >= k + 1 + MIN_RESID_DF``. With
    ``order="auto"``, ``p_cap`` is the largest order in 0..``max_order`` that
    fits (-1: not even the mean fits) and the seasonal candidate is tried only
    where it fits on top of ``p_cap`` lags. With a fixed order, ``p_cap`` is
    that order and ``order_unsupported`` marks series too short to carry it
    (they are not fitted and are flagged, never refitted at another order).
    """
    n = np.asarray(n, dtype=np.int64)
    auto = order == "auto"
    P = int(max_order if auto else order)
    if auto:
        p_cap = np.clip(np.minimum((n - 1 - MIN_RESID_DF) // 2, n // 8), -1, P)
        unsupported = np.zeros(len(n), dtype=bool)
    else:
        unsupported = n - P < P + 1 + MIN_RESID_DF
        p_cap = np.where(unsupported, -1, P)
    s = int(seasonal_lag) if seasonal_lag else 0
    if s > P:
        seasonal_ok = (p_cap >= 0) & (n - s >= np.maximum(p_cap + 2 + MIN_RESID_DF, 2 * s))
    elif s > 0:
        seasonal_ok = p_cap >= s
    else:
        seasonal_ok = np.zeros(len(n), dtype=bool)
    return p_cap, seasonal_ok, unsupported


def fit_ar(
    Y: np.ndarray,
    *,
    order: int | str = "auto",
    max_order: int = 8,
    criterion: str = "aic",
    seasonal_lag: int | None = None,
    seasonal_alpha: float = 0.05,
    fit_mask: np.ndarray | None = None,
    min_order: int = 0,
) -> ARFit:
    """Fit AR models with intercept to every row of a right-aligned panel ``Y`` (G, T).

    ``order="auto"`` selects p in ``min_order``..max_order (0: the constant mean, white
    noise) by ``criterion`` on a common sample; a series too short for every
    candidate selects among the orders its sample can carry (and the seasonal
    candidate only where it fits), and is marked in ``selection_cut``. An
    integer fixes p; a series too short for it is not fitted and is marked in
    ``order_unsupported`` (never refitted at another order).
    ``seasonal_lag`` adds the seasonal candidate. ``fit_mask`` (G,) bool skips
    series (they come back unfitted).

    >>> rng = np.random.default_rng(0); e = rng.normal(size=(2, 400)); y = np.zeros((2, 400))
    >>> for t in range(1, 400): y[:, t] = 1.0 + 0.6 * y[:, t - 1] + e[:, t]
    >>> f = fit_ar(y, order=1); bool(np.all(np.abs(f.coef[:, 0] - 0.6) < 0.1))
    True
    """
    Y = np.asarray(Y, dtype=np.float64)
    G, T = Y.shape
    n = (~np.isnan(Y)).sum(axis=1)
    auto = order == "auto"
    P = int(max_order if auto else order)
    lag_list = list(range(1, P + 1))
    s = int(seasonal_lag) if seasonal_lag else None
    if s is not None and s not in lag_list:
        lag_list.append(s)
    lags = np.array(sorted(lag_list), dtype=np.int64)
    K = len(lags)
    ZT, shift = shifted_lag_stack(Y, lags)
    Xz = ZT[:, :K, :].transpose(0, 2, 1)

    want = np.ones(G, dtype=bool) if fit_mask is None else np.asarray(fit_mask, dtype=bool)
    p_cap, s_ok, unsupported = candidate_limits(n, order, max_order, s)
    unsupported = unsupported & want
    has_s = s is not None and s > P
    s_ok = s_ok & want
    can_fit = want & (p_cap >= 0)
    # the common sample holds back each series' largest candidate lag
    hold_g = np.where(can_fit, np.maximum(np.maximum(p_cap, 0), np.where(s_ok & has_s, s, 0)), 0)
    base_cols = lags <= P
    seasonal_col = (lags == s) if s is not None else np.zeros(K, dtype=bool)
    # raw sums over the common sample (every candidate lag available): one pass
    w_common = _sample_weights(n, T, hold_g) * can_fit[:, None]
    ZTw = ZT * w_common[:, None, :]
    S = np.matmul(ZTw, np.swapaxes(ZT, 1, 2))
    ssum = ZTw.sum(axis=2)
    ncommon = w_common.sum(axis=1)
    del ZTw
    g = ols.gram_from_sums(S, ssum, ncommon)
    # ---- candidate lag sets -------------------------------------------------------
    if auto:
        # every order 0..P from one sweep of the common-sample Gram matrix
        rss = np.concatenate([g.yty[:, None], ols.nested_rss(g, np.flatnonzero(base_cols))], axis=1)
        orders = np.arange(0, P + 1)
        ic = information_criteria(rss, g.nobs[:, None], (orders + 1)[None, :])[criterion]
        ic = np.where((orders[None, :] <= p_cap[:, None]) & (orders[None, :] >= min_order), ic, np.inf)
        ic = np.where(np.isnan(ic), np.inf, ic)
        best_p = np.argmin(ic, axis=1)  # ties go to the smaller order
        best_p = np.where(p_cap >= min_order, best_p, 0)
        can_fit = can_fit & (p_cap >= min_order)
        chosen = lags[None, :] <= best_p[:, None]
    else:
        chosen = np.broadcast_to(base_cols, (G, K)).copy()
    chosen = chosen & base_cols[None, :] & can_fit[:, None]
    if s is not None and s > 0:
        add = chosen | seasonal_col[None, :]
        differs = ~np.all(add == chosen, axis=1)
        with np.errstate(divide="ignore", invalid="ignore"):
            ra = ols.solve(g, chosen)
            rb = ols.solve(g, add)
            ica = information_criteria(ra.rss, g.nobs, ra.n_params)[criterion]
            icb = information_criteria(rb.rss, g.nobs, rb.n_params)[criterion]
            df_b = g.nobs - rb.n_params
            fstat = (ra.rss - rb.rss) / (rb.rss / df_b)
            p_add = f_sf(fstat, 1, df_b)
        keep_s = differs & s_ok & can_fit & ((icb < ica) | (p_add < seasonal_alpha))
        chosen = np.where(keep_s[:, None], add, chosen)
    maxlag = np.max(np.where(chosen, lags[None, :], 0), axis=1)
    fittable = can_fit & (n - maxlag >= chosen.sum(axis=1) + 1 + MIN_RESID_DF)
    # fitted on fewer candidates than configured: orders above the cap, or no seasonal lag
    cut = fittable & (((p_cap < P) & auto) | (has_s & ~s_ok))
    # the chosen lags are refitted on their own longer sample: add the rows
    # between each series' own hold-back and the common one to the sums
    H = int(hold_g.max(initial=0))
    if H > 0:
        r = np.arange(H)[None, :]
        rows = (T - n)[:, None] + r
        wx = ((r >= maxlag[:, None]) & (r < hold_g[:, None]) & (rows <= T - 1) & (rows >= 0) & fittable[:, None])
        wx = wx.astype(np.float64)
        Zx = np.take_along_axis(ZT, np.clip(rows, 0, T - 1)[:, None, :], axis=2)
        Zxw = Zx * wx[:, None, :]
        S = S + np.matmul(Zxw, np.swapaxes(Zx, 1, 2))
        ssum = ssum + Zxw.sum(axis=2)
        ncommon = ncommon + wx.sum(axis=1)
    keepf = fittable.astype(np.float64)
    gfit = ols.gram_from_sums(S * keepf[:, None, None], ssum * keepf[:, None], ncommon * keepf)
    w_fit = _sample_weights(n, T, maxlag) * fittable[:, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        res = ols.fit_with_gram(gfit, Xz, ZT[:, K, :], w_fit, chosen)
    out = finish_fit(lags, chosen, res, w_fit, Y, fittable, shift, gfit.xmean)
    return replace(out, selection_cut=cut, order_unsupported=unsupported)


def max_root_modulus(phi: np.ndarray, maxlag: np.ndarray) -> np.ndarray:
    """Largest modulus of the companion-matrix eigenvalues of each AR polynomial.

    ``phi`` (G, L) holds lag j in column j-1; ``maxlag`` (G,) the highest lag
    used. Series are bucketed by their highest lag (a loop over at most L
    sizes, never over series) so an AR(1) does not pay for a 12 x 12 matrix.
    Covariance stationary iff the result is below 1 (every root of
    1 - phi_1 z - ... - phi_p z^p outside the unit circle; common practice).
    """
    out = np.zeros(phi.shape[0])
    for L in np.unique(maxlag):
        idx = np.flatnonzero(maxlag == L)
        L = int(L)
        if L == 1:
            out[idx] = np.abs(phi[idx, 0])
            continue
        # closed forms where the polynomial allows (about 1e-16 from the eigenvalues):
        # z^L = phi_L alone (a pure seasonal model): every root has modulus |phi_L|^(1/L);
        # z^2 = phi_1 z + phi_2: real roots (phi_1 +- sqrt(D)) / 2 with D = phi_1^2 + 4 phi_2,
        # else a complex pair of modulus sqrt(-phi_2) (the roots' product is -phi_2)
        sub = phi[idx, :L]
        finite = np.isfinite(sub).all(axis=1)
        pure = finite & ~np.any(sub[:, : L - 1] != 0, axis=1)
        if pure.any():
            out[idx[pure]] = np.abs(sub[pure, L - 1]) ** (1.0 / L)
        todo = ~pure
        if L == 2:
            quad = todo & finite
            a1, a2 = sub[quad, 0], sub[quad, 1]
            disc = a1 * a1 + 4.0 * a2
            with np.errstate(invalid="ignore"):
                out[idx[quad]] = np.where(disc >= 0, 0.5 * (np.abs(a1) + np.sqrt(np.maximum(disc, 0.0))),
                                          np.sqrt(np.maximum(-a2, 0.0)))
            todo = todo & ~quad
        if not todo.any():
            continue
        idx = idx[todo]
        comp = np.zeros((len(idx), L, L))
        comp[:, 0, :] = phi[idx, :L]
        comp[:, np.arange(1, L), np.arange(L - 1)] = 1.0
        out[idx] = np.abs(np.linalg.eigvals(comp)).max(axis=1)
    return out


def finish_fit(lags, mask, res: ols.OLSResult, w, Y, fittable, shift, xmean) -> ARFit:
    G = Y.shape[0]
    # undo the shift y = x + m: b0 = a + m (1 - sum b), and
    # Var(b0) = Var(a) + m^2 1'V1 + 2 m 1'V xbar  (Cov(a, b) = -V xbar)
    V = res.cov_beta
    ones_V = V.sum(axis=1)
    intercept = res.intercept + shift * (1.0 - res.beta.sum(axis=1))
    var_b0 = res.var_intercept + shift**2 * ones_V.sum(axis=1) + 2.0 * shift * np.einsum("gk,gk->g", ones_V, xmean)
    nan = np.where(fittable, 1.0, np.nan)
    coef = res.beta * mask
    se = res.std_errors * mask
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.where(mask, coef / se, np.nan)
    sigma = np.sqrt(res.sigma2) * nan
    ic = information_criteria(res.rss, res.nobs, res.n_params)
    resid = np.where(w > 0, res.resid, np.nan)
    L = int(lags.max())
    phi = np.zeros((G, L))
    phi[:, lags - 1] = np.where(fittable[:, None], coef, 0.0)
    max_root = max_root_modulus(phi, np.where(mask.any(axis=1), np.max(np.where(mask, lags[None, :], 0), axis=1), 1)) * nan
    stationary = fittable & (max_root < 1.0 - 1e-8)
    with np.errstate(divide="ignore", invalid="ignore"):
        level = np.where(stationary, intercept / (1.0 - coef.sum(axis=1)), np.nan)
    return ARFit(
        lags=lags,
        lag_mask=mask & fittable[:, None],
        intercept=intercept * nan,
        intercept_se=np.sqrt(np.maximum(var_b0, 0.0)) * nan,
        coef=coef * nan[:, None],
        std_err=se * nan[:, None],
        t_stat=t * nan[:, None],
        sigma=sigma,
        n_obs=np.where(fittable, res.nobs, 0).astype(np.int64),
        r_squared=res.r_squared * nan,
        aic=ic["aic"] * nan,
        bic=ic["bic"] * nan,
        hqic=ic["hqic"] * nan,
        max_root_modulus=max_root,
        stationary=stationary,
        mean_level=level,
        persistence_se=np.sqrt(np.maximum(res.cov_beta.sum(axis=(1, 2)), 0.0)) * nan,
        resid=resid,
        fitted=fittable,
        selection_cut=np.zeros(G, dtype=bool),
        order_unsupported=np.zeros(G, dtype=bool),
    )


def splice(base: ARFit, other: ARFit, idx: np.ndarray) -> ARFit:
    """``base`` with the series at ``idx`` replaced by ``other`` (fitted on those series only).

    Lag columns and residual widths are unified to the wider of the two.
    """
    lags = np.union1d(base.lags, other.lags)
    out = {}
    for f in fields(ARFit):
        a, b = getattr(base, f.name), getattr(other, f.name)
        if f.name == "lags":
            out[f.name] = lags
            continue
        if f.name in ("lag_mask", "coef", "std_err", "t_stat"):
            a, b = _widen_lags(a, base.lags, lags, f.name), _widen_lags(b, other.lags, lags, f.name)
        elif f.name == "resid":
            W = max(a.shape[1], b.shape[1])
            a, b = _left_pad(a, W), _left_pad(b, W)
        a = a.copy()
        a[idx] = b
        out[f.name] = a
    return ARFit(**out)


def _widen_lags(a: np.ndarray, have: np.ndarray, want: np.ndarray, name: str) -> np.ndarray:
    if np.array_equal(have, want):
        return a
    fill = False if name == "lag_mask" else (np.nan if name == "t_stat" else 0.0)
    out = np.full((a.shape[0], len(want)), fill, dtype=a.dtype)
    out[:, np.searchsorted(want, have)] = a
    return out


def _left_pad(a: np.ndarray, W: int) -> np.ndarray:
    if a.shape[1] == W:
        return a
    return np.concatenate([np.full((a.shape[0], W - a.shape[1]), np.nan), a], axis=1)


def take(f: ARFit, idx: np.ndarray) -> ARFit:
    """The fits of the series at ``idx``."""
    return replace(f, **{x.name: getattr(f, x.name)[idx] for x in fields(ARFit) if x.name != "lags"})
