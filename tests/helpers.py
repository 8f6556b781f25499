"""Helpers several test files share: gate inputs, job files over the small mixed panel, running and pausing a job.

(``sample_jobs.py`` holds the job files over the sample warehouse that the
run-call and orchestrator tests share; ``pg_server.py`` the PostgreSQL server.)
"""

from __future__ import annotations

import io
import os
import subprocess
import sys
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import polars as pl

from arflow.cli import main
from arflow.core.gates import GateInputs
from arflow.sample.panels import default_job, job_toml, mixed_panel, write_table

#: the vintage ``published_job`` publishes
PUBLISHED_AS_OF = "2026-11"


def gate_inputs(G: int = 2, **over: Any) -> GateInputs:
    """Gate inputs of ``G`` healthy series (every gate passes); keyword arguments override fields.

    Overrides become arrays (``np.asarray``), except plain floats other than
    ``naive_threshold`` (scalar settings such as ``coverage_alpha`` stay floats).
    """
    base: dict[str, Any] = dict(
        flags=np.zeros(G, dtype=np.int64),
        n=np.full(G, 100),
        stale_periods=np.zeros(G, dtype=np.int64),
        fitted=np.ones(G, dtype=bool),
        unit_root=np.zeros(G, dtype=bool),
        differenced=np.zeros(G, dtype=bool),
        adf_statistic=np.full(G, -5.0),
        adf_pvalue=np.full(G, 0.001),
        max_root_modulus=np.full(G, 0.5),
        residual_statistic=np.full(G, 8.0),
        residual_pvalue=np.full(G, 0.6),
        forecast_min=np.full(G, 90.0),
        forecast_max=np.full(G, 110.0),
        forecast_finite=np.ones(G, dtype=bool),
    )
    for key, value in over.items():
        base[key] = np.asarray(value) if not isinstance(value, float) or key == "naive_threshold" else value
    return GateInputs(**base)


def write_job(directory: Path, sections: dict | None = None, frame: pl.DataFrame | None = None,
              name: str = "job.toml") -> Path:
    """``directory``/warehouse.duckdb holding ``frame`` (the mixed panel) and a job file over it; the job file."""
    directory.mkdir(parents=True, exist_ok=True)
    write_table(directory / "warehouse.duckdb", mixed_panel() if frame is None else frame)
    path = directory / name
    path.write_text(job_toml(default_job() if sections is None else sections), encoding="utf-8")
    return path


def published_job(directory: Path) -> Path:
    """``write_job`` with the default job, run once for the vintage 2026-11 (output swallowed); the job file."""
    path = write_job(directory)
    out, err = io.StringIO(), io.StringIO()
    code = main(["run", str(path), "--as-of", PUBLISHED_AS_OF], out=out, err=err)
    assert code == 0, err.getvalue()
    return path


def warehouse_of(job: Path) -> Path:
    """The warehouse beside a job file written by ``write_job``."""
    return job.parent / "warehouse.duckdb"


def query_job(job: Path, query: str, name: str = "query_job.toml") -> Path:
    """A job file beside ``job``: the default job reading ``query`` instead of its table."""
    sections = default_job()
    sections["source"].pop("table")
    sections["source"]["query"] = query
    path = job.parent / name
    path.write_text(job_toml(sections), encoding="utf-8")
    return path


def start_paused(job: Path, after: str, *args: str) -> subprocess.Popen[str]:
    """``python -m arflow run job *args`` in a subprocess, paused at the fault point ``after``.

    Touch ``job.parent / "resume"`` to let it go on.
    """
    resume = job.parent / "resume"
    resume.unlink(missing_ok=True)
    env = dict(os.environ, ARFLOW_TEST_PAUSE_AFTER=after, ARFLOW_TEST_RESUME_FILE=str(resume))
    proc = subprocess.Popen([sys.executable, "-m", "arflow", "run", str(job), *args],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)
    assert proc.stderr is not None
    line = proc.stderr.readline()
    assert line == f"arflow-test: paused after {after}\n", line + proc.stderr.read()
    return proc


def query_rows(database: Path, sql: str, params: list[Any] | None = None) -> list[tuple]:
    """The rows of ``sql`` on a DuckDB file opened read-only (closed again)."""
    con = duckdb.connect(str(database), read_only=True)
    try:
        return con.execute(sql, params).fetchall() if params is not None else con.execute(sql).fetchall()
    finally:
        con.close()
