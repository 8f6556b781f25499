"""Cost of the selection-aware intervals (arflow.core.intervals) relative to the core without them.

    python bench/interval_speed.py [--series 20000] [--length 120] [--repeats 3]

Runs the core (backtest off) on one panel of mixed monthly series with
``forecast.selection_uncertainty`` off and on, interleaved and repeated, and
prints each time and the median ratio on/off (same run, so the ratio means
something on a shared machine), plus the time inside ``candidate_interval``.
"""

from __future__ import annotations

import argparse
import statistics
import time

from arflow.core import intervals, pipeline
from arflow.core.pipeline import run_core
from arflow.sample.simulate import mixed_monthly, to_panel
from arflow.settings import BacktestSettings, ForecastSettings, Settings


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--series", type=int, default=20000)
    ap.add_argument("--length", type=int, default=120)
    ap.add_argument("--repeats", type=int, default=3)
    a = ap.parse_args()
    panel = to_panel(mixed_monthly(a.series, a.length, 7))
    spent = [0.0]
    inner = intervals.candidate_interval

    def timed(*args, **kw):
        t = time.perf_counter()
        try:
            return inner(*args, **kw)
        finally:
            spent[0] += time.perf_counter() - t

    pipeline.intervals.candidate_interval = timed
    off, on, share = [], [], []
    for _ in range(a.repeats):
        for su, out in ((False, off), (True, on)):
            s = Settings(forecast=ForecastSettings(selection_uncertainty=su), backtest=BacktestSettings(enabled=False))
            spent[0] = 0.0
            t = time.perf_counter()
            run_core(panel, s)
            out.append(time.perf_counter() - t)
            if su:
                share.append(spent[0])
    print(f"{a.series} mixed monthly series x {a.length}, backtest off, {a.repeats} interleaved repeats")
    print(f"core, selection_uncertainty off: {statistics.median(off):7.2f} s  (runs: {', '.join(f'{x:.2f}' for x in off)})")
    print(f"core, selection_uncertainty on:  {statistics.median(on):7.2f} s  (runs: {', '.join(f'{x:.2f}' for x in on)})")
    print(f"  of which candidate_interval:   {statistics.median(share):7.2f} s")
    print(f"ratio on / off (median of the paired runs): {statistics.median([b / x for x, b in zip(off, on)]):.2f}x")


if __name__ == "__main__":
    main()
