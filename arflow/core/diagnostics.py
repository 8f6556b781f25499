"""Batched residual diagnostics: autocorrelation, Ljung-Box, Breusch-Godfrey, ARCH LM, multiplicity.

Layout: residual panels are (G, T) float64, **right-aligned** -- series ``g``
occupies its last ``n[g]`` columns and earlier entries are NaN (no NaN inside a
series' run). A 1-D input is treated as one series (G = 1). Every function is
vectorised over G (Python loops run only over lags) and gives for each series
exactly the numbers it would give for that series alone.

Tests return :class:`TestResult` with (G,) ``statistic``, ``pvalue`` and
``df``; a series too short for a test gets NaN, never an exception.

Every regression goes through :mod:`arflow.core.ols` (one least-squares
mechanism for the whole library). Reference implementation used in the tests:
statsmodels 0.15 (``acf``, ``acorr_ljungbox``, ``acorr_breusch_godfrey``,
``het_arch``, ``multipletests``); statsmodels is not imported here.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from .arrays import pattern_groups
from .distributions import chi2_sf, t_sf

from arflow.core import ols

__all__ = [
    "AcfResult",
    "TestResult",
    "arch_lm",
    "benjamini_hochberg",
    "breusch_godfrey",
    "holm",
    "ljung_box",
    "residual_acf",
    "valid_mask",
]


@dataclass(frozen=True)
class TestResult:
    """Result of a batched test: (G,) arrays ``statistic``, ``pvalue`` and ``df``."""

    __test__ = False  # not a pytest test class

    statistic: np.ndarray
    pvalue: np.ndarray
    df: np.ndarray


@dataclass(frozen=True)
class AcfResult:
    """Residual autocorrelations at lags 1..K.

    ``acf``, ``t_stat``, ``pvalue`` are (G, K) (column ``j`` is lag ``j + 1``);
    ``nobs`` is (G,). Entries at lags ``k >= n`` are NaN.
    """

    acf: np.ndarray
    t_stat: np.ndarray
    pvalue: np.ndarray
    nobs: np.ndarray


# ----------------------------------------------------------------------------- helpers


def as_panel(a: np.ndarray, name: str = "resid") -> np.ndarray:
    a = np.asarray(a, dtype=np.float64)
    if a.ndim == 1:
        a = a[None, :]
    if a.ndim != 2:
        raise ValueError(f"{name} must be a (G, T) panel or a 1-D series, got shape {a.shape}")
    return a


def valid_mask(a: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Validity mask (G, T) and lengths ``n`` (G,) of a right-aligned panel.

    Raises ``ValueError`` if a series has a NaN inside its run (the layout
    contract is violated); a short or empty series is fine.
    """
    a = as_panel(a)
    valid = ~np.isnan(a)
    if a.shape[1] > 1 and np.any(valid[:, :-1] & ~valid[:, 1:]):
        raise ValueError("panel is not right-aligned: NaN inside a series (only leading NaN allowed)")
    return valid, valid.sum(axis=1)


def _demeaned(a: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Zero-filled, per-series demeaned copy, the mask and the lengths."""
    valid, n = valid_mask(a)
    z = np.where(valid, a, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = z.sum(axis=1) / np.where(n > 0, n, 1)
    z = np.where(valid, z - mean[:, None], 0.0)
    return z, valid, n


def _shift(z: np.ndarray, k: int) -> np.ndarray:
    """``z`` delayed by ``k`` columns with zeros shifted in: out[:, t] = z[:, t - k]."""
    out = np.zeros_like(z)
    if k < z.shape[1]:
        out[:, k:] = z[:, : z.shape[1] - k]
    return out


def _chi2_sf(stat: np.ndarray, df: np.ndarray) -> np.ndarray:
    with np.errstate(invalid="ignore"):
        p = chi2_sf(stat, df)
    return np.where(np.isfinite(stat) & (df > 0), p, np.nan)


# ----------------------------------------------------------------------------- ACF / Ljung-Box


def residual_acf(resid: np.ndarray, max_lag: int) -> AcfResult:
    """Residual autocorrelations r_1..r_K with t statistics and p-values, batched.

    ``r_k = sum_{t>k} e_t e_{t-k} / sum_t e_t^2`` on the demeaned residuals,
    denominator over all ``n`` observations (Ljung & Box 1978; identical to
    statsmodels ``acf(x, adjusted=False, fft=False)``).

    ``t_stat = r_k * sqrt(n)`` uses the common-practice standard error
    ``1/sqrt(n)`` of a residual autocorrelation; ``pvalue`` is two-tailed
    Student t with ``n - 2`` degrees of freedom. Lags ``k >= n`` and series
    with ``n < 3`` or constant residuals give NaN.
    """
    max_lag = int(max_lag)
    if max_lag < 1:
        raise ValueError("max_lag must be >= 1")
    z, _, n = _demeaned(resid)
    G = z.shape[0]
    denom = np.einsum("gt,gt->g", z, z)
    acf = np.full((G, max_lag), np.nan)
    ok = (n >= 2) & (denom > 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        for k in range(1, max_lag + 1):
            if k >= z.shape[1]:
                break
            num = np.einsum("gt,gt->g", z[:, k:], z[:, :-k])
            acf[:, k - 1] = np.where(ok & (k < n), num / np.where(denom > 0, denom, 1.0), np.nan)
        t_stat = acf * np.sqrt(n)[:, None]
        dft = (n - 2).astype(np.float64)[:, None]
        pvalue = np.where(dft > 0, 2.0 * t_sf(np.abs(t_stat), np.where(dft > 0, dft, 1.0)), np.nan)
    pvalue = np.where(np.isnan(t_stat), np.nan, pvalue)
    return AcfResult(acf, t_stat, pvalue, n)


def ljung_box(resid_or_acf: np.ndarray | AcfResult, lags: int, model_df: int | np.ndarray = 0) -> TestResult:
    """Ljung-Box portmanteau test at lag ``lags``, batched.

    ``Q = n (n + 2) sum_{k=1}^{lags} r_k^2 / (n - k)`` (Ljung & Box 1978),
    referred to chi-square with ``lags - model_df`` degrees of freedom, the
    statsmodels ``acorr_ljungbox(x, lags=[lags], model_df=p)`` convention.
    ``model_df`` (int or (G,) array) is the number of fitted ARMA coefficients
    of each series (for AR(p) residuals: p, the lag coefficients; the
    intercept is not counted). Unlike statsmodels (NaN p-value), the degrees
    of freedom are floored at 1 when ``model_df >= lags``.

    Input is a residual panel or an :class:`AcfResult` with at least ``lags``
    columns. Series with ``n <= lags`` (or too short for the ACF) give NaN.
    """
    lags = int(lags)
    if lags < 1:
        raise ValueError("lags must be >= 1")
    if isinstance(resid_or_acf, AcfResult):
        if resid_or_acf.acf.shape[1] < lags:
            raise ValueError(f"AcfResult has {resid_or_acf.acf.shape[1]} lags, need {lags}")
        r = resid_or_acf.acf[:, :lags]
        n = np.asarray(resid_or_acf.nobs)
    else:
        a = residual_acf(resid_or_acf, lags)
        r, n = a.acf, a.nobs
    nf = n.astype(np.float64)
    k = np.arange(1, lags + 1, dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        q = nf * (nf + 2.0) * np.sum(r * r / (nf[:, None] - k), axis=1)
    q = np.where(n > lags, q, np.nan)
    md = np.broadcast_to(np.asarray(model_df, dtype=np.float64), n.shape)
    df = np.maximum(lags - md, 1.0)
    return TestResult(q, _chi2_sf(q, df), df)


# ----------------------------------------------------------------------------- LM tests


def breusch_godfrey(
    resid: np.ndarray,
    X: np.ndarray | None,
    mask: np.ndarray | None,
    nlags: int,
    lag_set: np.ndarray | None = None,
    lag_use: np.ndarray | None = None,
) -> TestResult:
    """Breusch-Godfrey LM test for residual autocorrelation up to lag ``nlags``, batched.

    Auxiliary regression (Breusch 1978, Godfrey 1978; Greene 12.7.1) of the
    residuals ``e_t`` on a constant, the original regressors ``X_t`` (the
    columns selected by ``mask``) and ``e_{t-1}, ..., e_{t-nlags}``, over the
    **full** residual sample of ``n`` rows; lagged residuals before the sample
    start are filled with **zeros**. ``LM = n R^2`` (centred R^2) ~ chi2(nlags).
    This is exactly statsmodels ``acorr_breusch_godfrey(res, nlags)``.

    ``resid`` (G, T) right-aligned; ``X`` (G, T, k) row-aligned with
    ``resid`` (only rows where ``resid`` is valid are read; may be None for
    no regressors beyond the constant); ``mask`` (G, k) bool or None (all).
    Series with ``n <= 1 + k_used + nlags`` give NaN.

    ``lag_set`` (e.g. 1..12 and 52) replaces ``1..nlags`` by any set of
    lagged residuals; the statistic is then chi-square with ``len(lag_set)``
    degrees of freedom (the model's own regressors are in the auxiliary
    regression, so no degrees of freedom are subtracted for them).
    ``lag_use`` (G, len(lag_set)) bool drops lagged residuals per series (the
    degrees of freedom count the ones used).
    """
    nlags = int(nlags)
    if nlags < 1:
        raise ValueError("nlags must be >= 1")
    use = np.arange(1, nlags + 1) if lag_set is None else np.asarray(lag_set, dtype=np.int64)
    nlags = len(use)
    e = as_panel(resid)
    valid, n = valid_mask(e)
    G, T = e.shape
    z = np.where(valid, e, 0.0)
    if X is None:
        Xo = np.zeros((G, T, 0))
        m = np.zeros((G, 0), dtype=bool)
    else:
        Xo = np.asarray(X, dtype=np.float64)
        if Xo.ndim == 2 and G == 1:
            Xo = Xo[None]
        if Xo.shape[:2] != (G, T):
            raise ValueError(f"X shape {Xo.shape} does not match resid shape {(G, T)}")
        Xo = np.where(valid[:, :, None], Xo, 0.0)
        m = np.ones(Xo.shape[::2], dtype=bool) if mask is None else np.asarray(mask, dtype=bool)
        m = np.broadcast_to(m, (G, Xo.shape[2]))
        # zero masked-out columns: their values never enter the fit
        Xo = Xo * m[:, None, :]
    lagcols = np.stack([_shift(z, int(j)) for j in use], axis=2)
    lu = np.ones((G, nlags), dtype=bool) if lag_use is None else np.asarray(lag_use, dtype=bool)
    lagcols = lagcols * lu[:, None, :]
    Xa = np.concatenate([Xo, lagcols], axis=2)
    ma = np.concatenate([m, lu], axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        res = ols.fit(Xa, z, valid.astype(np.float64), ma)
        r2 = res.r_squared
        lm = n * r2
    k_used = m.sum(axis=1)
    n_lag = lu.sum(axis=1)
    lm = np.where((n > 1 + k_used + n_lag) & (n_lag > 0), lm, np.nan)
    df = n_lag.astype(np.float64)
    return TestResult(lm, _chi2_sf(lm, df), df)


def arch_lm(resid: np.ndarray, nlags: int) -> TestResult:
    """Engle (1982) ARCH LM test with ``nlags`` lags, batched.

    Regress ``e_t^2`` on a constant and ``e_{t-1}^2, ..., e_{t-q}^2`` over the
    ``T' = n - q`` rows that have all lags (residuals are *not* demeaned);
    ``LM = T' R^2`` ~ chi2(q). Same as statsmodels ``het_arch(e, nlags=q)``
    (``ddof=0``). Series with ``n - q <= q + 1`` give NaN.
    """
    q = int(nlags)
    if q < 1:
        raise ValueError("nlags must be >= 1")
    e = as_panel(resid)
    valid, n = valid_mask(e)
    G, T = e.shape
    s = np.where(valid, e, 0.0) ** 2
    # row t is used when e_{t-q} exists: t >= T - n + q
    first = T - n + q
    w = (np.arange(T)[None, :] >= first[:, None]).astype(np.float64)
    Xa = np.stack([_shift(s, j) for j in range(1, q + 1)], axis=2)
    with np.errstate(invalid="ignore", divide="ignore"):
        res = ols.fit(Xa, s, w)
        rows = n - q
        lm = rows * res.r_squared
    lm = np.where(rows > q + 1, lm, np.nan)
    df = np.full(G, float(q))
    return TestResult(lm, _chi2_sf(lm, df), df)


# ----------------------------------------------------------------------------- multiplicity


def holm(pvalues: np.ndarray, axis: int = -1) -> np.ndarray:
    """Holm (1979) step-down adjusted p-values along ``axis`` (default: across lags of (G, K)).

    Sorted ascending, ``p~_(j) = max_{i<=j} min(1, (m - i + 1) p_(i))``; NaN
    entries stay NaN and are not counted in ``m``. Matches statsmodels
    ``multipletests(p, method="holm")[1]`` on NaN-free input.
    """
    return _adjust(pvalues, axis, "holm")


def benjamini_hochberg(pvalues: np.ndarray, axis: int = 0) -> np.ndarray:
    """Benjamini & Hochberg (1995) FDR-adjusted p-values along ``axis`` (default: across series).

    ``p~_(j) = min_{i>=j} min(1, m p_(i) / i)``; NaN entries stay NaN and do
    not count in ``m``. Matches statsmodels ``multipletests(p,
    method="fdr_bh")[1]`` on NaN-free input.
    """
    return _adjust(pvalues, axis, "bh")


def _adjust(pvalues: np.ndarray, axis: int, method: str) -> np.ndarray:
    p = np.asarray(pvalues, dtype=np.float64)
    if p.ndim == 0:
        p = p[None]
        scalar = True
    else:
        scalar = False
    pm = np.moveaxis(p, axis, -1)
    order = np.argsort(pm, axis=-1, kind="stable")  # NaN sort last
    ps = np.take_along_axis(pm, order, axis=-1)
    m = (~np.isnan(pm)).sum(axis=-1, keepdims=True).astype(np.float64)
    j = np.arange(1, pm.shape[-1] + 1, dtype=np.float64)
    if method == "holm":
        adj = np.maximum.accumulate(ps * (m - j + 1.0), axis=-1)  # NaN only at the tail
    else:
        raw = np.where(np.isnan(ps), np.inf, ps * m / j)
        adj = np.flip(np.minimum.accumulate(np.flip(raw, -1), axis=-1), -1)
        adj = np.where(np.isnan(ps), np.nan, adj)
    adj = np.minimum(adj, 1.0)
    out = np.empty_like(pm)
    np.put_along_axis(out, order, adj, axis=-1)
    out = np.moveaxis(out, -1, axis)
    return out[0] if scalar else out


# ----------------------------------------------------------------------------- subset AR models


def acf_at(resid: np.ndarray, lags: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Residual autocorrelations at the given lags (any set, e.g. 1..12 and 52): ``(r (G, m), n (G,))``.

    Same definition as :func:`residual_acf` (demeaned, denominator over all
    ``n``); NaN where a lag is not below ``n``.
    """
    z, _, n = _demeaned(resid)
    G, T = z.shape
    denom = np.einsum("gt,gt->g", z, z)
    lags = np.asarray(lags, dtype=np.int64)
    r = np.full((G, len(lags)), np.nan)
    ok = (n >= 2) & (denom > 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        for j, k in enumerate(lags):
            k = int(k)
            if k < 1 or k >= T:
                continue
            num = np.einsum("gt,gt->g", z[:, k:], z[:, :-k])
            r[:, j] = np.where(ok & (k < n), num / np.where(denom > 0, denom, 1.0), np.nan)
    return r, n


def ar_autocovariance(phi: np.ndarray) -> np.ndarray:
    """Autocovariances gamma(0..L) (G, L+1) of stationary AR processes with unit innovation variance.

    Solves the Yule-Walker equations ``gamma(h) - sum_i phi_i gamma(|h - i|) = [h == 0]``,
    h = 0..L (Brockwell & Davis 1991, Section 3.3). ``phi`` (G, L) holds lag j in column j-1.
    """
    phi = np.asarray(phi, dtype=np.float64)
    G, L = phi.shape
    out = np.zeros((G, L + 1))
    # each series' system closes on gamma(0..q), q its highest nonzero lag; the rest follow
    # from gamma(h) = sum_i phi_i gamma(h - i) (the remaining Yule-Walker rows)
    nz = phi != 0
    q_of = np.where(nz.any(axis=1), L - np.argmax(nz[:, ::-1], axis=1), 0)
    for q in np.unique(q_of):
        rows = np.flatnonzero(q_of == q)
        q = int(q)
        gq = _yule_walker(phi[rows, :q])
        out[rows, : q + 1] = gq
        with np.errstate(invalid="ignore", over="ignore"):
            for h in range(q + 1, L + 1):
                # gamma(h - 1), ..., gamma(h - q)
                past = out[rows, h - q : h][:, ::-1]
                out[rows, h] = np.einsum("gi,gi->g", phi[rows, :q], past)
    return out


def _yule_walker(phi: np.ndarray) -> np.ndarray:
    """gamma(0..L) (G, L+1) from the Yule-Walker equations of AR(L) polynomials ``phi`` (G, L)."""
    G, L = phi.shape
    if L == 0:
        out = np.zeros((G, 1))
        out[:, 0] = 1.0
        return out
    h = np.arange(L + 1)
    B = np.broadcast_to(np.eye(L + 1), (G, L + 1, L + 1)).copy()
    for i in range(1, L + 1):
        col = np.abs(h - i)  # one entry per row h: no repeated positions within a lag
        B[:, h, col] -= phi[:, i - 1 : i]
    rhs = np.zeros((G, L + 1))
    rhs[:, 0] = 1.0
    with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
        try:
            return np.linalg.solve(B, rhs[..., None])[..., 0]
        except np.linalg.LinAlgError:
            out = np.full((G, L + 1), np.nan)
            for g in range(G):  # only reached when some system is singular (a unit root)
                try:
                    out[g] = np.linalg.solve(B[g], rhs[g])
                except np.linalg.LinAlgError:
                    pass
            return out


def ar_residual_acf_cov(
    coef: np.ndarray, lag_mask: np.ndarray, model_lags: np.ndarray, tested: np.ndarray
) -> np.ndarray:
    """Asymptotic covariance (times n) of the residual autocorrelations at lags ``tested`` of fitted AR models.

    For residuals of an AR model with (possibly subset) lags ``J``, fitted by
    least squares, ``r_hat ~ (I - X (X'X)^{-1} X') r`` where ``r`` are the
    autocorrelations of the true innovations and ``X[k, j] = psi_{k - l_j}``
    (psi the weights of ``1 / phi(B)``, zero at negative indices) for lags
    ``k = 1, 2, ...``: Box & Pierce (1970), Section 3; McLeod (1978), JRSS B 40,
    296-302. Each model lag ``l_j`` imposes one linear constraint
    ``sum_k psi_{k - l_j} r_k = 0``; only the part of it that falls on the
    tested lags reduces the tested autocorrelations' variance. Returns
    ``A = I_m - X_L (X'X)^{-1} X_L'`` (G, m, m), ``X_L`` the rows of the
    tested lags; ``X'X`` summed over all k is the AR autocovariance matrix
    ``gamma(l_i - l_j)`` (unit innovation variance; :func:`ar_autocovariance`).
    Non-stationary fits get NaN.

    ``coef`` (G, K) and ``lag_mask`` (G, K) as in :class:`arflow.core.autoreg.ARFit`
    (``model_lags`` its K candidate lags).
    """
    coef = np.nan_to_num(np.asarray(coef, dtype=np.float64))
    mask = np.asarray(lag_mask, dtype=bool)
    model_lags = np.asarray(model_lags, dtype=np.int64)
    tested = np.asarray(tested, dtype=np.int64)
    G, K = coef.shape
    m = len(tested)
    if K == 0 or not mask.any():
        return np.broadcast_to(np.eye(m), (G, m, m)).copy()
    L = int(model_lags.max())
    phi = np.zeros((G, L))
    phi[:, model_lags - 1] = coef * mask
    gamma = ar_autocovariance(phi)  # (G, L+1)
    diff = np.abs(model_lags[:, None] - model_lags[None, :])
    XtX = gamma[:, diff] * (mask[:, :, None] & mask[:, None, :]) + np.eye(K)[None] * (~mask)[:, None, :]
    # psi_0 .. psi_{max tested lag}
    H = int(tested.max())
    psi = np.zeros((G, H + 1))
    psi[:, 0] = 1.0
    for j in range(1, H + 1):
        q = min(j, L)
        psi[:, j] = np.einsum("gi,gi->g", phi[:, :q], psi[:, j - 1 :: -1][:, :q])
    idx = tested[:, None] - model_lags[None, :]  # (m, K)
    XL = np.where(idx[None] >= 0, psi[:, np.clip(idx, 0, H)], 0.0) * mask[:, None, :]
    with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
        sol = _solve_by_pattern(XtX, np.swapaxes(XL, 1, 2), mask)  # (G, K, m)
        A = np.eye(m)[None] - np.einsum("gmk,gkn->gmn", XL, sol)
    ev = np.diagonal(A, axis1=1, axis2=2)
    bad = ~(gamma[:, 0] > 0) | ~np.isfinite(A).all(axis=(1, 2)) | np.any(ev < -1e-8, axis=1) | np.any(ev > 1 + 1e-8, axis=1)
    return np.where(bad[:, None, None], np.nan, A)


def _solve_by_pattern(XtX: np.ndarray, R: np.ndarray, mask: np.ndarray) -> np.ndarray:
    """``XtX^-1 R`` (G, K, m) where ``XtX`` is the identity outside each series' lags ``mask`` (G, K)
    and ``R`` is zero there: each group of series with the same lags is solved on those lags only
    (a pseudo-inverse for a group holding a singular system)."""
    G, K, m = R.shape
    sol = np.zeros((G, K, m))
    groups = pattern_groups(mask, max(16, G // 32))
    if groups is None:  # so many patterns that one full batch is cheaper
        groups = [(np.arange(G), np.arange(K))]
    for rows, cols in groups:
        if len(cols) == 0:
            continue
        sub = XtX[rows[:, None, None], cols[None, :, None], cols[None, None, :]]
        rhs = R[rows[:, None], cols[None, :], :]
        try:
            x = np.linalg.solve(sub, rhs)
        except np.linalg.LinAlgError:
            x = np.einsum("gkl,glm->gkm", np.linalg.pinv(sub), rhs)
        sol[rows[:, None], cols[None, :], :] = x
    return sol


def ljung_box_subset(
    r: np.ndarray,
    lags: np.ndarray,
    nobs: np.ndarray,
    cov: np.ndarray | None = None,
    model_df: np.ndarray | int = 0,
    use: np.ndarray | None = None,
) -> TestResult:
    """Ljung-Box statistic over any set of lags, for residuals of (subset) AR models.

    ``Q = n (n + 2) sum_{k in lags} r_k^2 / (n - k)`` (Ljung & Box 1978).
    Reference distribution: with ``cov`` (the ``A`` of
    :func:`ar_residual_acf_cov`), ``Q`` is asymptotically ``sum lambda_i
    chi2_1`` with ``lambda`` the eigenvalues of ``A``; it is referred to
    ``a chi2_b`` with ``a = tr(A^2) / tr(A)`` and ``b = tr(A)^2 / tr(A^2)``
    (Satterthwaite 1946: two moments matched). When the tested lags carry a
    model lag's whole constraint, ``A`` is a projection and this is exactly
    chi-square on ``m - (number of those model lags)`` degrees of freedom,
    the usual ``h - p``; a model lag whose constraint falls on untested lags
    (lag 52 when lags 1..12 are tested) removes nothing. ``df`` reports ``b``.
    Series where ``cov`` is NaN fall back to ``m - model_df`` (floored at 1).
    ``use`` (G, m) bool drops lags per series (e.g. a seasonal lag a short
    series cannot estimate): their terms and their rows and columns of ``A``
    are left out, and ``m`` counts the lags used.
    """
    lags = np.asarray(lags, dtype=np.float64)
    n = np.asarray(nobs)
    nf = n.astype(np.float64)
    u = np.ones(r.shape, dtype=bool) if use is None else np.asarray(use, dtype=bool)
    m = u.sum(axis=1).astype(np.float64)
    r = np.where(u, r, 0.0)
    if cov is not None:
        cov = cov * (u[:, :, None] & u[:, None, :])
    lag_max = np.max(np.where(u, lags[None, :], 0.0), axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        q = nf * (nf + 2.0) * np.sum(np.where(u, r * r / (nf[:, None] - lags[None, :]), 0.0), axis=1)
        q = np.where((n > lag_max) & np.all(np.isfinite(r), axis=1) & (m > 0), q, np.nan)
        md = np.broadcast_to(np.asarray(model_df, dtype=np.float64), n.shape)
        a = np.ones(len(n))
        b = np.maximum(m - md, 1.0)
        if cov is not None:
            tr = np.trace(cov, axis1=1, axis2=2)
            tr2 = np.einsum("gij,gij->g", cov, cov)
            good = np.isfinite(tr) & (tr2 > 0)
            a = np.where(good, tr2 / np.where(good, tr, 1.0), a)
            b = np.where(good, tr * tr / np.where(good, tr2, 1.0), b)
        p = _chi2_sf(q / a, b)
    return TestResult(q, p, b)
