"""Additive outliers: detection on robust standardised residuals, and treatment by intervention terms.

Detection (batched over series; the loops run over rounds and lag columns only)
follows the residual-based procedure of Chen & Liu (1993, "Joint estimation
of model parameters and outlier effects in time series", JASA 88, 284-297)
for additive outliers (AO). With the fitted AR polynomial
``pi(B) = 1 - phi_1 B - ... - phi_p B^p`` an AO of size ``w`` at period t
adds ``w pi_j`` to the residual at ``t + j`` (``pi_0 = 1``, ``pi_j = -phi_j``),
so its least-squares estimate and standardised statistic are

    w_t = sum_j pi_j e(t+j) / sum_j pi_j^2,
    lambda_t = w_t sqrt(sum_j pi_j^2) / sigma

(sums over residuals inside the fitted sample, centred by their median). ``sigma`` is the robust scale
``1.4826 * median |e - median e|`` (the MAD, Hampel 1974; the factor makes it
consistent for the Gaussian standard deviation, Rousseeuw & Croux 1993, JASA
88, 1273-1283), as Chen & Liu recommend, so the outlier does not inflate the
scale it is measured against. Round by round each series' largest
``|lambda_t|`` is compared with the threshold; a flagged period's effect is
removed from the residuals (``e(t+j) -= w_t pi_j``) and the statistics are
recomputed, so one large outlier does not mask, or spill onto, its neighbours.
Series with outliers are then refitted and searched once more from scratch
with the refitted coefficients (:func:`detect_and_treat`), as Chen & Liu
iterate detection and estimation.

Threshold: the largest of n statistics is judged, so the per-series level is
split over the n candidate periods (Bonferroni): ``c(n) = t_nu^-1(1 - alpha / (2 n))``
with ``alpha = 0.01`` per series. The Student-t quantile with
``nu = 0.37 n`` degrees of freedom allows for the estimated scale: the MAD has
about 37% of the standard deviation's efficiency at the Gaussian (Rousseeuw &
Croux 1993), so it carries about as much information as a variance estimate on
0.37 n degrees of freedom (an approximation; the false-flag rates measured by
``bench/calibration.py`` are stated in the README).

Treatment: each flagged period t gets intervention (indicator) terms for the
regression rows in which the outlying value appears, i.e. row t (as the
response) and rows t + l for each lag l of the model (as a regressor). An
indicator for a row is the same as dropping that row from the least-squares
fit (Frisch-Waugh), so the refit goes through the batched OLS with those rows
weighted out; the residuals of indicator rows are exactly 0. The reported
effect of the outlier is the indicator coefficient of row t:
``y_t - (b0 + sum_j phi_j y_(t-j))`` under the refitted model. The cleaned
series (the outlier replaced by its fitted value) feeds the forecasts and the
backtest. Detection and treatment act on the modelled series (the first
differences of a differenced series, where a level spike shows as a jump and
its reversal).
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from . import ols
from .arrays import nan_to_num
from .autoreg import MIN_RESID_DF, ARFit, finish_fit, lag_design
from .distributions import t_ppf

#: Normal-consistency factor of the MAD: 1 / Phi^-1(3/4).
MAD_FACTOR = 1.482602218505602
#: Per-series false-flag level split over the n candidate periods.
ALPHA = 0.01
#: Relative efficiency of the MAD at the Gaussian (Rousseeuw & Croux 1993: 36.75%).
MAD_EFFICIENCY = 0.37
#: At most this many periods per series are treated; more is not an outlier problem.
MAX_OUTLIERS = 5


@dataclass(frozen=True)
class OutlierResult:
    """Detected additive outliers of G series.

    ``statistic`` (G,): the largest ``|lambda_t|`` of the first round;
    ``threshold`` (G,): ``c(n)``; ``flagged`` (G, T) bool: periods (panel columns)
    flagged; ``count`` (G,); ``too_many`` (G,): more than :data:`MAX_OUTLIERS`
    periods would be flagged; ``scale`` (G,): the robust residual scale;
    ``size`` (G, T): the estimate ``w_t`` at flagged periods (NaN elsewhere).
    """

    statistic: np.ndarray
    threshold: np.ndarray
    flagged: np.ndarray
    count: np.ndarray
    too_many: np.ndarray
    scale: np.ndarray
    size: np.ndarray

    @property
    def any(self) -> np.ndarray:
        return self.count > 0


def robust_scale(resid: np.ndarray) -> np.ndarray:
    """``1.4826 * median |e - median e|`` of each row of ``resid`` (G, T), ignoring NaN.

    >>> float(robust_scale(np.array([[1.0, 2.0, 3.0, 4.0, 100.0]]))[0].round(4))
    1.4826
    """
    r = np.asarray(resid, dtype=np.float64)
    med = row_median(r)
    return MAD_FACTOR * row_median(np.abs(r - med[:, None]))


def row_median(a: np.ndarray) -> np.ndarray:
    """Median of the finite values of each row (NaN for a row without any), by one batched sort.

    (``np.nanmedian`` falls back to a Python loop over rows on large arrays.)
    """
    a = np.where(np.isfinite(a), a, np.nan)
    G = a.shape[0]
    n = np.isfinite(a).sum(axis=1)
    if a.shape[1] == 0:
        return np.full(G, np.nan)
    srt = np.sort(a, axis=1)  # NaN last
    lo = np.take_along_axis(srt, np.maximum((n - 1) // 2, 0)[:, None], axis=1)[:, 0]
    hi = np.take_along_axis(srt, np.minimum(n // 2, a.shape[1] - 1)[:, None], axis=1)[:, 0]
    return np.where(n > 0, 0.5 * (lo + hi), np.nan)


def threshold(n: np.ndarray, alpha: float = ALPHA) -> np.ndarray:
    """The critical value ``c(n)`` for the largest of n AO statistics (module notes).

    >>> float(threshold(np.array([120]))[0].round(2))
    4.37
    """
    n = np.asarray(n, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        nu = np.maximum(MAD_EFFICIENCY * n, 1.0)
        return np.where(n > 0, t_ppf(1.0 - alpha / (2.0 * np.maximum(n, 1.0)), nu), np.nan)


def _statistics(e: np.ndarray, valid: np.ndarray, pis: list[tuple[int, np.ndarray]], sigma: np.ndarray):
    """lambda_t and w_t (G, T) for every period with a residual."""
    G, T = e.shape
    num = np.zeros((G, T))
    den = np.zeros((G, T))
    ez = np.where(valid, e, 0.0)
    vf = valid.astype(np.float64)
    for j, pj in pis:
        if j >= T:
            continue
        nz = pj != 0
        if nz.all() or nz.sum() * 2 > G:
            num[:, : T - j] += pj[:, None] * ez[:, j:]
            den[:, : T - j] += (pj * pj)[:, None] * vf[:, j:]
        elif nz.any():
            # a lag only some series use: the others would add exact zeros
            rows = np.flatnonzero(nz)
            p = pj[rows]
            num[rows, : T - j] += p[:, None] * ez[rows, j:]
            den[rows, : T - j] += (p * p)[:, None] * vf[rows, j:]
    with np.errstate(divide="ignore", invalid="ignore"):
        w = np.where(valid & (den > 0), num / den, np.nan)
        lam = w * np.sqrt(den) / sigma[:, None]
    return lam, w


def detect(resid: np.ndarray, fit: ARFit, alpha: float = ALPHA, max_outliers: int = MAX_OUTLIERS) -> OutlierResult:
    """Flag additive outliers in the residuals ``resid`` (G, T) of the AR fits ``fit`` (module notes)."""
    e = np.array(resid, dtype=np.float64)
    G, T = e.shape
    valid = np.isfinite(e) & fit.fitted[:, None]
    n = valid.sum(axis=1)
    sigma = robust_scale(np.where(valid, e, np.nan))
    # robust centring: OLS residuals sum to zero *including* the outliers, so a large one
    # shifts all the others; the median is not moved by it
    med = np.nan_to_num(row_median(np.where(valid, e, np.nan)))
    e = e - med[:, None]
    crit = threshold(n, alpha)
    # pi weights of the used lags: pi_0 = 1, pi_l = -phi_l
    pis = [(0, np.ones(G))] + [(int(l), -np.nan_to_num(fit.coef[:, k])) for k, l in enumerate(fit.lags)]
    flagged = np.zeros((G, T), dtype=bool)
    size = np.full((G, T), np.nan)
    active = fit.fitted & np.isfinite(sigma) & (sigma > 0)
    first = np.full(G, np.nan)
    too_many = np.zeros(G, dtype=bool)
    idx = np.flatnonzero(active)  # rows still searched (after round 0: those with a hit)
    for r in range(max_outliers + 1):
        if not len(idx) or T == 0:
            break
        ei, vi = e[idx], valid[idx]
        lam, w = _statistics(ei, vi, [(j, pj[idx]) for j, pj in pis], sigma[idx])
        a = np.where(vi & ~flagged[idx], np.abs(np.nan_to_num(lam)), -1.0)
        t = np.argmax(a, axis=1)
        loc = np.arange(len(idx))
        best = a[loc, t]
        if r == 0:
            first[idx] = np.where(best >= 0, best, np.nan)
        hit = best > crit[idx]
        if r == max_outliers:
            too_many[idx[hit]] = True
            break
        gi, ti = idx[hit], t[hit]
        flagged[gi, ti] = True
        wt = w[loc, t][hit]
        size[gi, ti] = wt
        for j, pj in pis:
            c = ti + j
            ok = c < T
            e[gi[ok], c[ok]] -= (wt * pj[gi])[ok]
        idx = gi
    return OutlierResult(first, crit, flagged, flagged.sum(axis=1), too_many, sigma, size)


@dataclass(frozen=True)
class Treated:
    """The fits after intervention terms, with what was done.

    ``fit``: all series (refitted where treated); ``treated`` (G,): refitted with
    indicators; ``failed`` (G,): had outliers but the refit was not possible
    (too few rows left); ``excluded`` (G, T): regression rows carried by
    indicators; ``effect`` (G, T): the estimated outlier effect at flagged
    periods (NaN elsewhere); ``cleaned`` (G, T): the modelled series with each
    outlier replaced by its fitted value; ``full_resid`` (G, T): residuals of
    the refitted model on the whole fitted sample, indicator rows included
    (NaN for series not refitted).
    """

    fit: ARFit
    treated: np.ndarray
    failed: np.ndarray
    excluded: np.ndarray
    effect: np.ndarray
    cleaned: np.ndarray
    full_resid: np.ndarray


def treat(M: np.ndarray, fit: ARFit, found: OutlierResult) -> Treated:
    """Refit the series with outliers with indicator terms (rows weighted out; module notes).

    ``M`` (G, T): the modelled series (levels or differences), right-aligned, the
    one ``fit`` was fitted to.
    """
    M = np.asarray(M, dtype=np.float64)
    G, T = M.shape
    lags = fit.lags
    sample = np.isfinite(fit.resid[:, -T:]) if fit.resid.shape[1] >= T else np.isfinite(_pad(fit.resid, T))
    excluded = found.flagged & sample
    for k, l in enumerate(lags):
        l = int(l)
        if l < T:
            sh = np.zeros((G, T), dtype=bool)
            sh[:, l:] = found.flagged[:, : T - l]
            excluded |= sh & fit.lag_mask[:, k][:, None] & sample
    want = found.any & ~found.too_many & fit.fitted
    w = (sample & ~excluded).astype(np.float64) * want[:, None]
    k = fit.n_lags
    ok = want & (w.sum(axis=1) - k - 1 >= MIN_RESID_DF)
    idx = np.flatnonzero(ok)
    effect = np.full((G, T), np.nan)
    full_resid = np.full((G, T), np.nan)
    cleaned = M.copy()
    out = fit
    if len(idx):
        X = nan_to_num(lag_design(M[idx], lags), copy=False)
        y = nan_to_num(M[idx], copy=False)
        wi = w[idx]
        g = ols.gram(X, y, wi)
        res = ols.fit_with_gram(g, X, y, wi, fit.lag_mask[idx])
        sub = finish_fit(lags, fit.lag_mask[idx], res, wi, M[idx], np.ones(len(idx), dtype=bool),
                      np.zeros(len(idx)), g.xmean)
        # indicator rows have residual exactly 0
        sub = replace(sub, resid=np.where(excluded[idx] & sample[idx], 0.0, sub.resid))
        pred = sub.intercept[:, None] + np.einsum("gtk,gk->gt", X, np.nan_to_num(sub.coef))
        fl = found.flagged[idx]
        eff = np.where(fl, M[idx] - pred, np.nan)
        effect[idx] = eff
        full_resid[idx] = np.where(sample[idx], M[idx] - pred, np.nan)
        cleaned[idx] = np.where(fl, pred, M[idx])
        out = _splice_rows(fit, sub, idx)
    failed = found.any & fit.fitted & ~ok
    return Treated(out, ok, failed, excluded & ok[:, None], effect, cleaned, full_resid)


def detect_and_treat(M: np.ndarray, fit: ARFit, alpha: float = ALPHA) -> tuple[OutlierResult, Treated | None]:
    """Two passes (Chen & Liu 1993 iterate detection and estimation): detect with the
    original fit; refit the series with outliers; detect again from scratch with the
    refitted coefficients on the refit's residuals over the whole sample (the outliers'
    own rows included), whose coefficients are no longer pulled by the outliers; treat
    the final flags starting from the original fit. Returns the final detection and
    its treatment (None when nothing was flagged)."""
    found = detect(fit.resid, fit, alpha)
    if not found.any.any():
        return found, None
    first = treat(M, fit, found)
    if first.treated.any():
        again = detect(first.full_resid, first.fit, alpha)
        t = first.treated
        found = OutlierResult(
            statistic=np.where(t, again.statistic, found.statistic),
            threshold=found.threshold,
            flagged=np.where(t[:, None], again.flagged, found.flagged),
            count=np.where(t, again.count, found.count),
            too_many=np.where(t, again.too_many, found.too_many),
            scale=np.where(t, again.scale, found.scale),
            size=np.where(t[:, None], again.size, found.size),
        )
    return found, treat(M, fit, found)


def _pad(a: np.ndarray, T: int) -> np.ndarray:
    return np.concatenate([np.full((a.shape[0], T - a.shape[1]), np.nan), a], axis=1)


def _splice_rows(base: ARFit, sub: ARFit, idx: np.ndarray) -> ARFit:
    from .autoreg import splice

    return splice(base, sub, idx)


def cleaned_levels(Y: np.ndarray, effect: np.ndarray, differenced: np.ndarray) -> np.ndarray:
    """Levels with the outlier effects removed, for forecasting from clean history.

    Levels model: ``y_t - w_t``. Differences model: the difference at t loses
    ``w_t`` while the last level is kept, i.e. every level before t moves up by
    ``w_t`` (``y_s + sum_{t > s} w_t``).
    """
    A = np.nan_to_num(effect)
    if not A.any():
        return Y
    later = np.cumsum(A[:, ::-1], axis=1)[:, ::-1] - A  # sum over t > s
    return np.where(differenced[:, None], Y + later, Y - A)
