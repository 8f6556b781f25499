"""PostgreSQL end to end vs the DuckDB path, and arflow's publish vs a plain bulk COPY of the same rows.

    python bench/postgres_speed.py                       # 100,000 series x 120 months
    python bench/postgres_speed.py --series 20000

Uses ARFLOW_TEST_PG_URL's server (a role that may create databases) or starts
a throwaway cluster like the tests (tests/pg_server.py). In one process, side
by side:

* ``arflow run`` DuckDB -> DuckDB (the reference path);
* ``arflow run`` PostgreSQL -> PostgreSQL (the same rows loaded into a table);
* the publish step of that run, split into its parts (timed by wrapping the
  target's methods from here; nothing in arflow is changed for the bench);
* a plain ``COPY`` (binary, Arrow in) of the very rows that run published,
  into tables of the same columns, in one transaction: the floor the
  publish is measured against (goal: publish within 2x of it);
* a re-run of the same vintage (deletes the previous attempt's rows too).
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from collections import defaultdict
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(HERE.parent / "tests"))

import pg_server  # noqa: E402
from warehouse_scale import JOB, build_warehouse  # noqa: E402

PG_JOB = JOB.replace('database = "{db}"', 'postgres = "{url}"').replace('table = "readings"', 'table = "public.readings"') \
    .replace('database = "{out}"', 'postgres = "{url}"')
TABLES = ("models", "series_status", "gates", "residual_acf", "forecasts", "backtests")


def load_into_postgres(duck: Path, admin_url: str) -> float:
    import adbc_driver_postgresql.dbapi as dbapi
    import duckdb
    import pyarrow as pa

    t0 = time.perf_counter()
    src = duckdb.connect(str(duck), read_only=True)
    reader = src.sql("SELECT site, period, value FROM readings").to_arrow_reader(500_000)
    schema = pa.schema([pa.field("site", pa.string()), pa.field("period", pa.date32()), pa.field("value", pa.float64())])
    with dbapi.connect(admin_url) as con, con.cursor() as cur:
        cur.execute("DROP TABLE IF EXISTS public.readings")
        cur.execute("CREATE TABLE public.readings (site text NOT NULL, period date NOT NULL, value double precision)")
        for batch in reader:
            cur.adbc_ingest("readings", pa.Table.from_batches([batch]).cast(schema), mode="append", db_schema_name="public")
        cur.execute("ANALYZE public.readings")
        con.commit()
    src.close()
    return time.perf_counter() - t0


def instrument() -> dict[str, float]:
    """Wrap the PostgreSQL target's steps to time them (bench only)."""
    from arflow.warehouse import postgres_target as pt

    spent: dict[str, float] = defaultdict(float)

    def wrap(cls, name, label_of):
        original = getattr(cls, name)

        def timed(self, *args, **kwargs):
            t0 = time.perf_counter()
            try:
                return original(self, *args, **kwargs)
            finally:
                spent[label_of(args)] += time.perf_counter() - t0
        setattr(cls, name, timed)

    wrap(pt.PostgresTarget, "_load", lambda a: f"COPY {a[1]}")
    wrap(pt.PostgresTarget, "_insert_status", lambda a: "series_status (INSERT ... SELECT from models)")
    wrap(pt.PostgresTarget, "_delete_forecasts_keeping_vetted", lambda a: "keep-previous delete of forecasts")
    wrap(pt.PostgresTarget, "_record_accuracy", lambda a: "accuracy (actuals COPY + scoring)")
    wrap(pt.PostgresTarget, "_ensure_tables", lambda a: "checks + DDL")
    wrap(pt.PostgresTarget, "_lock", lambda a: "advisory lock")
    wrap(pt.PostgresTarget, "_ensure_views", lambda a: "views")
    wrap(pt.PostgresPublication, "commit", lambda a: "COMMIT")
    original_exec = pt._exec

    def exec_timed(con, sql, params=None):
        t0 = time.perf_counter()
        try:
            return original_exec(con, sql, params)
        finally:
            if sql.lstrip().startswith("DELETE"):
                spent["deletes of the vintage's earlier rows"] += time.perf_counter() - t0
    pt._exec = exec_timed
    return spent


def plain_copy(admin_url: str, run_id: str) -> tuple[float, int]:
    """Read back what the run published, then time a plain binary COPY of those rows in one transaction."""
    import adbc_driver_postgresql.dbapi as dbapi

    data = {}
    with dbapi.connect(admin_url) as con, con.cursor() as cur:
        for t in TABLES:
            cur.execute(f"SELECT * FROM arflow.{t} WHERE run_id = $1", (run_id,))
            tab = cur.fetch_arrow_table()
            data[t] = tab.replace_schema_metadata(None).cast(
                __import__("pyarrow").schema([__import__("pyarrow").field(f.name, f.type) for f in tab.schema]))
        cur.execute("DROP SCHEMA IF EXISTS plain CASCADE")
        cur.execute("CREATE SCHEMA plain")
        for t in TABLES:
            cur.execute(f"CREATE TABLE plain.{t} (LIKE arflow.{t})")
        con.commit()
        t0 = time.perf_counter()
        for t in TABLES:
            cur.adbc_ingest(t, data[t], mode="append", db_schema_name="plain")
        con.commit()
        seconds = time.perf_counter() - t0
        cur.execute("DROP SCHEMA plain CASCADE")
        con.commit()
    return seconds, sum(v.num_rows for v in data.values())


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--series", type=int, default=100_000)
    ap.add_argument("--periods", type=int, default=120)
    ap.add_argument("--chunk-series", type=int, default=20_000)
    args = ap.parse_args()
    from arflow.job import run_job
    from arflow.job_file import load_job

    server = pg_server.server_from_environment()
    work = Path(tempfile.mkdtemp(prefix="arflow-pg-bench-"))
    try:
        admin_db = "arflow_bench"
        with pg_server.admin(server) as con:
            pg_server.execute(con, f"DROP DATABASE IF EXISTS {admin_db} WITH (FORCE)")
            pg_server.execute(con, f"CREATE DATABASE {admin_db}")
        passfile = work / "pgpass"
        passfile.write_text(pg_server.passfile_text(server), encoding="ascii")
        passfile.chmod(0o600)
        os.environ["PGPASSFILE"] = str(passfile)
        url = server.url(database=admin_db)
        admin_url = server.admin_url(admin_db)

        duck = work / "warehouse.duckdb"
        t0 = time.perf_counter()
        build_warehouse(duck, args.series, args.periods)
        print(f"{args.series:,} series x {args.periods} periods = {args.series * args.periods:,} rows "
              f"(built in {time.perf_counter() - t0:.1f} s)")
        print(f"  load into PostgreSQL (binary COPY)      {load_into_postgres(duck, admin_url):8.2f} s")

        common = dict(chunk=args.chunk_series, workers=1, backtest="false")
        (work / "duck.toml").write_text(JOB.format(db=duck, out=work / "out.duckdb", **common))
        (work / "pg.toml").write_text(PG_JOB.format(url=url, **common))

        t0 = time.perf_counter()
        d = run_job(load_job(work / "duck.toml"))
        duck_s = time.perf_counter() - t0
        spent = instrument()
        t0 = time.perf_counter()
        p = run_job(load_job(work / "pg.toml"))
        pg_s = time.perf_counter() - t0
        first = dict(spent)
        spent.clear()
        t0 = time.perf_counter()
        run_job(load_job(work / "pg.toml"))
        rerun_s = time.perf_counter() - t0
        rerun_parts = dict(spent)
        plain_s, rows = plain_copy(admin_url, p.run_id)
        assert d.series_published == p.series_published, (d.series_published, p.series_published)

        print("\nend to end (one process, chunk_series = {:,})".format(args.chunk_series))
        print(f"  DuckDB -> DuckDB                        {duck_s:8.2f} s   phases {d.phase_seconds}")
        print(f"  PostgreSQL -> PostgreSQL                {pg_s:8.2f} s   phases {p.phase_seconds}   x{pg_s / duck_s:.2f} of DuckDB")
        print(f"  PostgreSQL re-run of the same vintage   {rerun_s:8.2f} s")
        publish = p.phase_seconds.get("publish", float("nan"))
        print(f"\npublish step vs a plain COPY of the same {rows:,} rows")
        print(f"  arflow publish (first run)              {publish:8.2f} s")
        print(f"  plain binary COPY, one transaction      {plain_s:8.2f} s")
        print(f"  ratio                                   {publish / plain_s:8.2f} x   (goal: at most 2x)")
        print("\nwhere the publish's time goes (first run; re-run)")
        for k in sorted(set(first) | set(rerun_parts), key=lambda k: -first.get(k, 0.0)):
            print(f"  {k:46s} {first.get(k, 0.0):7.2f} s  {rerun_parts.get(k, 0.0):7.2f} s")
    finally:
        server.stop()
        import shutil

        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
