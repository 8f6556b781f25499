"""Publishing to the Delta lakehouse against the DuckDB target, side by side.

    python bench/lakehouse_speed.py                   # 100,000 series x 120 months
    python bench/lakehouse_speed.py --series 10000

Builds the seeded warehouse of ``bench/warehouse_scale.py`` in a temporary
folder and runs the same job (order up to 8 with the seasonal candidate,
12-step forecasts at 80% and 95%, backtest off, one worker) in fresh
subprocesses, reading the same rows from a Parquet file and publishing to:

* the DuckDB target only (``[publish] database``);
* the lakehouse only (``[publish] lakehouse``, Delta tables on local disk),
  first vintage, then a re-run of the same vintage (the replace path, which
  also reads the earlier attempt for keep-previous and rebuilds the view);

and prints each run's publish phase and total wall time, the ratio
lakehouse / DuckDB, and the time to read ``published_forecasts`` back
(DuckDB view vs polars' Delta reader).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from warehouse_scale import JOB, build_warehouse  # noqa: E402


def task(kind: str, db: str, workdir: str) -> dict:
    from arflow.job import run_job
    from arflow.job_file import load_job

    wd = Path(workdir)
    text = JOB.format(db=db, out=wd / "published.duckdb", chunk=20_000, workers=1, backtest="false")
    # a Parquet source, so that each run publishes to exactly one target
    text = text.replace(f'database = "{db}"\ntable = "readings"', f'parquet = "{wd / "readings.parquet"}"')
    if kind.startswith("lakehouse"):
        text = text.replace(f'database = "{wd / "published.duckdb"}"', f'lakehouse = "{wd / "lake"}"')
    job = wd / f"job_{kind}.toml"
    job.write_text(text)
    t0 = time.perf_counter()
    outcome = run_job(load_job(job), as_of="2024-12")
    total = time.perf_counter() - t0
    t1 = time.perf_counter()
    if kind.startswith("lakehouse"):
        import polars as pl

        rows = pl.read_delta(str(wd / "lake" / "arflow" / "published_forecasts")).height
    else:
        import duckdb

        con = duckdb.connect(str(wd / "published.duckdb"), read_only=True)
        rows = con.sql("SELECT * FROM arflow.published_forecasts").to_arrow_table().num_rows  # Arrow, like polars
        con.close()
    read = time.perf_counter() - t1
    return {"kind": kind, "total": total, "publish": outcome.phase_seconds.get("publish"), "attempt": outcome.attempt,
            "series": outcome.series_total, "view_rows": rows, "read_view": read}


def run_task(kind: str, db: Path, workdir: Path) -> dict:
    cmd = [sys.executable, __file__, "--task", kind, "--db", str(db), "--workdir", str(workdir)]
    out = subprocess.run(cmd, check=True, capture_output=True, text=True, env=os.environ.copy())
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--series", type=int, default=100_000)
    ap.add_argument("--periods", type=int, default=120)
    ap.add_argument("--task")
    ap.add_argument("--db")
    ap.add_argument("--workdir")
    args = ap.parse_args()
    if args.task:
        print(json.dumps(task(args.task, args.db, args.workdir)))
        return
    with tempfile.TemporaryDirectory(prefix="arflow-lake-bench-") as tmp:
        wd = Path(tmp)
        db = wd / "source.duckdb"
        t0 = time.perf_counter()
        build_warehouse(db, args.series, args.periods)
        import duckdb

        con = duckdb.connect(str(db))
        con.execute(f"COPY readings TO '{wd / 'readings.parquet'}' (FORMAT parquet)")
        con.close()
        print(f"built {args.series:,} series x {args.periods} months in {time.perf_counter() - t0:.1f} s")
        rows = [run_task(kind, db, wd) for kind in ("duckdb", "lakehouse", "lakehouse-rerun")]
        base = rows[0]["publish"]
        print(f"{'target':<24}{'attempt':>8}{'publish s':>11}{'vs DuckDB':>11}{'run total s':>13}{'read view s':>13}{'view rows':>11}")
        for r in rows:
            name = {"duckdb": "DuckDB target", "lakehouse": "lakehouse (Delta)", "lakehouse-rerun": "lakehouse re-run"}[r["kind"]]
            print(f"{name:<24}{r['attempt']:>8}{r['publish']:>11.2f}{r['publish'] / base:>10.2f}x{r['total']:>13.1f}"
                  f"{r['read_view']:>13.2f}{r['view_rows']:>11,}")
        lake = wd / "lake" / "arflow"
        size = sum(p.stat().st_size for p in lake.rglob("*") if p.is_file())
        print(f"lakehouse on disk after two attempts: {size / 2**20:.0f} MiB "
              "(the replaced attempt's files stay for time travel until vacuumed)")


if __name__ == "__main__":
    main()
