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


def _as_panel(a: np.ndarray, name: str = "resid") -> np.ndarray:
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
    a = _as_panel(a)
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
    resid: np.ndarray, X: np.ndarray | None, mask: np.ndarray | None, nlags: int
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
    """
    nlags = int(nlags)
    if nlags < 1:
        raise ValueError("nlags must be >= 1")
    e = _as_panel(resid)
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
    lagcols = np.stack([_shift(z, j) for j in range(1, nlags + 1)], axis=2)
    Xa = np.concatenate([Xo, lagcols], axis=2)
    ma = np.concatenate([m, np.ones((G, nlags), dtype=bool)], axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        res = ols.fit(Xa, z, valid.astype(np.float64), ma)
        r2 = res.r_squared
        lm = n * r2
    k_used = m.sum(axis=1)
    lm = np.where(n > 1 + k_used + nlags, lm, np.nan)
    df = np.full(G, float(nlags))
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
    e = _as_panel(resid)
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
