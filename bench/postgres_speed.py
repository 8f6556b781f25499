"""PostgreSQL end to end vs the DuckDB path, and arflow's publish vs a plain bulk COPY of the same rows.

    python bench/postgres_speed.py                       # 100,000 series x 120 months
    python bench/postgres_speed.py --series 20000

Uses ARFLOW_TEST_PG_URL's server (a role that may create databases) or starts
a throwaway cluster like the tests (tests/pg_server.py). In one process, side
by side:

* ``arflow run`` DuckDB -> DuckDB (the reference path);
* ``arflow run`` PostgreSQL -> PostgreSQL (the same rows loaded into a table);
* reading alone (checks + all chunks, no fitting) from each source;
* the publish step of that run alone (its staged rows kept), into a fresh
  schema, split into its parts (timed by wrapping the target's methods from
  here; nothing in arflow is changed for the bench), alternating with
* a plain ``COPY`` (binary, Arrow in memory) of the very rows the publish
  writes, into tables of the same columns, in one transaction: the floor the
  publish is measured against (goal: publish within 2x of it);
* a re-run of the same vintage (deletes the first attempt's rows too).
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

    wrap(pt.PostgresTarget, "_load", lambda a: f"COPY {a[1]} (Parquet stage -> Arrow -> binary COPY)")
    wrap(pt.PostgresTarget, "_insert_status", lambda a: "series_status (INSERT ... SELECT from models)")
    wrap(pt.PostgresTarget, "_delete_forecasts_keeping_vetted", lambda a: "keep-previous delete of forecasts")
    wrap(pt.PostgresTarget, "_record_accuracy", lambda a: "accuracy (actuals COPY + scoring)")
    wrap(pt.PostgresTarget, "_ensure_tables", lambda a: "checks + DDL")
    wrap(pt.PostgresTarget, "lock_schema", lambda a: "advisory lock")
    wrap(pt.PostgresTarget, "_ensure_views", lambda a: "views")
    wrap(pt.PostgresPublication, "commit", lambda a: "COMMIT")
    original_exec = pt.execute

    def exec_timed(con, sql, params=None):
        t0 = time.perf_counter()
        try:
            return original_exec(con, sql, params)
        finally:
            if sql.lstrip().startswith("DELETE"):
                spent["deletes of the vintage's earlier rows"] += time.perf_counter() - t0
    pt.execute = exec_timed
    return spent


class KeptStage:
    """A copy of a run's staged Parquet parts (the job removes its own stage after publishing)."""

    TABLES = ("models", "gates", "residual_acf", "forecasts", "backtests", "actuals")

    def __init__(self, folder: Path) -> None:
        self.dir = folder

    @classmethod
    def copy_of(cls, staged, folder: Path) -> "KeptStage":
        import shutil

        for t in cls.TABLES:
            (folder / t).mkdir(parents=True, exist_ok=True)
            for f in staged.files(t):
                shutil.copy(f, folder / t / Path(f).name)
        return cls(folder)

    def files(self, table: str) -> list[str]:
        return sorted(str(p) for p in (self.dir / table).glob("*.parquet"))


def keep_stage(folder: Path) -> dict:
    """Keep the record and a copy of the stage of the next PostgreSQL publish."""
    from arflow.warehouse import postgres_target as pt

    kept: dict = {}
    original = pt.PostgresTarget.prepare

    def prepare(self, record, staged, *args, **kwargs):
        if "stage" not in kept:
            kept["stage"] = KeptStage.copy_of(staged, folder)
            kept["record"] = record
            kept["layout"] = self.layout
            kept["address"] = self.address
        return original(self, record, staged, *args, **kwargs)
    pt.PostgresTarget.prepare = prepare
    return kept


def publish_into(kept: dict, schema: str) -> float:
    from dataclasses import replace

    from arflow.warehouse.postgres_target import PostgresTarget

    target = PostgresTarget(kept["address"], replace(kept["layout"], schema=schema))
    t0 = time.perf_counter()
    pending = target.prepare(kept["record"], kept["stage"])
    pending.commit()
    return time.perf_counter() - t0


def plain_rows(kept: dict, admin_url: str, schema: str) -> dict:
    """The rows the publish writes, as Arrow tables of the target's column types (built before timing)."""
    import adbc_driver_postgresql.dbapi as dbapi
    import pyarrow as pa
    import pyarrow.parquet as pq

    from arflow.warehouse.postgres_target import table_columns, arrow_type

    record, layout = kept["record"], kept["layout"]
    with dbapi.connect(admin_url) as con:
        columns = table_columns(con, schema)
    out = {}
    for t in ("models", "gates", "residual_acf", "forecasts", "backtests"):
        parts = []
        for f in kept["stage"].files(t):
            part = pq.read_table(f)
            names = [c for c in part.column_names if c in columns[t] and c != "run_id"]
            part = part.select(names).append_column("run_id", pa.array([record.run_id] * part.num_rows, pa.string()))
            parts.append(part.cast(pa.schema([pa.field(n, arrow_type(columns[t][n])) for n in part.column_names])))
        if parts:
            out[t] = pa.concat_tables(parts)
    models = out["models"]
    n = models.num_rows
    status = {"run_id": pa.array([record.run_id] * n, pa.string()), "job": pa.array([record.job] * n, pa.string()),
              "as_of": pa.array([record.as_of] * n, arrow_type(columns["series_status"]["as_of"]))}
    for k in layout.keys:
        status[k] = models.column(k)
    status["decision"] = models.column("decision")
    status["on_failure"] = pa.array([record.on_failure] * n, pa.string())
    out["series_status"] = pa.table(status)
    return out


def plain_copy(admin_url: str, like: str, rows: dict) -> float:
    """A plain binary COPY of ``rows`` into fresh tables of the same columns, in one transaction."""
    import adbc_driver_postgresql.dbapi as dbapi

    with dbapi.connect(admin_url) as con, con.cursor() as cur:
        cur.execute("DROP SCHEMA IF EXISTS plain CASCADE")
        cur.execute("CREATE SCHEMA plain")
        for t in rows:
            cur.execute(f"CREATE TABLE plain.{t} (LIKE {like}.{t})")
        con.commit()
        t0 = time.perf_counter()
        for t, data in rows.items():
            cur.adbc_ingest(t, data, mode="append", db_schema_name="plain")
        con.commit()
        seconds = time.perf_counter() - t0
        cur.execute("DROP SCHEMA plain CASCADE")
        con.commit()
    return seconds


def read_only(spec, as_of, chunk: int, kind: str) -> float:
    from arflow.warehouse.duckdb_source import DuckDBSource
    from arflow.warehouse.postgres_source import PostgresSource

    t0 = time.perf_counter()
    cls = PostgresSource if kind == "pg" else DuckDBSource
    with cls(spec.source, spec.settings.frequency) as src:
        src.layout()
        src.check_rows()
        rows = sum(frame.height for frame in src.chunks(as_of, chunk))
    assert rows > 0
    return time.perf_counter() - t0


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--series", type=int, default=100_000)
    ap.add_argument("--periods", type=int, default=120)
    ap.add_argument("--chunk-series", type=int, default=20_000)
    args = ap.parse_args()
    from arflow.job import run_job
    from arflow.job_file import load_job

    server = pg_server.server_from_environment()
    work = Path(tempfile.mkdtemp(prefix="arflow-pgbench-"))
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
        duck_spec, pg_spec = load_job(work / "duck.toml"), load_job(work / "pg.toml")

        # reading alone: every chunk of whole series, no fitting
        as_of = __import__("datetime").date(2100, 1, 1)
        read_duck = read_only(duck_spec, as_of, args.chunk_series, "duckdb")
        read_pg = read_only(pg_spec, as_of, args.chunk_series, "pg")

        t0 = time.perf_counter()
        d = run_job(duck_spec)
        duck_s = time.perf_counter() - t0
        kept = keep_stage(work / "kept")
        t0 = time.perf_counter()
        p = run_job(pg_spec)
        pg_s = time.perf_counter() - t0
        assert d.series_published == p.series_published, (d.series_published, p.series_published)

        # the publish step alone, into fresh schemas, against a plain COPY of the same rows (alternating, best of 2)
        spent = instrument()
        rows = plain_rows(kept, admin_url, "arflow")
        n_rows = sum(t.num_rows for t in rows.values())
        pub, plain, parts = [], [], []
        for i in range(2):
            spent.clear()
            pub.append(publish_into(kept, f"fresh{i}"))
            parts.append(dict(spent))
            plain.append(plain_copy(admin_url, "arflow", rows))
        spent.clear()
        rerun = publish_into(kept, "fresh0")  # the same vintage again: deletes the first attempt's rows too
        rerun_parts = dict(spent)
        best = min(range(2), key=lambda i: pub[i])

        print(f"\nreading alone (checks + every chunk of {args.chunk_series:,} whole series, no fitting)")
        print(f"  DuckDB source                           {read_duck:8.2f} s")
        print(f"  PostgreSQL source                       {read_pg:8.2f} s   x{read_pg / read_duck:.2f}")
        print(f"\nend to end (one process, chunk_series = {args.chunk_series:,})")
        print(f"  DuckDB -> DuckDB                        {duck_s:8.2f} s   phases {d.phase_seconds}")
        print(f"  PostgreSQL -> PostgreSQL                {pg_s:8.2f} s   phases {p.phase_seconds}   x{pg_s / duck_s:.2f}")
        print(f"\npublish step alone vs a plain binary COPY of the same {n_rows:,} rows (one transaction each; best of 2)")
        print(f"  arflow publish into a fresh schema      {min(pub):8.2f} s   (runs: {', '.join(f'{x:.2f}' for x in pub)})")
        print(f"  plain COPY                              {min(plain):8.2f} s   (runs: {', '.join(f'{x:.2f}' for x in plain)})")
        print(f"  ratio                                   {min(pub) / min(plain):8.2f} x   (goal: at most 2x)")
        print(f"  re-run of the vintage (deletes too)     {rerun:8.2f} s")
        print("\nwhere the publish's time goes (best fresh publish; re-run)")
        first = parts[best]
        for k in sorted(set(first) | set(rerun_parts), key=lambda k: -first.get(k, 0.0)):
            print(f"  {k:58s} {first.get(k, 0.0):7.2f} s  {rerun_parts.get(k, 0.0):7.2f} s")
    finally:
        server.stop()
        import shutil

        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
