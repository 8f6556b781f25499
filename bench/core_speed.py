"""Speed of the statistical core on an in-memory panel, against a statsmodels per-series loop.

Work per series (both sides): AR order selection 1..8 by BIC on a common
sample, the seasonal-lag candidate (lag 12), the unit-root check (ADF, KPSS),
residual Ljung-Box test at 12 lags, and 12-step forecasts with 80% and 95%
prediction intervals.

    python bench/core_speed.py                 # 100,000 series x 120 months
    python bench/core_speed.py --series 20000 --loop-sample 100

Prints wall time, series per second, peak resident memory and the ratio
against the statsmodels loop (timed on a sample, scaled per series). Both are
measured in the same run, so the ratio is meaningful on a noisy machine.
"""

from __future__ import annotations

import argparse
import resource
import time
import warnings

import numpy as np


from arflow.sample.simulate import mixed_monthly, to_panel
from arflow.core.pipeline import run_core
from arflow.settings import BacktestSettings, ForecastSettings, ModelSettings, Settings


def peak_rss_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def statsmodels_loop(Y: np.ndarray) -> float:
    """The same work per series with statsmodels (seconds for all rows of Y)."""
    from statsmodels.stats.diagnostic import acorr_ljungbox
    from statsmodels.tsa.ar_model import AutoReg, ar_select_order
    from statsmodels.tsa.stattools import adfuller, kpss

    warnings.simplefilter("ignore")
    t0 = time.perf_counter()
    for y in Y:
        sel = ar_select_order(y, 8, ic="bic", trend="c")
        lags = list(sel.ar_lags or [1])
        base = AutoReg(y, lags, trend="c", hold_back=12).fit()
        seas = AutoReg(y, lags + [12], trend="c", hold_back=12).fit()
        if seas.bic < base.bic:
            lags = lags + [12]
        res = AutoReg(y, lags, trend="c").fit()
        adfuller(y, maxlag=max(lags) - 1, autolag=None)
        kpss(y, nlags="auto")
        acorr_ljungbox(res.resid, lags=[12], model_df=len(lags))
        pred = res.get_prediction(start=len(y), end=len(y) + 11)
        pred.conf_int(alpha=0.2)
        pred.conf_int(alpha=0.05)
    return time.perf_counter() - t0


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--series", type=int, default=100_000)
    ap.add_argument("--periods", type=int, default=120)
    ap.add_argument("--loop-sample", type=int, default=300)
    ap.add_argument("--workers", type=int, default=2)
    args = ap.parse_args()
    G, T = args.series, args.periods
    Y = mixed_monthly(G, T)
    panel = to_panel(Y)
    settings = Settings(
        frequency="month",
        model=ModelSettings(order="auto", max_order=8, seasonal_lag="auto"),
        forecast=ForecastSettings(horizon=12, coverage=(0.8, 0.95)),
        backtest=BacktestSettings(enabled=False),  # timed on its own (bench/backtest_speed.py)
    )
    base_rss = peak_rss_mib()
    run_core(panel.take(np.arange(min(G, 4096))), settings)  # warm-up
    rows = []
    for workers in sorted({1, args.workers}):
        t0 = time.perf_counter()
        res = run_core(panel, settings, workers=workers)
        dt = time.perf_counter() - t0
        rows.append((workers, dt))
    peak = peak_rss_mib()
    sample = Y[: args.loop_sample]
    loop_s = statsmodels_loop(sample)
    loop_per_series = loop_s / len(sample)
    print(f"series {G:,} x periods {T}; published {res.outcome.published.mean():.1%}")
    print(f"{'workers':>8} {'seconds':>9} {'series/s':>12} {'loop/arflow':>12}")
    for workers, dt in rows:
        print(f"{workers:>8} {dt:>9.2f} {G / dt:>12,.0f} {loop_per_series * G / dt:>12,.0f}x")
    print(f"statsmodels loop: {loop_per_series * 1e3:.2f} ms/series on {len(sample)} series "
          f"-> {loop_per_series * G:,.0f} s scaled to {G:,}")
    print(f"peak RSS {peak:,.0f} MiB (before the core ran: {base_rss:,.0f} MiB)")


if __name__ == "__main__":
    main()
