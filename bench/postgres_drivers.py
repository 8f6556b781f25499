"""Which PostgreSQL driver arflow uses: psycopg 3 (COPY) vs adbc-driver-postgresql (Arrow-native), side by side.

Reads a long panel (key, period, value ordered by key, period) and bulk-loads a
forecasts-like table (key, period, step, three doubles, an array column) with
each driver, against the test harness's throwaway cluster (or
ARFLOW_TEST_PG_URL), and prints seconds, rows/s and ratios.

    python bench/postgres_drivers.py --series 20000 --periods 120
"""

from __future__ import annotations

import argparse
import io
import sys
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
from pg_server import server_from_environment  # noqa: E402


def panel(series: int, periods: int) -> pa.Table:
    rng = np.random.default_rng(7)
    keys = np.repeat(np.array([f"Z-{i:06d}" for i in range(series)], dtype=object), periods)
    start = np.datetime64("2014-01", "M")
    months = (start + np.arange(periods)).astype("datetime64[D]")
    return pa.table({"zone": pa.array(keys, pa.string()), "month": pa.array(np.tile(months, series)),
                     "value": rng.normal(100, 5, series * periods)})


def written(series: int, horizon: int) -> pa.Table:
    rng = np.random.default_rng(8)
    n = series * horizon
    keys = np.repeat(np.array([f"Z-{i:06d}" for i in range(series)], dtype=object), horizon)
    months = (np.datetime64("2024-01", "M") + np.arange(horizon)).astype("datetime64[D]")
    f = rng.normal(100, 5, n)
    lags = pa.array([[1, 2] for _ in range(n)], pa.list_(pa.int32()))
    return pa.table({"zone": pa.array(keys, pa.string()), "period": pa.array(np.tile(months, series)),
                     "step": pa.array(np.tile(np.arange(1, horizon + 1, dtype=np.int32), series)),
                     "forecast": f, "lower_95": f - 9.8, "upper_95": f + 9.8, "lags": lags})


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--series", type=int, default=20_000)
    ap.add_argument("--periods", type=int, default=120)
    ap.add_argument("--horizon", type=int, default=12)
    args = ap.parse_args()
    import adbc_driver_postgresql.dbapi as adbc
    import psycopg

    srv = server_from_environment()
    try:
        uri = f"postgresql://{srv.admin_user}:{srv.admin_password}@{srv.host}:{srv.port}/postgres"
        src = panel(args.series, args.periods)
        with adbc.connect(uri) as con, con.cursor() as cur:
            cur.execute("DROP TABLE IF EXISTS bench_panel")
            cur.execute("CREATE TABLE bench_panel (zone text NOT NULL, month date NOT NULL, value double precision)")
            cur.adbc_ingest("bench_panel", src, mode="append")
            cur.execute("ANALYZE bench_panel")
            con.commit()
        query = "SELECT zone, month, value FROM bench_panel ORDER BY zone, month"
        rows = src.num_rows
        res: dict[str, float] = {}

        t = time.perf_counter()
        with adbc.connect(uri) as con, con.cursor() as cur:
            cur.execute(query)
            n = sum(b.num_rows for b in cur.fetch_record_batch())
        res["read adbc (Arrow stream)"] = time.perf_counter() - t
        assert n == rows

        t = time.perf_counter()
        with psycopg.connect(srv.admin_conninfo()) as con, con.cursor() as cur:
            buf = io.BytesIO()
            with cur.copy(f"COPY ({query}) TO STDOUT (FORMAT csv)") as cp:
                for block in cp:
                    buf.write(block)  # a real reader would feed pyarrow's streaming CSV reader block by block
            buf.seek(0)
            tab = pacsv.read_csv(buf, read_options=pacsv.ReadOptions(column_names=["zone", "month", "value"]),
                                 convert_options=pacsv.ConvertOptions(column_types={"zone": pa.string(), "month": pa.date32()}))
        res["read psycopg COPY csv -> pyarrow csv"] = time.perf_counter() - t
        assert tab.num_rows == rows

        t = time.perf_counter()
        with psycopg.connect(srv.admin_conninfo()) as con, con.cursor(name="bench") as cur:
            cur.itersize = 50_000
            cur.execute(query)
            n = 0
            while batch := cur.fetchmany(50_000):
                n += len(batch)
        res["read psycopg server-side cursor (tuples)"] = time.perf_counter() - t

        out = written(args.series, args.horizon)
        ddl = ("CREATE TABLE bench_out (zone text NOT NULL, period date NOT NULL, step integer NOT NULL, "
               "forecast double precision, lower_95 double precision, upper_95 double precision, lags integer[])")
        wrows = out.num_rows

        def fresh(cur) -> None:
            cur.execute("DROP TABLE IF EXISTS bench_out")
            cur.execute(ddl)

        with adbc.connect(uri) as con, con.cursor() as cur:
            fresh(cur)
            con.commit()
            t = time.perf_counter()
            cur.adbc_ingest("bench_out", out, mode="append")
            con.commit()
            res["write adbc_ingest (binary COPY)"] = time.perf_counter() - t

        with psycopg.connect(srv.admin_conninfo()) as con, con.cursor() as cur:
            fresh(cur)
            con.commit()
            t = time.perf_counter()
            flat = out.drop(["lags"])
            sink = io.BytesIO()
            pacsv.write_csv(flat, sink, write_options=pacsv.WriteOptions(include_header=False))
            with cur.copy("COPY bench_out (zone, period, step, forecast, lower_95, upper_95) FROM STDIN (FORMAT csv)") as cp:
                cp.write(sink.getvalue())
            con.commit()
            res["write psycopg COPY csv (pyarrow csv, no array column)"] = time.perf_counter() - t

            fresh(cur)
            con.commit()
            t = time.perf_counter()
            with cur.copy("COPY bench_out FROM STDIN (FORMAT binary)") as cp:
                cp.set_types(["text", "date", "int4", "float8", "float8", "float8", "int4[]"])
                for row in zip(*(c.to_pylist() for c in out.columns)):
                    cp.write_row(row)
            con.commit()
            res["write psycopg COPY binary write_row"] = time.perf_counter() - t
        print(f"read {rows:,} rows ({args.series:,} series x {args.periods}); write {wrows:,} rows")
        base_r = res["read adbc (Arrow stream)"]
        base_w = res["write adbc_ingest (binary COPY)"]
        for k, v in res.items():
            base = base_r if k.startswith("read") else base_w
            n = rows if k.startswith("read") else wrows
            print(f"  {k:58s} {v:7.2f} s  {n / v:12,.0f} rows/s  x{v / base:5.2f} of adbc")
    finally:
        srv.stop()


if __name__ == "__main__":
    main()
