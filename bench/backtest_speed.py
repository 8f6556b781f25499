"""Time of the rolling-origin backtest against the fit + forecast core on the same panel.

The core (:func:`arflow.core.pipeline.run_core`, one process) selects each
series' AR order (1..8 by BIC, plus the seasonal lag 12 candidate), decides unit
roots, runs the diagnostics and forecasts 12 steps. The backtest then refits
each series' chosen specification at the last 24 origins (the default) and forecasts 12
steps from each, scoring model, naive and seasonal naive.

    python bench/backtest_speed.py                          # 100,000 series x 120 months
    python bench/backtest_speed.py --series 20000 --origins 24

Prints both wall times, the backtest's time as a share of the core's, and the
peak resident memory (after the core and after the backtest).
"""

from __future__ import annotations

import argparse
import resource
import time

import numpy as np

from arflow.core.backtest import rolling_origin

from arflow.sample.simulate import mixed_monthly, to_panel
from arflow.core.pipeline import run_core
from arflow.settings import BacktestSettings, ForecastSettings, ModelSettings, Settings


def peak_rss_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--series", type=int, default=100_000)
    ap.add_argument("--periods", type=int, default=120)
    ap.add_argument("--origins", type=int, default=24)
    ap.add_argument("--horizon", type=int, default=12)
    args = ap.parse_args()
    G, T, H = args.series, args.periods, args.horizon
    Y = mixed_monthly(G, T)
    panel = to_panel(Y)
    settings = Settings(
        frequency="month",
        model=ModelSettings(order="auto", max_order=8, seasonal_lag="auto"),
        forecast=ForecastSettings(horizon=H, coverage=(0.8, 0.95)),
        backtest=BacktestSettings(enabled=False),  # the core alone; the backtest is timed below
    )
    warm = panel.take(np.arange(min(G, 2048)))
    r = run_core(warm, settings)
    rolling_origin(warm.values, r.fit.lag_mask, r.fit.lags, r.differenced, origins=2, horizon=H, season=12)

    t0 = time.perf_counter()
    res = run_core(panel, settings, workers=1)
    core_s = time.perf_counter() - t0
    peak_core = peak_rss_mib()
    t0 = time.perf_counter()
    bt = rolling_origin(panel.values, res.fit.lag_mask, res.fit.lags, res.differenced,
                        origins=args.origins, horizon=H, coverage=(0.8, 0.95), season=12)
    bt_s = time.perf_counter() - t0

    rel = bt.relative_rmse
    print(f"series {G:,} x periods {T}; {args.origins} origins, horizon {H}; one process")
    print(f"fit + forecast core : {core_s:8.2f} s")
    print(f"backtest            : {bt_s:8.2f} s  = {bt_s / core_s:.2f} x the core "
          f"({bt_s / args.origins:.2f} s per origin)")
    print(f"backtested series {np.mean(bt.n_origins > 0):.1%}; model RMSE < naive RMSE in "
          f"{np.mean(rel[np.isfinite(rel)] < 1):.1%}; coverage 80%/95% pooled "
          f"{np.nanmean(bt.coverage_rate_all[0]):.3f}/{np.nanmean(bt.coverage_rate_all[1]):.3f}")
    print(f"peak RSS {peak_rss_mib():,.0f} MiB (after the core: {peak_core:,.0f} MiB)")


if __name__ == "__main__":
    main()
