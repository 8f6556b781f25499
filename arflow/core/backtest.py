"""Rolling-origin (expanding window) backtest of fixed AR specifications, batched over series.

Conventions
-----------
Panel: ``Y`` (G, T) is right-aligned like :attr:`arflow.core.panel.Panel.values`
(series g occupies its last ``n[g]`` columns as one contiguous run, NaN before),
so every series ends at column ``T - 1``.

Origins: an origin is the column ``c`` of the last observation used for
training; the model forecasts columns ``c + 1 .. c + H``. The backtest uses
the last ``origins`` columns at which all H actual values exist:
``c = T - 1 - H - j`` for ``j = origins - 1, ..., 1, 0`` (oldest first), so
the latest origin is ``T - 1 - H`` and no origin has a partial horizon. The
window expands: the training data of origin ``c`` are all of the series'
observations up to and including column ``c``.

Refit: at each origin the series' own specification (its lag set from
``lag_mask``, on levels or on first differences per ``differenced``) is
re-estimated by OLS with intercept on the training data only, with the same
sample rule as :func:`arflow.core.autoreg.fit_ar` (the first ``max lag``
observations of the modelled series are held back) -- one batched regression
per origin (a row-weight mask over the series' rows up to the origin), never a loop
over series. The lag set itself is taken as given (typically the one chosen on
all data), so order selection is not backtested. Forecasts and Gaussian
intervals come from :func:`arflow.core.forecast.forecast_ar` with the
degrees-of-freedom-adjusted sigma; differenced models are forecast in levels.

A series takes part at an origin when it has a lag set, at least ``min_train``
level observations up to the origin, and enough for the fit
(``nobs - maxlag >= k + 1 + MIN_RESID_DF`` like ``fit_ar``); shorter series
just contribute fewer origins (NaN where none). Nothing is raised for
per-series problems.

Benchmarks at the same origins: naive (random walk, ``y[c]`` for every step)
and, when ``season`` is given, seasonal naive (the last observed value of the
same season: ``y[c + h - s * ceil(h / s)]``; Hyndman & Athanasopoulos,
Forecasting: Principles and Practice, "simple forecasting methods"). A
benchmark is scored only at origins where the model was scored, and only
where its own forecast exists (the seasonal naive needs one full season).

Error measures (Hyndman & Koehler 2006, "Another look at measures of forecast
accuracy", IJF 22, 679-688), per series and step h, over the origins:
RMSE ``sqrt(mean e^2)``, MAE ``mean |e|`` with ``e = actual - forecast``, and
MASE ``mean |e| / scale``. The MASE scale is computed **at each origin from
that origin's own training data** (no look-ahead): the in-sample mean absolute
one-step naive error ``mean |y_t - y_{t-1}|``, or, for a seasonal series
(``season`` given and the series' lags include it), the in-sample seasonal
naive error ``mean |y_t - y_{t-s}|``. Origins whose scale is zero or undefined
are left out of MASE only. All three methods share the same scale, so their
MASEs are comparable. ``*_all`` arrays pool all origins and steps 1..H.

Gate statistic: :attr:`BacktestResult.relative_rmse` = model RMSE / naive RMSE,
both pooled over all origins and steps 1..H (below 1: the model beats the
random walk). Caution: errors of overlapping origins are strongly correlated,
so with long horizons and few origins this ratio is noisy even where no skill
can exist (simulated random walks, 150 periods, the pipeline's own
specification: ratio < 0.95 in about 7% of series at 40 origins x 4 steps, 11%
at 40 x 6, 28% at 12 x 12, 0.3% at 60 x 1). :meth:`BacktestResult.relative_rmse_over`
pools only steps 1..k.

Cost and memory: series are sorted by their highest lag (then by lag set) and processed in
blocks of ``block`` (vectorised within a block, as
:func:`arflow.core.pipeline.run_core` does; each block's design is only as wide
as its own lag sets). Within a block the expanding window is kept as raw sums
of the mean-shifted series (as :func:`arflow.core.autoreg.fit_ar` does), which
each origin extends by its new rows; each origin's coefficients and RSS are
solved from those sums alone (:func:`arflow.core.ols.solve`), so an origin
costs no pass over the series' rows.
One origin is held at a time; work is linear in G, T and the number of origins.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from . import ols
from .arrays import nan_to_num
from .autoreg import MIN_RESID_DF, shifted_lag_stack
from .forecast import cov_from_gram, forecast_ar

#: series per block: keeps the (series, periods, lags) design in cache
BLOCK_SERIES = 1024


@dataclass(frozen=True)
class Accuracy:
    """Error measures of one forecasting method.

    Per step: ``rmse``, ``mae``, ``mase``, ``count`` (G, H) (``count`` = origins
    scored at that step). Pooled over origins and steps 1..H: ``rmse_all``,
    ``mae_all``, ``mase_all`` (G,). NaN where nothing was scored.
    """

    rmse: np.ndarray
    mae: np.ndarray
    mase: np.ndarray
    count: np.ndarray
    rmse_all: np.ndarray
    mae_all: np.ndarray
    mase_all: np.ndarray


@dataclass(frozen=True)
class BacktestResult:
    """Rolling-origin backtest of G series.

    ``origin_columns`` (O,): panel columns of the origins (oldest first).
    ``n_origins`` (G,): origins at which the model was scored.
    ``model`` / ``naive`` / ``seasonal_naive``: :class:`Accuracy` (the seasonal
    naive is all NaN when no season was given). ``coverage`` (C,) levels and
    ``coverage_rate`` (C, G, H): share of the scored origins whose actual fell
    inside the model's interval (bounds inclusive); ``coverage_rate_all``
    (C, G) pooled over steps. ``seasonal_scale`` (G,): True where MASE used the
    seasonal naive scale.
    """

    origin_columns: np.ndarray
    horizon: int
    n_origins: np.ndarray
    model: Accuracy
    naive: Accuracy
    seasonal_naive: Accuracy
    coverage: tuple[float, ...]
    coverage_rate: np.ndarray
    coverage_rate_all: np.ndarray
    seasonal_scale: np.ndarray

    @property
    def relative_rmse(self) -> np.ndarray:
        """Gate statistic (G,): model RMSE / naive RMSE, pooled over origins and steps 1..H."""
        with np.errstate(divide="ignore", invalid="ignore"):
            return self.model.rmse_all / self.naive.rmse_all

    @property
    def relative_rmse_by_step(self) -> np.ndarray:
        """Model RMSE / naive RMSE per step (G, H)."""
        with np.errstate(divide="ignore", invalid="ignore"):
            return self.model.rmse / self.naive.rmse

    def relative_rmse_over(self, steps: int) -> np.ndarray:
        """Model RMSE / naive RMSE (G,) pooled over origins and steps 1..``steps`` only."""
        k = max(1, min(int(steps), self.horizon))

        def sse(a: Accuracy) -> tuple[np.ndarray, np.ndarray]:
            n = a.count[:, :k]
            return np.where(n > 0, np.nan_to_num(a.rmse[:, :k]) ** 2 * n, 0.0).sum(1), n.sum(1)

        (sm, nm), (sn, nn) = sse(self.model), sse(self.naive)
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where((nm > 0) & (nn > 0), np.sqrt((sm / nm) / (sn / nn)), np.nan)


    def coverage_test(self, steps: int = 1) -> tuple[np.ndarray, np.ndarray]:
        """Is the intervals' backtest coverage significantly below nominal? ``(statistic, pvalue)`` (G,).

        For each coverage level c, the hits X among the N scored forecasts at
        steps 1..``steps`` (pooled over origins) are compared with Binomial(N, c):
        one-sided p-value ``P(Bin(N, c) <= X)`` (exact binomial test; Clopper &
        Pearson 1934 give the matching interval). Levels are combined by
        Bonferroni (smallest p times the number of levels, capped at 1).
        ``statistic`` is the observed coverage of the level with the smallest p.
        One-step errors at different origins are (for a correct model) separate
        innovations, so step 1 alone keeps the binomial's independence; longer
        steps overlap across origins and make the test oversized. The test is
        discrete, hence conservative: its size is at most the level (measured
        in ``bench/calibration.py``).
        """
        from .distributions import binom_cdf

        k = max(1, min(int(steps), self.horizon))
        n = self.model.count[:, :k].astype(np.float64)  # (G, k)
        C = len(self.coverage)
        G = n.shape[0]
        if C == 0 or G == 0:
            return np.full(G, np.nan), np.full(G, np.nan)
        rate = np.nan_to_num(self.coverage_rate[:, :, :k])
        hits = np.rint((rate * n[None]).sum(axis=2))  # (C, G)
        N = n.sum(axis=1)  # (G,)
        levels = np.asarray(self.coverage, dtype=np.float64)[:, None]
        p = binom_cdf(hits, N[None, :], levels)
        j = np.argmin(p, axis=0)
        cols = np.arange(G)
        with np.errstate(invalid="ignore", divide="ignore"):
            obs = hits[j, cols] / N
        pmin = np.minimum(1.0, C * p[j, cols])
        none = N <= 0
        return np.where(none, np.nan, obs), np.where(none, np.nan, pmin)


class _Sums:
    """Running sums of one method's errors over origins, for a block of series."""

    def __init__(self, B: int, H: int):
        self.sse = np.zeros((B, H))
        self.sae = np.zeros((B, H))
        self.sase = np.zeros((B, H))
        self.n = np.zeros((B, H))
        self.nq = np.zeros((B, H))

    def add(self, err: np.ndarray, ok: np.ndarray, scale: np.ndarray) -> None:
        ok = ok & np.isfinite(err)
        e = np.where(ok, err, 0.0)
        a = np.abs(e)
        self.sse += e * e
        self.sae += a
        self.n += ok
        qok = ok & (np.isfinite(scale) & (scale > 0))[:, None]
        with np.errstate(divide="ignore", invalid="ignore"):
            self.sase += np.where(qok, a / scale[:, None], 0.0)
        self.nq += qok

    def add_origins(self, err: np.ndarray, ok: np.ndarray, scale: np.ndarray) -> None:
        """:meth:`add` for several origins at once: ``err``/``ok`` (O, B, H), ``scale`` (O, B).

        The sums are accumulated origin by origin in the same order as repeated
        :meth:`add` calls (numpy reduces a leading axis row after row), so the
        result is bit-identical.
        """
        ok = ok & np.isfinite(err)
        e = np.where(ok, err, 0.0)
        a = np.abs(e)
        self.sse = _running_sum(self.sse, e * e)
        self.sae = _running_sum(self.sae, a)
        self.n += ok.sum(axis=0)
        qok = ok & (np.isfinite(scale) & (scale > 0))[:, :, None]
        with np.errstate(divide="ignore", invalid="ignore"):
            self.sase = _running_sum(self.sase, np.where(qok, a / scale[:, :, None], 0.0))
        self.nq += qok.sum(axis=0)


def _running_sum(total: np.ndarray, terms: np.ndarray) -> np.ndarray:
    """``total + terms[0] + terms[1] + ...`` added in that order (a reduction over the leading axis)."""
    buf = np.empty((len(terms) + 1,) + total.shape)
    buf[0] = total
    buf[1:] = terms
    return buf.sum(axis=0)


def _accuracy(s: list[_Sums], back: np.ndarray) -> Accuracy:
    sse, sae, sase, n, nq = (np.concatenate([getattr(x, k) for x in s])[back]
                             for k in ("sse", "sae", "sase", "n", "nq"))
    with np.errstate(divide="ignore", invalid="ignore"):
        def ratio(a, b):
            return np.where(b > 0, a / b, np.nan)

        return Accuracy(
            rmse=np.sqrt(ratio(sse, n)),
            mae=ratio(sae, n),
            mase=ratio(sase, nq),
            count=n.astype(np.int64),
            rmse_all=np.sqrt(ratio(sse.sum(1), n.sum(1))),
            mae_all=ratio(sae.sum(1), n.sum(1)),
            mase_all=ratio(sase.sum(1), nq.sum(1)),
        )


def _prefix_abs_diff(Y: np.ndarray, lag: int) -> tuple[np.ndarray, np.ndarray]:
    """Prefix sums over columns of ``|y_t - y_{t-lag}|`` and of how many such terms are finite.

    ``S[:, c]`` / ``N[:, c]`` sum over ``t <= c``; both (B, T).
    """
    B, T = Y.shape
    d = np.full((B, T), np.nan)
    if lag < T:
        d[:, lag:] = np.abs(Y[:, lag:] - Y[:, :-lag])
    fin = np.isfinite(d)
    return np.cumsum(np.where(fin, d, 0.0), axis=1), np.cumsum(fin, axis=1)


def rolling_origin(
    Y: np.ndarray,
    lag_mask: np.ndarray,
    lags: np.ndarray,
    differenced: np.ndarray | None = None,
    *,
    origins: int,
    horizon: int,
    coverage: tuple[float, ...] = (0.8, 0.95),
    season: int | None = None,
    min_train: int = 0,
    block: int = BLOCK_SERIES,
    fitted: np.ndarray | None = None,
    parameter_uncertainty: bool = False,
    mapper: "Callable | None" = None,
) -> BacktestResult:
    """Backtest each series' AR specification at the last ``origins`` origins (see the module notes).

    ``Y`` (G, T) right-aligned levels; ``lags`` (K,) lag columns and
    ``lag_mask`` (G, K) each series' lags (as in :class:`~arflow.core.autoreg.ARFit`;
    a series with no lags is not backtested); ``differenced`` (G,) bool: model
    first differences. ``season``: seasonal naive benchmark and seasonal MASE
    scale. ``min_train``: least number of level observations up to an origin.
    ``parameter_uncertainty``: intervals include the estimation term and
    Student-t quantiles, as the published ones do (:mod:`arflow.core.forecast`).
    ``mapper``: a ``map``-like callable that runs the blocks (e.g. a process pool's
    ``map``); the built-in ``map`` by default.

    >>> y = np.tile([0.0, 2.0], 7)[None, :13]; y[0, 11:] = [3.0, 1.0]
    >>> r = rolling_origin(y, np.array([[True]]), np.array([1]), origins=2, horizon=2)
    >>> r.model.mae.round(6).tolist(), r.naive.mae.tolist(), int(r.n_origins[0])
    ([[0.5, 1.0]], [[2.5, 1.0]], 2)
    """
    Y = np.asarray(Y, dtype=np.float64)
    if Y.ndim != 2:
        raise ValueError("Y must be a (series, periods) array")
    G, T = Y.shape
    lags = np.asarray(lags, dtype=np.int64).ravel()
    lag_mask = np.asarray(lag_mask, dtype=bool)
    # ``fitted`` (G,) marks fitted models: one with no lags is then the constant mean (order 0);
    # without it a series with no lags is taken as not fitted
    fit_ok = np.zeros(G, dtype=bool) if fitted is None else np.asarray(fitted, dtype=bool)
    if lag_mask.shape != (G, len(lags)):
        raise ValueError(f"lag_mask must have shape {(G, len(lags))}, got {lag_mask.shape}")
    if len(lags) and lags.min() < 1:
        raise ValueError("lags must be positive")
    diff = np.zeros(G, dtype=bool) if differenced is None else np.asarray(differenced, dtype=bool).ravel()
    if diff.shape != (G,):
        raise ValueError(f"differenced must have shape {(G,)}")
    if int(horizon) < 1 or int(origins) < 1:
        raise ValueError("horizon and origins must be at least 1")
    if season is not None and int(season) < 1:
        raise ValueError("season must be a positive integer or None")
    H = int(horizon)
    s = int(season) if season else None
    cov = tuple(float(c) for c in coverage)
    last = T - 1 - H
    cols = np.arange(max(last - int(origins) + 1, 0), last + 1)
    seasonal_scale = np.zeros(G, dtype=bool)
    if s is not None and s in lags:
        seasonal_scale = lag_mask[:, int(np.flatnonzero(lags == s)[0])].copy()

    # blocks of series with similar highest lags, so each block's design is only as
    # wide as its own lag sets need (results are put back in input order)
    maxlag = np.max(np.where(lag_mask, lags[None, :], 0), axis=1) if len(lags) else np.zeros(G, np.int64)
    # within a highest lag, series with the same lag set side by side: a block's design and
    # its interval terms are as wide as the union of its series' lag sets
    pattern = np.zeros(G, dtype=np.int64)
    for j in range(min(len(lags), 62)):
        pattern |= lag_mask[:, j].astype(np.int64) << j
    # lag sets shared by at least a quarter block come first, each in blocks of its own; the
    # rare ones follow together (a rare set next to a common one would widen the common
    # set's design and interval terms to their union)
    _, inv_pat, counts = np.unique(pattern, return_inverse=True, return_counts=True)
    rare = counts[inv_pat.ravel()] < max(int(block) // 4, 1)
    perm = np.lexsort((pattern, maxlag, rare))
    back = np.empty_like(perm)
    back[perm] = np.arange(G)
    parts = {k: [] for k in ("model", "naive", "snaive", "hits", "n_origins")}
    jobs = []
    for b0, b1 in _block_bounds(maxlag[perm], pattern[perm], max(int(block), 1), rare[perm]):
        idx = perm[b0:b1]
        jobs.append((Y[idx], lag_mask[idx], lags, diff[idx], seasonal_scale[idx], cols, H, cov, s, int(min_train),
                     fit_ok[idx], bool(parameter_uncertainty)))
    # blocks depend only on the series, never on ``mapper``: the numbers are the same in any process layout
    for out in (mapper or map)(_block_of, jobs):
        for k, v in out.items():
            parts[k].append(v)
    if G == 0:
        for k in ("model", "naive", "snaive"):
            parts[k].append(_Sums(0, H))
        parts["hits"].append(np.zeros((len(cov), 0, H)))
        parts["n_origins"].append(np.zeros(0, dtype=np.int64))
    hits = np.concatenate(parts["hits"], axis=1)[:, back]
    parts["n_origins"] = [np.concatenate(parts["n_origins"])[back]]
    model = _accuracy(parts["model"], back)
    with np.errstate(divide="ignore", invalid="ignore"):
        n = model.count.astype(np.float64)
        rate = np.where(n[None] > 0, hits / n[None], np.nan)
        rate_all = np.where(n.sum(1)[None] > 0, hits.sum(2) / n.sum(1)[None], np.nan)
    return BacktestResult(
        origin_columns=cols,
        horizon=H,
        n_origins=parts["n_origins"][0],
        model=model,
        naive=_accuracy(parts["naive"], back),
        seasonal_naive=_accuracy(parts["snaive"], back),
        coverage=cov,
        coverage_rate=rate,
        coverage_rate_all=rate_all,
        seasonal_scale=seasonal_scale,
    )


def _block_of(args: tuple) -> dict:
    return _block(*args)


def _block_bounds(maxlag: np.ndarray, pattern: np.ndarray, block: int,
                  rare: np.ndarray | None = None) -> list[tuple[int, int]]:
    """Blocks of at most ``block`` consecutive (sorted) series: a lag set shared by at least a
    quarter block gets blocks of its own, rarer ones share, so most blocks are one lag set wide.
    ``rare`` (sorted like the others): series of rare lag sets, which never share a block with
    a common set."""
    G = len(maxlag)
    if G == 0:
        return []
    if rare is not None and rare.any() and not rare.all():
        cut = int(np.argmax(rare))  # rare sets are sorted last
        # every common set on its own: cut at each change of lag set
        change = np.flatnonzero((np.diff(maxlag[:cut]) != 0) | (np.diff(pattern[:cut]) != 0)) + 1
        edges = np.concatenate([[0], change, [cut]])
        head = [(int(a), int(min(a + block, b))) for a0, b in zip(edges[:-1], edges[1:])
                for a in range(int(a0), int(b), block)]
        tail = _block_bounds(maxlag[cut:], pattern[cut:], block)
        return head + [(a + cut, b + cut) for a, b in tail]
    change = np.flatnonzero((np.diff(maxlag) != 0) | (np.diff(pattern) != 0)) + 1
    edges = np.concatenate([[0], change, [G]])
    out: list[tuple[int, int]] = []
    b0 = 0
    quarter = max(block // 4, 1)
    for a, b in zip(edges[:-1], edges[1:]):
        a, b = int(a), int(b)
        if a > b0 and (a - b0 + (b - a) > block or (b - a >= quarter and a - b0 >= quarter)):
            out.append((b0, a))
            b0 = a
        while b - b0 >= block:
            out.append((b0, b0 + block))
            b0 += block
    if b0 < G:
        out.append((b0, G))
    return out


def _block(Y, mask, lags, diff, seasonal_scale, cols, H, cov, s, min_train, fit_ok=None, param_unc=False) -> dict:
    B, T = Y.shape
    C = len(cov)
    sums = {k: _Sums(B, H) for k in ("model", "naive", "snaive")}
    hits = np.zeros((C, B, H))
    n_orig = np.zeros(B, dtype=np.int64)
    out = lambda: dict(model=sums["model"], naive=sums["naive"], snaive=sums["snaive"],  # noqa: E731
                       hits=hits, n_origins=n_orig)
    has = mask.any(axis=1) | (np.ones(B, dtype=bool) if fit_ok is None else fit_ok)
    used = mask.any(axis=0)
    if not has.any() or len(cols) == 0 or len(lags) == 0:
        return out()
    if not used.any():
        used = np.arange(len(lags)) == 0  # only constant-mean models: one masked-out column
    # only the lag columns some series of this block uses
    lags_b = lags[used]
    mask = mask[:, used]
    order = np.argsort(lags_b)
    lags_b, mask = lags_b[order], mask[:, order]
    K = len(lags_b)
    k = mask.sum(axis=1)
    maxlag = np.max(np.where(mask, lags_b[None, :], 0), axis=1)
    n = np.isfinite(Y).sum(axis=1)
    first = T - n  # column of each series' first observation

    # modelled series: levels, or first differences (one more leading NaN)
    M = Y
    if diff.any():
        D = np.full_like(Y, np.nan)
        D[:, 1:] = Y[:, 1:] - Y[:, :-1]
        M = np.where(diff[:, None], D, Y)
    # the K lag rows and the series itself, each series shifted by its mean (as in fit_ar)
    ZT, shift = shifted_lag_stack(M, lags_b)
    start = first + diff + maxlag  # first target column of each regression
    t = np.arange(T)
    # expanding window: raw sums over the rows start..c, updated origin by origin
    S = np.zeros((B, K + 1, K + 1))
    ssum = np.zeros((B, K + 1))
    nobs = np.zeros(B)
    done = -1  # rows up to this column are in the sums

    # MASE scales at every column from prefix sums of in-sample naive errors
    S1, N1 = _prefix_abs_diff(Y, 1)
    Ss = Ns = None
    if s is not None and seasonal_scale.any():
        Ss, Ns = _prefix_abs_diff(Y, s)
    L = int(lags_b.max())
    W = L + 1
    steps = np.arange(1, H + 1)
    # history windows of every origin are read from one left-padded copy of Y
    Ypad = np.concatenate([np.full((B, W), np.nan), Y], axis=1)
    # origins are solved and forecast in groups: one batched call per group instead of
    # one per origin (the per-call cost of the small batched solves dominated)
    snaps: list[tuple[int, np.ndarray, np.ndarray, np.ndarray, np.ndarray]] = []
    for i, c in enumerate(cols):
        c = int(c)
        rows = slice(done + 1, c + 1)
        wnew = (t[None, rows] >= start[:, None]).astype(np.float64)
        Zn = ZT[:, :, rows]
        Znw = Zn * wnew[:, None, :]
        S += np.matmul(Znw, np.swapaxes(Zn, 1, 2))
        ssum += Znw.sum(axis=2)
        nobs += wnew.sum(axis=1)
        done = c
        ok = has & (nobs >= k + 1 + MIN_RESID_DF) & (c - first + 1 >= max(min_train, 1))
        if ok.any():
            snaps.append((c, ok, S[ok], ssum[ok], nobs[ok]))
        if snaps and (len(snaps) == ORIGIN_GROUP or i == len(cols) - 1):
            fcs = _forecast_origins(snaps, Ypad, mask, lags_b, diff, shift, H, cov, param_unc, W)
            hits += _score_origins(sums, n_orig, Y, [x[0] for x in snaps], [x[1] for x in snaps], fcs, S1, N1,
                                   (Ss, Ns) if s is not None and seasonal_scale.any() else None, seasonal_scale,
                                   s, steps, H)
            snaps = []
    return out()


#: origins solved and forecast in one batched call (bounds the batch at 8 x block rows)
ORIGIN_GROUP = 8


def _forecast_origins(snaps, Ypad, mask, lags_b, diff, shift, H, cov, param_unc, W) -> list[tuple]:
    """Refit and forecast every (origin, series) pair of a group of origins in one batch.

    ``snaps``: per origin ``(c, ok, S, ssum, nobs)`` with the expanding-window sums of
    the series that take part (``ok``). Returns per origin ``(mean, lower, upper, good)``
    for those series, ``good`` marking finite forecasts.
    """
    B = Ypad.shape[0]
    L = int(lags_b.max())
    b_idx = np.concatenate([np.flatnonzero(ok) for _, ok, *_ in snaps])
    c_idx = np.concatenate([np.full(int(ok.sum()), c) for c, ok, *_ in snaps])
    maskr = mask[b_idx]
    with np.errstate(all="ignore"):
        g = ols.gram_from_sums(np.concatenate([x[2] for x in snaps]), np.concatenate([x[3] for x in snaps]),
                               np.concatenate([x[4] for x in snaps]))
        # coefficients and RSS from the running sums alone: no pass over the rows per origin
        res, Ainv = ols.solve_with_inverse(g, maskr)
        sigma = np.sqrt(res.sigma2)
        # undo the shift y = x + m: b0 = a + m (1 - sum b)
        icpt = res.intercept + shift[b_idx] * (1.0 - res.beta.sum(axis=1))
    R = len(b_idx)
    phi = np.zeros((R, L))
    phi[:, lags_b - 1] = res.beta * maskr
    phi = nan_to_num(phi, copy=False)
    icpt = nan_to_num(icpt, copy=False)
    sig = nan_to_num(sigma)
    # the last W observed values up to each origin (column c of Y is column c + W of Ypad)
    hist = nan_to_num(Ypad[b_idx[:, None], c_idx[:, None] + 1 + np.arange(W)[None, :]])
    extra = {}
    if param_unc:
        with np.errstate(all="ignore"):
            V = cov_from_gram(g, maskr, lags_b, sig, shift[b_idx], inverse=Ainv, dense=False)
        extra = dict(coef_cov=V, df_resid=res.df_resid, coef_cov_lags=lags_b)  # forecast_ar zeroes NaN/inf itself
    with np.errstate(all="ignore"):
        fc = forecast_ar(hist, icpt, phi, sig, H, cov, diff[b_idx], **extra)
    good = np.isfinite(sigma) & np.isfinite(fc.mean).all(axis=1) & np.isfinite(fc.sd).all(axis=1)
    out = []
    r0 = 0
    for _, ok, *_ in snaps:
        r1 = r0 + int(ok.sum())
        out.append((fc.mean[r0:r1], fc.lower[:, r0:r1], fc.upper[:, r0:r1], good[r0:r1]))
        r0 = r1
    return out


def _score_origins(sums, n_orig, Y, cs, oks, fcs, S1, N1, seas, seasonal_scale, s, steps, H) -> np.ndarray:
    """:func:`_score` for a group of origins at once (bit-identical); returns the group's interval hits (C, B, H)."""
    B = Y.shape[0]
    O = len(cs)
    C = fcs[0][1].shape[0]
    c_arr = np.asarray(cs, dtype=np.int64)
    okb = np.zeros((O, B), dtype=bool)
    fmean = np.zeros((O, B, H))
    flo = np.zeros((C, O, B, H))
    fup = np.zeros((C, O, B, H))
    for o, (ok, (mean, lower, upper, good)) in enumerate(zip(oks, fcs)):
        rows = np.flatnonzero(ok)
        okb[o, rows[good]] = True
        fmean[o, rows] = mean
        flo[:, o, rows] = lower
        fup[:, o, rows] = upper
    actual = np.ascontiguousarray(Y[:, c_arr[:, None] + 1 + np.arange(H)[None, :]].transpose(1, 0, 2))  # (O, B, H)
    with np.errstate(invalid="ignore", divide="ignore"):
        scale = (S1[:, c_arr] / N1[:, c_arr]).T
        if seas is not None:
            scale = np.where(seasonal_scale[None, :], (seas[0][:, c_arr] / seas[1][:, c_arr]).T, scale)
    e = actual - fmean
    scored = okb[:, :, None] & np.isfinite(e)
    sums["model"].add_origins(e, scored, scale)
    sums["naive"].add_origins(actual - Y[:, c_arr].T[:, :, None], scored, scale)
    if s is not None:
        src = c_arr[:, None] - s + 1 + ((steps - 1) % s)[None, :]  # (O, H) last observed column of the same season
        prev = np.where(src[None] >= 0, Y[:, np.maximum(src, 0)], np.nan).transpose(1, 0, 2)
        sums["snaive"].add_origins(actual - prev, scored, scale)
    inside = (actual[None] >= flo) & (actual[None] <= fup) & scored[None]
    n_orig += scored.any(axis=2).sum(axis=0)
    return inside.sum(axis=1)


def _score(sums, hits, n_orig, Y, c, ok, good, mean, lower, upper, S1, N1, seas, seasonal_scale, s, steps, H) -> None:
    """Add one origin's errors (series ``ok`` forecast, ``good`` of them finite) to the running sums."""
    B = Y.shape[0]
    okb = np.zeros(B, dtype=bool)
    okb[np.flatnonzero(ok)[good]] = True
    okf = okb[:, None]
    fmean = np.zeros((B, H))
    fmean[ok] = mean
    flo = np.zeros((lower.shape[0], B, H))
    fup = np.zeros((lower.shape[0], B, H))
    flo[:, ok] = lower
    fup[:, ok] = upper
    actual = Y[:, c + 1 : c + 1 + H]
    with np.errstate(invalid="ignore", divide="ignore"):
        scale = S1[:, c] / N1[:, c]
        if seas is not None:
            scale = np.where(seasonal_scale, seas[0][:, c] / seas[1][:, c], scale)
    e = actual - fmean
    scored = okf & np.isfinite(e)
    sums["model"].add(e, scored, scale)
    sums["naive"].add(actual - Y[:, c : c + 1], scored, scale)
    if s is not None:
        src = c - s + 1 + (steps - 1) % s  # last observed column of the same season
        prev = np.where(src[None, :] >= 0, Y[:, np.maximum(src, 0)], np.nan)
        sums["snaive"].add(actual - prev, scored, scale)
    inside = (actual[None] >= flo) & (actual[None] <= fup) & scored[None]
    hits += inside
    n_orig += scored.any(axis=1)
