"""Batched weighted least squares with an intercept, for many small regressions at once.

Every regression in a batch has the same number of rows ``n`` and candidate
columns ``k``; rows are switched on and off per regression by a 0/1 weight and
columns by a boolean mask, so regressions of different samples and different
regressor sets run in one vectorised pass (no Python loop over regressions).

Numerics: columns are centred (two-pass weighted means) and scaled to unit
norm before the cross-products are formed, so the Gram matrix is a correlation
matrix; the solution then gets one step of iterative refinement from the exact
residuals. This is how the NIST StRD Longley problem is solved to well beyond
7 significant digits although raw float64 normal equations fail on it.

A masked-out column gets a unit diagonal and zero off-diagonals in the Gram
matrix, so its coefficient is exactly zero and it changes nothing else.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: Smallest eigenvalue of the unit-diagonal Gram matrix below which a
#: regression is treated as collinear (its regressors are ridged slightly).
COLLINEAR_EIG = 1e-11


@dataclass(frozen=True)
class Gram:
    """Centred and scaled cross-products of a batch of regressions.

    Shapes: ``xtx`` (G, k, k), ``xty`` (G, k), ``yty`` (G,), ``xmean`` (G, k),
    ``ymean`` (G,), ``scale`` (G, k), ``nobs`` (G,), ``degenerate`` (G, k)
    marks columns with no variation in the sample, ``collinear`` (G,) marks
    regressions whose regressors are (near) linearly dependent.
    """

    xtx: np.ndarray
    xty: np.ndarray
    yty: np.ndarray
    xmean: np.ndarray
    ymean: np.ndarray
    scale: np.ndarray
    nobs: np.ndarray
    degenerate: np.ndarray
    collinear: np.ndarray


@dataclass(frozen=True)
class OLSResult:
    """Fitted batch. ``beta`` (G, k) is zero in masked-out columns."""

    intercept: np.ndarray
    beta: np.ndarray
    rss: np.ndarray
    nobs: np.ndarray
    n_params: np.ndarray  # regressors used plus the intercept
    resid: np.ndarray  # (G, n), zero where the weight is zero
    cov_beta: np.ndarray  # (G, k, k), s^2 (X'X)^-1 in original units
    var_intercept: np.ndarray
    tss: np.ndarray  # centred total sum of squares of y

    @property
    def df_resid(self) -> np.ndarray:
        return self.nobs - self.n_params

    @property
    def sigma2(self) -> np.ndarray:
        """Residual variance with the degrees-of-freedom adjustment, RSS / (n - k)."""
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(self.df_resid > 0, self.rss / self.df_resid, np.nan)

    @property
    def std_errors(self) -> np.ndarray:
        return np.sqrt(np.maximum(np.diagonal(self.cov_beta, axis1=1, axis2=2), 0.0))

    @property
    def intercept_std_error(self) -> np.ndarray:
        return np.sqrt(np.maximum(self.var_intercept, 0.0))

    @property
    def r_squared(self) -> np.ndarray:
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(self.tss > 0, 1.0 - self.rss / self.tss, np.nan)


def _wmean(a: np.ndarray, w: np.ndarray, n: np.ndarray) -> np.ndarray:
    """Weighted mean over axis 1 of (G, n[, k]) ``a``."""
    if a.ndim == 3:
        s = np.einsum("gtk,gt->gk", a, w)
        return s / n[:, None]
    return np.einsum("gt,gt->g", a, w) / n


def gram(X: np.ndarray, y: np.ndarray, w: np.ndarray) -> Gram:
    """Centred, scaled cross-products of ``X`` (G, n, k) and ``y`` (G, n) under weights ``w`` (G, n).

    Rows with zero weight are ignored (their values may be anything finite).

    >>> X = np.arange(10.0).reshape(1, 10, 1); y = 2 + 3 * X[..., 0]
    >>> g = gram(X, y, np.ones((1, 10)))
    >>> float(np.round(solve(g).beta[0, 0], 12))
    3.0
    """
    X = np.asarray(X, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    w = np.asarray(w, dtype=np.float64)
    nobs = w.sum(axis=1)
    n_safe = np.where(nobs > 0, nobs, 1.0)
    xmean = _wmean(X, w, n_safe)
    ymean = _wmean(y, w, n_safe)
    Xc = (X - xmean[:, None, :]) * w[:, :, None]
    yc = (y - ymean[:, None]) * w
    scale = np.sqrt(np.einsum("gtk,gtk->gk", Xc, Xc))
    ymag = np.sqrt(np.einsum("gt,gt->g", yc, yc))
    # a column is degenerate when it does not vary within the sample
    xabs = np.abs(xmean) + np.sqrt(np.einsum("gtk,gt->gk", X * X, w) / n_safe[:, None])
    degenerate = scale <= 1e-12 * np.maximum(xabs, 1e-300) * np.sqrt(n_safe)[:, None]
    scale = np.where(degenerate, 1.0, scale)
    Xs = Xc / scale[:, None, :]
    xtx = np.matmul(np.swapaxes(Xs, 1, 2), Xs)
    xty = np.einsum("gtk,gt->gk", Xs, yc)
    yty = ymag * ymag
    k = X.shape[2]
    eye = np.eye(k)
    # degenerate columns: unit diagonal, no coupling (their coefficient is 0)
    keep = ~degenerate
    xtx = xtx * (keep[:, :, None] & keep[:, None, :]) + eye * degenerate[:, None, :]
    xty = xty * keep
    if k:
        eig_min = np.linalg.eigvalsh(xtx)[:, 0]
        collinear = eig_min < COLLINEAR_EIG
    else:
        collinear = np.zeros(len(nobs), dtype=bool)
    return Gram(xtx, xty, yty, xmean, ymean, scale, nobs, degenerate, collinear)


def _masked(g: Gram, mask: np.ndarray | None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    G, k = g.xty.shape
    m = ~g.degenerate if mask is None else (np.asarray(mask, dtype=bool) & ~g.degenerate)
    mf = m.astype(np.float64)
    A = g.xtx * (mf[:, :, None] * mf[:, None, :]) + np.eye(k) * (1.0 - mf)[:, None, :]
    if g.collinear.any():
        # a tiny ridge on the used columns of collinear regressions only
        A = A + (np.eye(k) * (1e-9 * mf)[:, None, :]) * g.collinear[:, None, None]
    b = g.xty * mf
    return A, b, m


def solve(g: Gram, mask: np.ndarray | None = None) -> OLSResult:
    """Coefficients and RSS from the Gram matrix alone (fast; for model selection).

    ``mask`` (G, k) bool selects each regression's columns (default: all).
    The residual vector is not formed (``resid`` is empty); use :func:`fit`
    for the exact residuals, refinement and covariance.
    """
    A, b, m = _masked(g, mask)
    bs = np.linalg.solve(A, b[..., None])[..., 0]
    rss = np.maximum(g.yty - np.einsum("gk,gk->g", bs, b), 0.0)
    beta = bs / g.scale
    intercept = g.ymean - np.einsum("gk,gk->g", beta, g.xmean)
    n_params = m.sum(axis=1) + 1
    empty = np.empty((len(rss), 0))
    nan = np.full(len(rss), np.nan)
    return OLSResult(intercept, beta, rss, g.nobs, n_params, empty, np.empty((len(rss), 0, 0)), nan, g.yty)


def fit(X: np.ndarray, y: np.ndarray, w: np.ndarray, mask: np.ndarray | None = None) -> OLSResult:
    """Weighted OLS with intercept for a batch: exact residuals, one refinement step, covariance.

    ``X`` (G, n, k), ``y`` (G, n), ``w`` (G, n) of 0/1, ``mask`` (G, k) bool.

    >>> rng = np.random.default_rng(0); X = rng.normal(size=(3, 50, 2))
    >>> y = 1.0 + X @ np.array([0.5, -2.0]) ; r = fit(X, y, np.ones((3, 50)))
    >>> np.allclose(r.beta, [0.5, -2.0]) and np.allclose(r.intercept, 1.0)
    True
    """
    X = np.asarray(X, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    w = np.asarray(w, dtype=np.float64)
    g = gram(X, y, w)
    A, b, m = _masked(g, mask)
    Ainv = np.linalg.inv(A)
    bs = np.einsum("gij,gj->gi", Ainv, b)
    mf = m.astype(np.float64)
    Xs = (X - g.xmean[:, None, :]) * (w / 1.0)[:, :, None] / g.scale[:, None, :] * mf[:, None, :]
    yc = (y - g.ymean[:, None]) * w
    resid = yc - np.einsum("gtk,gk->gt", Xs, bs)
    # one step of iterative refinement from the exact residuals
    grad = np.einsum("gtk,gt->gk", Xs, resid) * mf
    delta = np.einsum("gij,gj->gi", Ainv, grad)
    bs = bs + delta
    resid = resid - np.einsum("gtk,gk->gt", Xs, delta)
    # the intercept absorbs the (tiny) weighted mean of the residuals
    rbar = _wmean(resid, w, np.where(g.nobs > 0, g.nobs, 1.0))
    resid = (resid - rbar[:, None]) * w
    rss = np.einsum("gt,gt->g", resid, resid)
    beta = bs / g.scale
    intercept = g.ymean + rbar - np.einsum("gk,gk->g", beta, g.xmean)
    n_params = m.sum(axis=1) + 1
    df = g.nobs - n_params
    with np.errstate(divide="ignore", invalid="ignore"):
        s2 = np.where(df > 0, rss / df, np.nan)
    inv_scale = (1.0 / g.scale) * mf
    cov_beta = Ainv * (inv_scale[:, :, None] * inv_scale[:, None, :]) * s2[:, None, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        var_intercept = s2 / g.nobs + np.einsum("gi,gij,gj->g", g.xmean, cov_beta, g.xmean)
    return OLSResult(intercept, beta, rss, g.nobs, n_params, resid, cov_beta, var_intercept, g.yty)
