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

from .arrays import pattern_groups

#: When a batch holds an exactly singular system, regressions whose unit-diagonal
#: Gram matrix has a smallest eigenvalue below this get a tiny ridge (1e-9).
COLLINEAR_EIG = 1e-11


@dataclass(frozen=True)
class Gram:
    """Centred and scaled cross-products of a batch of regressions.

    Shapes: ``xtx`` (G, k, k), ``xty`` (G, k), ``yty`` (G,), ``xmean`` (G, k),
    ``ymean`` (G,), ``scale`` (G, k), ``nobs`` (G,), ``degenerate`` (G, k)
    marks columns with no variation in the sample (they are dropped).
    """

    xtx: np.ndarray
    xty: np.ndarray
    yty: np.ndarray
    xmean: np.ndarray
    ymean: np.ndarray
    scale: np.ndarray
    nobs: np.ndarray
    degenerate: np.ndarray


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
        return np.matmul(w[:, None, :], a)[:, 0, :] / n[:, None]
    return np.matmul(a[:, None, :], w[:, :, None])[:, 0, 0] / n


def _centred(X: np.ndarray, y: np.ndarray, w: np.ndarray):
    """Weighted means, centred (and row-weighted) copies, and the raw cross-products."""
    nobs = w.sum(axis=1)
    n_safe = np.where(nobs > 0, nobs, 1.0)
    xmean = _wmean(X, w, n_safe)
    ymean = _wmean(y, w, n_safe)
    Xc = X - xmean[:, None, :]
    Xc *= w[:, :, None]
    yc = (y - ymean[:, None]) * w
    XcT = np.swapaxes(Xc, 1, 2)
    xtx = np.matmul(XcT, Xc)
    xty = np.matmul(XcT, yc[:, :, None])[:, :, 0]
    yty = np.matmul(yc[:, None, :], yc[:, :, None])[:, 0, 0]
    return nobs, n_safe, xmean, ymean, Xc, yc, xtx, xty, yty


def gram(X: np.ndarray, y: np.ndarray, w: np.ndarray) -> Gram:
    """Centred, scaled cross-products of ``X`` (G, n, k) and ``y`` (G, n) under weights ``w`` (G, n).

    Rows with zero weight are ignored (their values may be anything finite).
    ``X`` may be a transposed view of a (G, k, n) array; that layout is the
    fastest for the cross-products.

    >>> X = np.arange(10.0).reshape(1, 10, 1); y = 2 + 3 * X[..., 0]
    >>> g = gram(X, y, np.ones((1, 10)))
    >>> float(np.round(solve(g).beta[0, 0], 12))
    3.0
    """
    return _gram(X, y, w)[0]


def _gram(X, y, w):
    X = np.asarray(X, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    w = np.asarray(w, dtype=np.float64)
    nobs, n_safe, xmean, ymean, Xc, yc, xtx, xty, yty = _centred(X, y, w)
    return _scaled(xtx, xty, yty, xmean, ymean, nobs), Xc, yc


def gram_from_sums(S: np.ndarray, s: np.ndarray, nobs: np.ndarray) -> Gram:
    """A :class:`Gram` from raw weighted sums of ``z = [x_1..x_k, y]``.

    ``S`` (G, k+1, k+1) is sum w z z', ``s`` (G, k+1) is sum w z. The centred
    cross-products are formed as ``S - s s' / n``: accurate when the data were
    shifted close to their mean beforehand (the caller's duty; AR fits shift
    every series by its own mean), and it lets a caller update the sums for a
    few extra rows instead of passing over all rows again.
    """
    nobs = np.asarray(nobs, dtype=np.float64)
    n_safe = np.where(nobs > 0, nobs, 1.0)
    mean = s / n_safe[:, None]
    C = S - s[:, :, None] * mean[:, None, :]
    k = S.shape[1] - 1
    return _scaled(C[:, :k, :k], C[:, :k, k], np.maximum(C[:, k, k], 0.0), mean[:, :k], mean[:, k], nobs)


def _scaled(xtx, xty, yty, xmean, ymean, nobs) -> Gram:
    k = xtx.shape[1]
    n_safe = np.where(nobs > 0, nobs, 1.0)
    diag = np.diagonal(xtx, axis1=1, axis2=2)
    scale = np.sqrt(np.maximum(diag, 0.0))
    # a column is degenerate when it does not vary within the sample
    rms = np.sqrt(np.maximum(diag, 0.0) / n_safe[:, None] + xmean * xmean)
    degenerate = scale <= 1e-12 * np.maximum(np.abs(xmean) + rms, 1e-300) * np.sqrt(n_safe)[:, None]
    scale = np.where(degenerate, 1.0, scale)
    inv = 1.0 / scale
    xtx = xtx * (inv[:, :, None] * inv[:, None, :])
    xty = xty * inv
    # degenerate columns: unit diagonal, no coupling (their coefficient is 0)
    keep = ~degenerate
    if degenerate.any():
        xtx = xtx * (keep[:, :, None] & keep[:, None, :]) + np.eye(k) * degenerate[:, None, :]
        xty = xty * keep
    return Gram(xtx, xty, yty, xmean, ymean, scale, nobs, degenerate)


def _masked(g: Gram, mask: np.ndarray | None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    G, k = g.xty.shape
    m = ~g.degenerate if mask is None else (np.asarray(mask, dtype=bool) & ~g.degenerate)
    mf = m.astype(np.float64)
    A = g.xtx * (mf[:, :, None] * mf[:, None, :]) + np.eye(k) * (1.0 - mf)[:, None, :]
    b = g.xty * mf
    return A, b, m


def _ridge_collinear(A: np.ndarray, m: np.ndarray) -> np.ndarray:
    """Fallback when a batch holds an exactly singular system: find the regressions whose
    (masked, unit-diagonal) Gram matrix is (near) singular and give only those a tiny ridge."""
    eig_min = np.linalg.eigvalsh(A)[:, 0]
    collinear = eig_min < COLLINEAR_EIG
    k = A.shape[1]
    return A + (np.eye(k) * (1e-9 * m.astype(np.float64))[:, None, :]) * collinear[:, None, None]


def _solve_batch(A: np.ndarray, b: np.ndarray, m: np.ndarray) -> np.ndarray:
    k = A.shape[1]
    if k <= 2 and len(A):
        Ainv = _closed_inverse(A)
        if Ainv is not None:
            return np.matmul(Ainv, b[..., None])[..., 0]
    try:
        return np.linalg.solve(A, b[..., None])[..., 0]
    except np.linalg.LinAlgError:
        return np.linalg.solve(_ridge_collinear(A, m), b[..., None])[..., 0]


def _inv_batch(A: np.ndarray, m: np.ndarray) -> np.ndarray:
    if A.shape[1] <= 2 and len(A):
        Ainv = _closed_inverse(A)
        if Ainv is not None:
            return Ainv
    try:
        return np.linalg.inv(A)
    except np.linalg.LinAlgError:
        return np.linalg.inv(_ridge_collinear(A, m))


def _closed_inverse(A: np.ndarray) -> np.ndarray | None:
    """Inverses of 1 x 1 and 2 x 2 systems in closed form; None when one is exactly singular
    (the caller then takes the factorisation path, which gives collinear systems a ridge)."""
    k = A.shape[1]
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        if k == 0:
            return np.empty_like(A)
        if k == 1:
            if np.any(A[:, 0, 0] == 0):
                return None
            return 1.0 / A
        a, b, c, d = A[:, 0, 0], A[:, 0, 1], A[:, 1, 0], A[:, 1, 1]
        det = a * d - b * c
        if np.any(det == 0):
            return None
        out = np.empty_like(A)
        out[:, 0, 0] = d / det
        out[:, 0, 1] = -b / det
        out[:, 1, 0] = -c / det
        out[:, 1, 1] = a / det
        return out


def _by_pattern(A: np.ndarray, m: np.ndarray, rhs: np.ndarray | None):
    """Solve (``rhs`` given) or invert the masked systems on their used columns only.

    A masked-out column of ``A`` is a unit vector (see :func:`_masked`), so each system
    is block diagonal: its used columns' sub-system, and the identity. Systems are
    grouped by their column pattern and each group's compact sub-systems are
    factorised together (a 9 x 9 inverse costs about 20 times a 1 x 1).
    """
    G, k, _ = A.shape
    if G == 0 or k <= 1:
        return _inv_batch(A, m) if rhs is None else _solve_batch(A, rhs, m)
    groups = pattern_groups(m, max(16, G // 32))
    if groups is None or (len(groups) == 1 and m[0].all()):
        # one full pattern, or so many patterns that the per-group calls would cost more
        return _inv_batch(A, m) if rhs is None else _solve_batch(A, rhs, m)
    if rhs is None:
        out = np.zeros_like(A)
        out[:, np.arange(k), np.arange(k)] = 1.0 - m  # the identity on masked-out columns
    else:
        out = np.where(m, 0.0, rhs)  # masked-out rows of the identity: x = rhs there
    for rows, cols in groups:
        if len(cols) == 0:
            continue
        sub = A[rows[:, None, None], cols[None, :, None], cols[None, None, :]]
        msub = np.ones((len(rows), len(cols)), dtype=bool)
        if rhs is None:
            out[rows[:, None, None], cols[None, :, None], cols[None, None, :]] = _inv_batch(sub, msub)
        else:
            out[rows[:, None], cols[None, :]] = _solve_batch(sub, rhs[rows[:, None], cols[None, :]], msub)
    return out


def _solve(A: np.ndarray, b: np.ndarray, m: np.ndarray) -> np.ndarray:
    return _by_pattern(A, m, b)


def _inv(A: np.ndarray, m: np.ndarray) -> np.ndarray:
    return _by_pattern(A, m, None)


def _from_gram(g: Gram, bs: np.ndarray, b: np.ndarray, m: np.ndarray) -> OLSResult:
    """The Gram-only result (no residual vector) from the scaled solution ``bs`` of the masked system."""
    rss = np.maximum(g.yty - np.einsum("gk,gk->g", bs, b), 0.0)
    beta = bs / g.scale
    intercept = g.ymean - np.einsum("gk,gk->g", beta, g.xmean)
    n_params = m.sum(axis=1) + 1
    empty = np.empty((len(rss), 0))
    nan = np.full(len(rss), np.nan)
    return OLSResult(intercept, beta, rss, g.nobs, n_params, empty, np.empty((len(rss), 0, 0)), nan, g.yty)


def solve(g: Gram, mask: np.ndarray | None = None) -> OLSResult:
    """Coefficients and RSS from the Gram matrix alone (fast; for model selection).

    ``mask`` (G, k) bool selects each regression's columns (default: all).
    The residual vector is not formed (``resid`` is empty); use :func:`fit`
    for the exact residuals, refinement and covariance.
    """
    A, b, m = _masked(g, mask)
    bs = _solve(A, b, m)
    return _from_gram(g, bs, b, m)


def solve_with_inverse(g: Gram, mask: np.ndarray | None = None) -> tuple[OLSResult, np.ndarray]:
    """:func:`solve` through the inverse of the masked, scaled Gram matrix, returned too.

    For callers that need the coefficients' covariance as well (one factorisation
    instead of two): the inverse ``(G, k, k)`` is in the scaled units of ``g``
    (see :func:`arflow.core.forecast.cov_from_gram`).
    """
    A, b, m = _masked(g, mask)
    Ainv = _inv(A, m)
    bs = np.matmul(Ainv, b[:, :, None])[:, :, 0]
    return _from_gram(g, bs, b, m), Ainv


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
    return fit_with_gram(g, X, y, w, mask)


def fit_with_gram(g: Gram, X: np.ndarray, y: np.ndarray, w: np.ndarray, mask: np.ndarray | None = None) -> OLSResult:
    """Finish a fit from its Gram matrix: solve, exact residuals from the data, one refinement step.

    Residuals are formed from the uncentred ``X``: ``e = y - a - X b`` on rows
    with weight, so no centred copy of the design is needed.
    """
    A, b, m = _masked(g, mask)
    Ainv = _inv(A, m)
    bs = np.matmul(Ainv, b[:, :, None])[:, :, 0]
    mf = m.astype(np.float64)
    sc = mf / g.scale  # scaled-coefficient -> original-unit factor (0 when masked)
    beta = bs * sc
    a = g.ymean - np.einsum("gk,gk->g", beta, g.xmean)
    resid = (y - a[:, None] - np.matmul(X, beta[:, :, None])[:, :, 0]) * w
    # one step of iterative refinement from the exact residuals (gradient of the centred problem)
    esum = resid.sum(axis=1)
    grad = (np.matmul(np.swapaxes(X, 1, 2), resid[:, :, None])[:, :, 0] - g.xmean * esum[:, None]) * sc
    delta = np.matmul(Ainv, grad[:, :, None])[:, :, 0]
    dbeta = delta * sc
    beta = beta + dbeta
    da = -np.einsum("gk,gk->g", dbeta, g.xmean)
    resid -= (da[:, None] + np.matmul(X, dbeta[:, :, None])[:, :, 0]) * w
    # the intercept absorbs the (tiny) weighted mean of the residuals
    rbar = _wmean(resid, w, np.where(g.nobs > 0, g.nobs, 1.0))
    resid = (resid - rbar[:, None]) * w
    rss = np.matmul(resid[:, None, :], resid[:, :, None])[:, 0, 0]
    intercept = a + da + rbar
    n_params = m.sum(axis=1) + 1
    df = g.nobs - n_params
    with np.errstate(divide="ignore", invalid="ignore"):
        s2 = np.where(df > 0, rss / df, np.nan)
    cov_beta = Ainv * (sc[:, :, None] * sc[:, None, :]) * s2[:, None, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        var_intercept = s2 / g.nobs + np.einsum("gi,gij,gj->g", g.xmean, cov_beta, g.xmean)
    return OLSResult(intercept, beta, rss, g.nobs, n_params, resid, cov_beta, var_intercept, g.yty)


def nested_rss(g: Gram, columns: np.ndarray) -> np.ndarray:
    """RSS of the nested regressions on ``columns[:1]``, ``columns[:2]``, ... (with intercept).

    One sweep of the augmented Gram matrix (a batched, pivot-guarded Cholesky
    elimination) gives every prefix at once: (G, len(columns)). A column that
    is (numerically) a combination of earlier ones is skipped, leaving the RSS
    unchanged, which is what a least-squares fit on the prefix would give.
    """
    k = g.xty.shape[1]
    G = len(g.yty)
    cols = np.asarray(columns, dtype=np.int64)
    # the swept columns first (in sweep order), then the others, y last: step i then only
    # updates the trailing block i.. (entries of swept columns are never read again), with
    # the same elementwise arithmetic as a full update, so the numbers are the same
    rest = np.setdiff1d(np.arange(k), cols)
    perm = np.concatenate([cols, rest, [k]]).astype(np.int64)
    M = np.empty((G, k + 1, k + 1))
    M[:, :k, :k] = g.xtx
    M[:, :k, k] = g.xty
    M[:, k, :k] = g.xty
    M[:, k, k] = g.yty
    M = M[:, perm[:, None], perm[None, :]]
    out = np.empty((G, len(cols)))
    for i in range(len(cols)):
        piv = M[:, i, i].copy()
        ok = piv > 1e-10  # unit-diagonal scale: relative to the column's own norm
        safe = np.where(ok, piv, 1.0)
        row = M[:, i, i + 1 :] * ok[:, None]
        M[:, i + 1 :, i + 1 :] -= row[:, :, None] * (row[:, None, :] / safe[:, None, None])
        out[:, i] = np.maximum(M[:, -1, -1], 0.0)
    return out
