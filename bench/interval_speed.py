"""Cost of the selection-aware intervals (arflow.core.intervals) relative to the core without them.

    python bench/interval_speed.py [--series 20000] [--length 120] [--repeats 3]

Runs the core (backtest off) on one panel of mixed monthly series with
``forecast.selection_uncertainty`` off and on, interleaved and repeated, and
prints each time (wall and this process's CPU time: on a shared machine the
CPU time is the steadier figure) and the median ratio on/off of the paired
runs, plus the CPU time inside ``candidate_interval``.
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
        t = time.process_time()
        try:
            return inner(*args, **kw)
        finally:
            spent[0] += time.process_time() - t

    pipeline.intervals.candidate_interval = timed
    off, on, share, cpu_off, cpu_on = [], [], [], [], []
    for _ in range(a.repeats):
        for su, out, cpu in ((False, off, cpu_off), (True, on, cpu_on)):
            s = Settings(forecast=ForecastSettings(selection_uncertainty=su), backtest=BacktestSettings(enabled=False))
            spent[0] = 0.0
            t, c = time.perf_counter(), time.process_time()
            run_core(panel, s)
            out.append(time.perf_counter() - t)
            cpu.append(time.process_time() - c)
            if su:
                share.append(spent[0])
    print(f"{a.series} mixed monthly series x {a.length}, backtest off, {a.repeats} interleaved repeats")
    for label, w, c in (("off", off, cpu_off), ("on ", on, cpu_on)):
        print(f"core, selection_uncertainty {label}: wall {statistics.median(w):6.2f} s, CPU {statistics.median(c):6.2f} s"
              f"  (CPU runs: {', '.join(f'{x:.2f}' for x in c)})")
    print(f"  of which candidate_interval (CPU): {statistics.median(share):6.2f} s")
    print(f"ratio on / off, median of the paired runs: CPU {statistics.median([b / x for x, b in zip(cpu_off, cpu_on)]):.2f}x,"
          f" wall {statistics.median([b / x for x, b in zip(off, on)]):.2f}x")


if __name__ == "__main__":
    main()
