"""Batched unit-root and stationarity tests: augmented Dickey-Fuller and KPSS.

Layout: (G, T) float64 panels, right-aligned (series ``g`` occupies its last
``n[g]`` columns, leading NaN); a 1-D input is one series. All work is
vectorised over G -- Python loops run over lags or candidate lag lengths only,
and large panels are processed in chunks of series to bound memory. Each
series gets exactly the numbers it would get alone. A series too short for a
test gets NaN (never an exception).

Every regression goes through :mod:`arflow.core.ols`. The lag-selection and
sample conventions follow statsmodels 0.15 ``adfuller`` / ``kpss`` (the test
reference; not imported here), as documented per function.
"""

from __future__ import annotations

import functools

from dataclasses import dataclass

import numpy as np

from arflow.core import ols
from arflow.core.distributions import norm_cdf
from arflow.core.diagnostics import as_panel, valid_mask

__all__ = ["AdfResult", "KpssResult", "adf", "kpss", "mackinnon_crit", "mackinnon_pvalue", "mackinnon_quantile", "finite_sample_crit"]

# ----------------------------------------------------------------------------- tables

#: MacKinnon (2010), "Critical Values for Cointegration Tests", Queen's
#: Economics Department Working Paper 1227, Table 1, N = 1: response-surface
#: coefficients (b_inf, b1, b2, b3) for the 1 %, 5 %, 10 % critical values,
#: C(T) = b_inf + b1/T + b2/T^2 + b3/T^3.
MACKINNON_2010 = {
    "c": np.array(
        [
            [-3.43035, -6.5393, -16.786, -79.433],
            [-2.86154, -2.8903, -4.234, -40.040],
            [-2.56677, -1.5384, -2.809, 0.0],
        ]
    ),
    "ct": np.array(
        [
            [-3.95877, -9.0531, -28.428, -134.155],
            [-3.41049, -4.3904, -9.036, -45.374],
            [-3.12705, -2.5856, -3.925, -22.380],
        ]
    ),
}

#: MacKinnon (1994), "Approximate Asymptotic Distribution Functions for
#: Unit-Root and Cointegration Tests", J. Business & Economic Statistics 12,
#: 167-176, N = 1. p = Phi(sum_i c_i tau^i) with the "small p" polynomial for
#: tau <= tau_star and the "large p" one above; p = 0 below tau_min, 1 above
#: tau_max. (Numbers as tabulated in statsmodels ``adfvalues.py``.)
_MACKINNON_1994 = {
    "c": dict(
        tau_star=-1.61,
        tau_min=-18.83,
        tau_max=2.74,
        small=np.array([2.1659, 1.4412, 3.8269e-2]),
        large=np.array([1.7339, 9.3202e-1, -1.2745e-1, -1.0368e-2]),
    ),
    "ct": dict(
        tau_star=-2.89,
        tau_min=-16.18,
        tau_max=0.7,
        small=np.array([3.2512, 1.6047, 4.9588e-2]),
        large=np.array([2.5261, 6.1654e-1, -3.7956e-1, -6.0285e-2]),
    ),
}

#: KPSS (1992) Table 1 upper-tail critical values at 10 %, 5 %, 2.5 %, 1 %.
KPSS_CRIT = {"c": np.array([0.347, 0.463, 0.574, 0.739]), "ct": np.array([0.119, 0.146, 0.176, 0.216])}
KPSS_LEVELS = np.array([0.10, 0.05, 0.025, 0.01])

#: Upper bound on elements of one (chunk, T, k) design array in ADF.
_CHUNK_ELEMS = 2_000_000


def _check_regression(regression: str) -> str:
    if regression not in ("c", "ct"):
        raise ValueError("regression must be 'c' (constant) or 'ct' (constant and trend)")
    return regression


def mackinnon_pvalue(stat: np.ndarray, regression: str = "c") -> np.ndarray:
    """MacKinnon (1994) approximate asymptotic p-value of a Dickey-Fuller tau statistic (N = 1)."""
    c = _MACKINNON_1994[_check_regression(regression)]
    t = np.asarray(stat, dtype=np.float64)
    small = np.polynomial.polynomial.polyval(t, c["small"])
    large = np.polynomial.polynomial.polyval(t, c["large"])
    p = norm_cdf(np.where(t <= c["tau_star"], small, large))
    p = np.where(t > c["tau_max"], 1.0, np.where(t < c["tau_min"], 0.0, p))
    return np.where(np.isnan(t), np.nan, p)


def mackinnon_quantile(alpha: float, regression: str = "c") -> float:
    """The Dickey-Fuller tau with MacKinnon (1994) p-value ``alpha``: the inverse of :func:`mackinnon_pvalue`.

    Found by bisection on the (increasing) approximation; asymptotic like the
    p-values (e.g. -2.86 at 5 % with a constant, Fuller 1996 / MacKinnon 2010 b_inf).
    Remembered per ``(alpha, regression)`` (every block of a run asks for the same one).
    """
    return _mackinnon_quantile(float(alpha), _check_regression(regression))


@functools.lru_cache(maxsize=64)
def _mackinnon_quantile(alpha: float, regression: str) -> float:
    lo, hi = -18.0, 2.7
    for _ in range(80):
        mid = 0.5 * (lo + hi)
        if float(mackinnon_pvalue(np.array(mid), regression)) < alpha:
            lo = mid
        else:
            hi = mid
    return 0.5 * (lo + hi)


def finite_sample_crit(alpha: float, nobs: np.ndarray | float, regression: str = "c") -> np.ndarray:
    """Dickey-Fuller critical value at level ``alpha`` for ``nobs`` rows.

    The asymptotic quantile :func:`mackinnon_quantile` plus MacKinnon's (2010)
    finite-sample term ``b1/T + b2/T^2 + b3/T^3``; the term is tabulated at
    1 %, 5 % and 10 % and interpolated linearly in ``log(alpha)`` between them
    (held constant outside). At 5 % this is exactly the 2010 response surface.
    """
    b = MACKINNON_2010[_check_regression(regression)]
    with np.errstate(divide="ignore", invalid="ignore"):
        x = 1.0 / np.asarray(nobs, dtype=np.float64)[..., None]
    term = x * (b[:, 1] + x * (b[:, 2] + x * b[:, 3]))  # (..., 3) at 1 %, 5 %, 10 %
    la = np.log(np.clip(alpha, 0.01, 0.10))
    grid = np.log([0.01, 0.05, 0.10])
    j = 0 if la <= grid[1] else 1
    w = (la - grid[j]) / (grid[j + 1] - grid[j])
    corr = (1.0 - w) * term[..., j] + w * term[..., j + 1]
    return mackinnon_quantile(alpha, regression) + corr


def mackinnon_crit(nobs: np.ndarray | float, regression: str = "c") -> np.ndarray:
    """MacKinnon (2010) 1 %, 5 %, 10 % critical values at sample size ``nobs``: shape (..., 3).

    ``nobs = np.inf`` gives the asymptotic values b_inf.
    """
    b = MACKINNON_2010[_check_regression(regression)]
    with np.errstate(divide="ignore", invalid="ignore"):
        x = 1.0 / np.asarray(nobs, dtype=np.float64)[..., None]
    return b[:, 0] + x * (b[:, 1] + x * (b[:, 2] + x * b[:, 3]))


# ----------------------------------------------------------------------------- ADF


@dataclass(frozen=True)
class AdfResult:
    """Batched ADF result; all fields (G,). ``nobs`` are the rows of the final ADF regression,
    at which the MacKinnon (2010) critical values ``crit_1``, ``crit_5``, ``crit_10`` are evaluated.
    ``used_lag`` and ``nobs`` are -1 for series too short for the test."""

    statistic: np.ndarray
    pvalue: np.ndarray
    used_lag: np.ndarray
    nobs: np.ndarray
    crit_1: np.ndarray
    crit_5: np.ndarray
    crit_10: np.ndarray


def _panel(y: np.ndarray) -> np.ndarray:
    return as_panel(y, "y")


def adf(
    y: np.ndarray,
    max_lag: int | np.ndarray | None = None,
    criterion: str | None = "aic",
    regression: str = "c",
) -> AdfResult:
    """Augmented Dickey-Fuller test, batched over series.

    Regression of ``dy_t`` on a constant (and a linear trend if
    ``regression="ct"``), ``y_{t-1}`` and ``dy_{t-1}, ..., dy_{t-k}``; the
    statistic is the t ratio of the ``y_{t-1}`` coefficient. Conventions
    follow statsmodels ``adfuller(x, maxlag, regression, autolag)``:

    * default ``max_lag`` per series of length ``n``:
      ``min(ceil(12 (n/100)^(1/4)), n//2 - ntrend - 1)`` (Schwert 1989), with
      ntrend = 1 for "c", 2 for "ct". A given ``max_lag`` (int or (G,) array)
      larger than ``n//2 - ntrend - 1`` makes that series NaN (statsmodels
      raises).
    * ``criterion`` "aic" / "bic" / "hqic": every k in 0..max_lag is fitted on
      the common sample of ``n - 1 - max_lag`` rows and the k minimising
      ``-2 llf + c * (k + 1 + ntrend)`` is chosen (c = 2, log(rows),
      2 log(log(rows)); llf the Gaussian OLS log-likelihood; ties go to the
      smaller k); then the regression is refitted with that k on its own
      longer sample of ``n - 1 - k`` rows. ``criterion=None`` uses
      ``k = max_lag`` without search.
    * p-value: MacKinnon (1994) approximation; critical values: MacKinnon
      (2010) response surface at T = rows of the final regression.

    Series with fewer than 4 ("c") or 6 ("ct") observations give NaN.
    """
    regression = _check_regression(regression)
    if criterion is not None:
        criterion = criterion.lower()
        if criterion not in ("aic", "bic", "hqic"):
            raise ValueError("criterion must be 'aic', 'bic', 'hqic' or None")
    y = _panel(y)
    _, n = valid_mask(y)
    G, T = y.shape
    ntrend = 1 if regression == "c" else 2
    upper = n // 2 - ntrend - 1
    if max_lag is None:
        ml = np.ceil(12.0 * np.power(n / 100.0, 0.25)).astype(np.int64)
        ml = np.minimum(ml, upper)
    else:
        ml = np.broadcast_to(np.asarray(max_lag, dtype=np.int64), (G,)).copy()
        if np.any(ml < 0):
            raise ValueError("max_lag must be >= 0")
    ok = (upper >= 0) & (ml <= upper) & (n >= 2)
    ml = np.where(ok, ml, 0)

    stat = np.full(G, np.nan)
    used = np.full(G, -1, dtype=np.int64)
    nobs = np.full(G, -1, dtype=np.int64)
    idx = np.flatnonzero(ok)
    if idx.size:
        # chunk by series so a (chunk, T', k) design stays bounded; sort by
        # length so short series do not pay for long ones
        idx = idx[np.argsort(-n[idx], kind="stable")]
        start = 0
        while start < idx.size:
            nmax = int(n[idx[start]])
            kmax = int(ml[idx[start:]].max())
            per = max(1, _CHUNK_ELEMS // max(1, nmax * (kmax + 3)))
            sel = idx[start : start + per]
            s, u, r = _adf_chunk(y[sel], n[sel], ml[sel], criterion, regression)
            stat[sel], used[sel], nobs[sel] = s, u, r
            start += per
    with np.errstate(invalid="ignore"):
        pvalue = mackinnon_pvalue(stat, regression)
        crit = mackinnon_crit(np.where(nobs > 0, nobs, np.nan), regression)
    return AdfResult(stat, pvalue, used, nobs, crit[:, 0], crit[:, 1], crit[:, 2])


def _adf_chunk(
    y: np.ndarray, n: np.ndarray, ml: np.ndarray, criterion: str | None, regression: str
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    G = y.shape[0]
    T = int(n.max())
    y = y[:, y.shape[1] - T :]
    valid = ~np.isnan(y)
    z = np.where(valid, y, 0.0)
    dy = np.zeros_like(z)
    dy[:, 1:] = np.where(valid[:, :-1], z[:, 1:] - z[:, :-1], 0.0)
    kmax = int(ml.max())
    # design columns: [y_{t-1}, dy_{t-1}, ..., dy_{t-kmax}, (trend)]
    cols = [np.zeros_like(z)]
    cols[0][:, 1:] = z[:, :-1]
    for j in range(1, kmax + 1):
        c = np.zeros_like(z)
        c[:, j:] = dy[:, : T - j]
        cols.append(c)
    trend = regression == "ct"
    if trend:
        cols.append(np.broadcast_to(np.arange(T, dtype=np.float64), (G, T)))
    X = np.stack(cols, axis=2)
    k = X.shape[2]
    # zero the lag columns a series never uses: a zero column is "degenerate"
    # to ols.gram (unit diagonal, no coupling), so the width other series need
    # never changes this series' numbers
    X[:, :, 1 : kmax + 1] *= np.arange(1, kmax + 1)[None, None, :] <= ml[:, None, None]
    tcol = np.arange(T)[None, :]
    first_dy = (T - n + 1)[:, None]  # first column holding a valid dy_t
    ntrend = 2 if trend else 1

    def mask_for(lag: np.ndarray) -> np.ndarray:
        m = np.zeros((G, k), dtype=bool)
        m[:, 0] = True
        m[:, 1 : kmax + 1] = np.arange(1, kmax + 1)[None, :] <= lag[:, None]
        if trend:
            m[:, -1] = True
        return m

    with np.errstate(invalid="ignore", divide="ignore"):
        if criterion is None:
            lag = ml.copy()
        else:
            w = (tcol >= first_dy + ml[:, None]).astype(np.float64)
            g = ols.gram(X, dy, w)
            rows = g.nobs
            ic = np.full((G, kmax + 1), np.inf)
            pen = {"aic": 2.0, "bic": np.log(rows), "hqic": 2.0 * np.log(np.log(rows))}[criterion]
            for L in range(kmax + 1):
                res = ols.solve(g, mask_for(np.full(G, L)))
                llf = -0.5 * rows * (np.log(2.0 * np.pi) + np.log(res.rss / rows) + 1.0)
                val = -2.0 * llf + pen * (L + 1 + ntrend)
                ic[:, L] = np.where((L <= ml) & ~np.isnan(val), val, np.inf)
            lag = np.argmin(ic, axis=1)
        w = (tcol >= first_dy + lag[:, None]).astype(np.float64)
        m = mask_for(lag)
        res = ols.fit(X * m[:, None, :], dy, w, m)
        se = res.std_errors[:, 0]
        stat = np.where(se > 0, res.beta[:, 0] / se, np.nan)
    return stat, lag, (n - 1 - lag)


# ----------------------------------------------------------------------------- KPSS


@dataclass(frozen=True)
class KpssResult:
    """Batched KPSS result; fields (G,). ``lags`` is -1 for series too short for the test."""

    statistic: np.ndarray
    pvalue: np.ndarray
    lags: np.ndarray


def kpss(y: np.ndarray, nlags: str | int | np.ndarray = "auto", regression: str = "c") -> KpssResult:
    """KPSS stationarity test (Kwiatkowski, Phillips, Schmidt & Shin 1992), batched.

    Null: level stationarity (``regression="c"``, residuals ``e = y - mean``)
    or trend stationarity (``"ct"``, residuals of OLS on a linear trend).
    ``eta = sum_t S_t^2 / (n^2 s^2(l))`` with partial sums ``S_t`` and the
    Bartlett-weighted long-run variance
    ``s^2(l) = (sum e_t^2 + 2 sum_{i=1}^{l} (1 - i/(l+1)) sum_t e_t e_{t-i}) / n``.

    ``nlags``: "auto" = Hobijn, Franses & Ooms (1998) data-dependent rule as
    in statsmodels ``kpss(nlags="auto")`` (pilot bandwidth int(n^(2/9)),
    l = int(1.1447 (s1/s0)^(2/3) n^(1/3)), capped at n - 1); "legacy" =
    ``min(ceil(12 (n/100)^(1/4)), n - 1)`` (statsmodels uses ceil, not
    int); or an int / (G,) array (a series with ``nlags >= n`` gives NaN).

    p-value: linear interpolation in the KPSS (1992) Table 1 critical values
    (level 0.347 / 0.463 / 0.574 / 0.739 at 10 / 5 / 2.5 / 1 %), **clipped to
    [0.01, 0.10]** outside the table, like statsmodels. Series with n < 3
    (or constant series) give NaN.
    """
    regression = _check_regression(regression)
    y = _panel(y)
    valid, n = valid_mask(y)
    G, T = y.shape
    nf = n.astype(np.float64)
    z = np.where(valid, y, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        if regression == "c":
            mean = z.sum(axis=1) / np.where(n > 0, nf, 1.0)
            e = np.where(valid, z - mean[:, None], 0.0)
        else:
            t = np.broadcast_to(np.arange(T, dtype=np.float64), (G, T))[:, :, None]
            e = ols.fit(t, z, valid.astype(np.float64)).resid

        def autocov_sum(i: int) -> np.ndarray:
            return np.einsum("gt,gt->g", e[:, i:], e[:, : T - i])

        if isinstance(nlags, str):
            if nlags == "legacy":
                lags = np.ceil(12.0 * np.power(nf / 100.0, 0.25)).astype(np.int64)
                lags = np.minimum(lags, n - 1)
            elif nlags == "auto":
                covlags = np.power(nf, 2.0 / 9.0).astype(np.int64)
                s0 = np.einsum("gt,gt->g", e, e) / nf
                s1 = np.zeros(G)
                for i in range(1, int(covlags.max(initial=0)) + 1):
                    on = i <= covlags
                    prod = np.where(on, autocov_sum(i) / (nf / 2.0), 0.0)
                    s0 = s0 + prod
                    s1 = s1 + i * prod
                s_hat = s1 / s0
                gamma = 1.1447 * np.power(s_hat * s_hat, 1.0 / 3.0)
                lags = np.where(np.isfinite(gamma), gamma * np.power(nf, 1.0 / 3.0), 0.0).astype(np.int64)
                lags = np.minimum(lags, n - 1)
            else:
                raise ValueError("nlags must be 'auto', 'legacy' or an integer")
            ok = n >= 3
        else:
            lags = np.broadcast_to(np.asarray(nlags, dtype=np.int64), (G,)).copy()
            if np.any(lags < 0):
                raise ValueError("nlags must be >= 0")
            ok = (n >= 3) & (lags < n)
        lags = np.where(ok, np.maximum(lags, 0), 0)
        S = np.cumsum(e, axis=1)
        eta = np.einsum("gt,gt->g", S, S) / (nf * nf)
        s2 = np.einsum("gt,gt->g", e, e)
        for i in range(1, int(lags.max(initial=0)) + 1):
            on = i <= lags
            s2 = s2 + np.where(on, 2.0 * autocov_sum(i) * (1.0 - i / (lags + 1.0)), 0.0)
        s2 = s2 / nf
        stat = np.where(ok & (s2 > 0), eta / s2, np.nan)
    crit = KPSS_CRIT[regression]
    pvalue = np.where(np.isnan(stat), np.nan, np.interp(np.nan_to_num(stat), crit, KPSS_LEVELS))
    return KpssResult(stat, pvalue, np.where(ok, lags, -1))
