"""Cost of reading the ``published_forecasts`` view against a plain scan of the latest vintage's forecasts.

Builds a synthetic target in memory: G series, V monthly vintages, 12 steps,
10% of series quarantined per vintage (keep-previous), and times

* ``view``: ``SELECT count(*), sum(forecast) FROM published_forecasts``
  (latest vintage per series, kept forecasts of quarantined series, expiry);
* ``scan``: the same aggregate over the latest vintage's ``forecasts`` rows.

    python bench/published_view.py                    # 100,000 series x 3 vintages
    python bench/published_view.py --series 20000 --vintages 12

Prints the best of three wall times and their ratio (same run; the machine is shared).
"""

from __future__ import annotations

import argparse
import time

import duckdb

from arflow.warehouse.contract import TableLayout
from arflow.warehouse.duckdb_target import DDL_FILES, render_sql


def best(con: duckdb.DuckDBPyConnection, sql: str) -> tuple[float, tuple]:
    times, row = [], None
    for _ in range(3):
        start = time.perf_counter()
        row = con.execute(sql).fetchone()
        times.append(time.perf_counter() - start)
    return min(times), row


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--series", type=int, default=100_000)
    ap.add_argument("--vintages", type=int, default=3)
    ap.add_argument("--horizon", type=int, default=12)
    args = ap.parse_args()
    layout = TableLayout("arflow", ("site",), ("VARCHAR",), "DATE")
    con = duckdb.connect(":memory:")
    con.execute("CREATE SCHEMA arflow")
    for name in DDL_FILES:
        con.execute(render_sql(name, layout))
    con.execute(
        f"INSERT INTO arflow.series_status SELECT 'j@' || v, 'j', DATE '2025-01-01' + INTERVAL (v) MONTH, 's' || g, "
        f"CASE WHEN hash(g, v) % 10 = 0 THEN 'quarantined' ELSE 'published' END, 'keep-previous' "
        f"FROM range({args.series}) t(g), range({args.vintages}) u(v)"
    )
    con.execute(
        f"INSERT INTO arflow.forecasts (run_id, site, period, step, forecast) "
        f"SELECT s.run_id, s.site, s.as_of + INTERVAL (h) MONTH, h, random() "
        f"FROM arflow.series_status s, range(1, {args.horizon + 1}) w(h) WHERE decision = 'published'"
    )
    con.execute("INSERT INTO arflow.job_policy VALUES ('j', 'month', NULL)")
    con.execute(render_sql("published_forecasts", layout))
    (rows,) = con.execute("SELECT count(*) FROM arflow.forecasts").fetchone()
    t_view, r_view = best(con, "SELECT count(*), sum(forecast) FROM arflow.published_forecasts")
    t_scan, r_scan = best(con, f"SELECT count(*), sum(forecast) FROM arflow.forecasts WHERE run_id = 'j@{args.vintages - 1}'")
    print(f"{args.series:,} series x {args.vintages} vintages: {rows:,} forecast rows")
    print(f"  view  {t_view:7.3f} s  ({r_view[0]:,} rows shown)")
    print(f"  scan  {t_scan:7.3f} s  ({r_scan[0]:,} rows of the latest vintage)")
    print(f"  view / scan = {t_view / t_scan:.1f}x")


if __name__ == "__main__":
    main()
