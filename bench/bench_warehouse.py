"""What the end-to-end benchmarks share: the seeded sample warehouse and the SQL AR(1) shortcut.

``job_speed.py``, ``warehouse_scale.py`` and the PostgreSQL, lakehouse and
Spark benchmarks build the same warehouse and race the same shortcut, so the
figures they print compare.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

#: the hand-written shortcut a warehouse user might write instead of arflow: AR(1) per series
#: with ``lag()`` and ``regr_slope``/``regr_intercept``, its one-step forecast written to a table
SHORTCUT_SQL = """
CREATE OR REPLACE TABLE shortcut_forecasts AS
WITH lagged AS (
    SELECT site, period, value, lag(value) OVER (PARTITION BY site ORDER BY period) AS prev
    FROM readings
), fits AS (
    SELECT site, regr_slope(value, prev) AS b1, regr_intercept(value, prev) AS b0,
           max(period) AS last_period, arg_max(value, period) AS last_value
    FROM lagged WHERE prev IS NOT NULL GROUP BY site
)
SELECT site, last_period + INTERVAL 1 MONTH AS period, b0 + b1 * last_value AS forecast FROM fits
"""


def build_warehouse(path: Path, G: int, T: int, season: int = 12, block: int = 100_000) -> None:
    """Table ``readings (site, period, value)`` in a DuckDB file: G seeded series of T periods.

    A third each AR(1), seasonal AR at lag ``season`` and random walks around
    level 500; monthly for ``season`` 12 (periods from 2015-01), weekly Mondays
    (from 2015-01-05) otherwise.
    """
    import duckdb
    import pyarrow as pa

    from arflow.sample.simulate import mixed_monthly, mixed_seasonal

    monthly = season == 12
    start = np.datetime64("2015-01", "M") if monthly else np.datetime64("2015-01-05", "D")
    periods = (start + np.arange(T)).astype("datetime64[D]") if monthly else start + 7 * np.arange(T)
    con = duckdb.connect(str(path))
    con.execute("CREATE TABLE readings (site VARCHAR, period DATE, value DOUBLE)")
    for b0 in range(0, G, block):
        g = min(block, G - b0)
        seed = 1000 + b0 // block
        Y = mixed_monthly(g, T, seed=seed, level=500.0) if monthly else mixed_seasonal(g, T, season, seed, 500.0)
        ids = np.char.add("site-", np.char.zfill(np.arange(b0, b0 + g).astype(str), 7))
        tbl = pa.table({"site": pa.array(np.repeat(ids, T)), "period": pa.array(np.tile(periods, g)),
                        "value": pa.array(Y.ravel())})
        con.register("chunk", tbl)
        con.execute("INSERT INTO readings SELECT * FROM chunk")
        con.unregister("chunk")
    con.close()


def run_shortcut(db: str) -> int:
    """Run :data:`SHORTCUT_SQL` on the warehouse file; returns the rows it wrote (the table is dropped)."""
    import duckdb

    con = duckdb.connect(db)
    try:
        con.execute(SHORTCUT_SQL)
        (rows,) = con.execute("SELECT count(*) FROM shortcut_forecasts").fetchone() or (0,)
        con.execute("DROP TABLE shortcut_forecasts")
    finally:
        con.close()
    return int(rows)
