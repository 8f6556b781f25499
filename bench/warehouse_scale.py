"""End-to-end scale benchmark: arflow run vs the SQL AR(1) shortcut vs a plain scan, side by side.

    python bench/warehouse_scale.py                       # G = 10,000 and 100,000, T = 120
    python bench/warehouse_scale.py --series 1000000      # one size
    python bench/warehouse_scale.py --series 100000 --workers 1 2

For each size G it builds a DuckDB warehouse (seeded generator: AR(1),
seasonal AR and random-walk series, monthly, one VARCHAR key) in a temporary
folder and times, each in a fresh subprocess (so peak memory is per task):

* ``arflow run``: read, order selection up to 8 with the seasonal candidate,
  diagnostics, gates, 12-step forecasts at 80% and 95%, publish to DuckDB
  (backtest off; ``--backtest`` also times a run with it on and prints its share);
* the SQL shortcut: AR(1) per series with ``lag()`` and ``regr_slope`` /
  ``regr_intercept`` plus its one-step forecast, written to a table;
* a plain grouped scan (the floor: reading the data once);
* the statsmodels per-series loop doing arflow's work on 300 series, scaled.

Prints wall time, peak resident memory and the ratios arflow/SQL,
arflow/scan and loop/arflow, plus arflow's own phase profile.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from arflow.sample.simulate import mixed_monthly

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_warehouse import build_warehouse, run_shortcut  # noqa: E402,F401  (re-exported for the other benchmarks)

HERE = Path(__file__).resolve().parent


def peak_mib() -> float:
    own = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    kids = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    return (own + kids) / 1024.0  # own peak + the largest child's peak (an upper bound)


JOB = """\
[job]
name = "scale_bench"

[source]
database = "{db}"
table = "readings"
keys = ["site"]
period = "period"
value = "value"
frequency = "month"

[model]
order = "auto"
max_order = 8
seasonal_lag = "auto"

[forecast]
horizon = 12
coverage = [0.8, 0.95]

[publish]
database = "{out}"

[backtest]
enabled = {backtest}

[run]
chunk_series = {chunk}
workers = {workers}
"""

def task(kind: str, db: str, workdir: str, workers: int, chunk: int, backtest: bool = False) -> dict:
    import duckdb

    t0 = time.perf_counter()
    extra: dict = {}
    if kind == "arflow":
        from arflow.job import run_job
        from arflow.job_file import load_job

        out = Path(workdir) / f"published_{workers}_{int(backtest)}.duckdb"
        out.unlink(missing_ok=True)
        job = Path(workdir) / f"job_{workers}_{int(backtest)}.toml"
        job.write_text(JOB.format(db=db, out=out, chunk=chunk, workers=workers, backtest=str(backtest).lower()))
        outcome = run_job(load_job(job))
        extra = {"published": outcome.series_published, "series": outcome.series_total,
                 "phases": dict(getattr(outcome, "phase_seconds", {}) or {})}
    elif kind == "sql":
        extra = {"rows": run_shortcut(db)}
    elif kind == "scan":
        con = duckdb.connect(db, read_only=True)
        extra = {"groups": len(con.execute(
            "SELECT site, count(*), sum(value), max(period) FROM readings GROUP BY site").fetchall())}
        con.close()
    elif kind == "loop":
        sys.path.insert(0, str(HERE))
        from core_speed import statsmodels_loop

        Y = mixed_monthly(300, 120, seed=1, level=500.0)
        secs = statsmodels_loop(Y)
        return {"seconds": secs, "per_series": secs / 300, "rss_mib": peak_mib()}
    return {"seconds": time.perf_counter() - t0, "rss_mib": peak_mib(), **extra}


def run_task(kind: str, db: Path, workdir: Path, workers: int = 1, chunk: int = 20_000, backtest: bool = False) -> dict:
    cmd = [sys.executable, __file__, "--task", kind, "--db", str(db), "--workdir", str(workdir),
           "--workers", str(workers), "--chunk-series", str(chunk)] + (["--backtest"] if backtest else [])
    out = subprocess.run(cmd, check=True, capture_output=True, text=True, env=os.environ.copy())
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description="arflow end-to-end scale benchmark")
    ap.add_argument("--series", type=int, nargs="+", default=[10_000, 100_000])
    ap.add_argument("--periods", type=int, default=120)
    ap.add_argument("--workers", type=int, nargs="+", default=[2])
    ap.add_argument("--chunk-series", type=int, default=20_000)
    ap.add_argument("--backtest", action="store_true", help="also time a run with the backtest on (its share)")
    ap.add_argument("--task")
    ap.add_argument("--db")
    ap.add_argument("--workdir")
    a = ap.parse_args()
    if a.task:
        print(json.dumps(task(a.task, a.db, a.workdir, a.workers[0], a.chunk_series, a.backtest), default=str))
        return
    loop = run_task("loop", Path("-"), Path("-"))
    print(f"statsmodels loop: {loop['per_series'] * 1e3:.2f} ms per series (300-series sample)")
    header = (f"{'series':>10} {'wk':>3} {'arflow s':>9} {'sql s':>7} {'scan s':>7} {'arflow/sql':>10} "
              f"{'arflow/scan':>11} {'loop/arflow':>11} {'arflow MiB':>10} {'sql MiB':>8}")
    print(header)
    for G in a.series:
        with tempfile.TemporaryDirectory(prefix="arflow-bench-") as tmp:
            tmp = Path(tmp)
            db = tmp / "warehouse.duckdb"
            t0 = time.perf_counter()
            build_warehouse(db, G, a.periods)
            build_s = time.perf_counter() - t0
            scan = run_task("scan", db, tmp)
            sql = run_task("sql", db, tmp)
            for workers in a.workers:
                arf = run_task("arflow", db, tmp, workers, a.chunk_series)
                loop_total = loop["per_series"] * G
                print(f"{G:>10,} {workers:>3} {arf['seconds']:>9.2f} {sql['seconds']:>7.2f} {scan['seconds']:>7.2f} "
                      f"{arf['seconds'] / sql['seconds']:>10.2f} {arf['seconds'] / scan['seconds']:>11.1f} "
                      f"{loop_total / arf['seconds']:>10.0f}x {arf['rss_mib']:>10,.0f} {sql['rss_mib']:>8,.0f}")
                if arf.get("phases"):
                    phases = ", ".join(f"{k} {v:.2f}s" for k, v in arf["phases"].items())
                    print(f"{'':>14} phases: {phases}; per series {arf['seconds'] / G * 1e6:.1f} us")
                if a.backtest:
                    bt = run_task("arflow", db, tmp, workers, a.chunk_series, backtest=True)
                    extra = bt["seconds"] - arf["seconds"]
                    print(f"{'':>14} with the backtest (24 origins): {bt['seconds']:.2f}s, "
                          f"backtest share {extra / bt['seconds']:.0%} of the run, peak {bt['rss_mib']:,.0f} MiB")
            print(f"{'':>14} (warehouse built in {build_s:.1f}s)")


if __name__ == "__main__":
    main()
