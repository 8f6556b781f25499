"""Tail probabilities and quantiles of the distributions the tests use.

These call scipy's own special functions (the ones ``scipy.stats`` evaluates
for these distributions) directly: importing ``scipy.stats`` costs well over a
second, which every command-line run and every worker process would pay.
``tests/test_distributions.py`` checks each against ``scipy.stats`` and
handbook tables.

>>> round(float(t_sf(2.1199052992, 16)) * 2, 6)  # two-tailed 5% at 16 df
0.05
"""

from __future__ import annotations

import numpy as np
from scipy import special


def t_sf(x, df):
    """Upper tail P(T > x) of Student's t with ``df`` degrees of freedom."""
    return special.stdtr(df, -np.asarray(x, dtype=np.float64))


def chi2_sf(x, df):
    """Upper tail P(X > x) of chi-square with ``df`` degrees of freedom (1 at x <= 0)."""
    x = np.asarray(x, dtype=np.float64)
    return np.where(x > 0, special.chdtrc(df, np.maximum(x, 0.0)), np.where(np.isnan(x), np.nan, 1.0))


def f_sf(x, dfn, dfd):
    """Upper tail P(F > x) of Fisher's F with (``dfn``, ``dfd``) degrees of freedom."""
    x = np.asarray(x, dtype=np.float64)
    return np.where(x > 0, special.fdtrc(dfn, dfd, np.maximum(x, 0.0)), np.where(np.isnan(x), np.nan, 1.0))


def norm_cdf(x):
    """Standard normal distribution function."""
    return special.ndtr(np.asarray(x, dtype=np.float64))


def norm_ppf(p):
    """Standard normal quantile."""
    return special.ndtri(np.asarray(p, dtype=np.float64))


def t_ppf(p, df):
    """Student's t quantile with ``df`` degrees of freedom (normal where ``df`` is infinite)."""
    p, df = np.broadcast_arrays(np.asarray(p, dtype=np.float64), np.asarray(df, dtype=np.float64))
    pf, dff = p.ravel(), df.ravel()

    def q(pp, dd):
        with np.errstate(invalid="ignore"):
            v = np.where(np.isinf(dd), special.ndtri(pp), special.stdtrit(np.where(np.isfinite(dd), dd, 1.0), pp))
        return np.where(np.isnan(dd) | np.isnan(pp), np.nan, v)

    levels = np.unique(pf)
    if len(levels) > 16:
        return q(pf, dff).reshape(p.shape)
    # stdtrit is slow: evaluate each distinct df once per level (degrees of freedom repeat a lot)
    out = np.empty(pf.shape)
    for lv in levels:
        sel = pf == lv
        du, inv = np.unique(dff[sel], return_inverse=True)
        out[sel] = q(np.full(len(du), lv), du)[inv.ravel()]
    out[np.isnan(pf)] = np.nan
    return out.reshape(p.shape)


def binom_cdf(k, n, p):
    """P(X <= k) for X binomial(``n``, ``p``); 0 below k = 0, 1 at k >= n."""
    k = np.asarray(k, dtype=np.float64)
    n = np.asarray(n, dtype=np.float64)
    k, n = np.broadcast_arrays(k, n)
    nn = np.where(np.isfinite(n), n, 0).astype(np.int64)
    kk = np.clip(np.where(np.isfinite(k), k, 0), 0, np.maximum(nn - 1, 0)).astype(np.int64)
    with np.errstate(invalid="ignore"):
        inner = special.bdtr(kk, nn, p)
    out = np.where(k < 0, 0.0, np.where(k >= n, 1.0, inner))
    return np.where(np.isnan(k) | np.isnan(n), np.nan, out)
