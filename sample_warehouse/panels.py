"""Small synthetic panels and job files, for trying a job quickly and for tests.

>>> frame = ar_panel(3, 48, seed=1)
>>> frame.columns
['site', 'month', 'reading']
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import polars as pl

from .generate import months


def ar_panel(n_series: int, n_periods: int, seed: int = 0, *, phi: float = 0.5, level: float = 100.0,
             start: dt.date = dt.date(2019, 1, 1), prefix: str = "s") -> pl.DataFrame:
    """Stationary AR(1) series ``site, month, reading`` (one row per site and month)."""
    rng = np.random.default_rng(seed)
    calendar = months(start, n_periods)
    rows: dict[str, list[Any]] = {"site": [], "month": [], "reading": []}
    for i in range(n_series):
        x = 0.0
        for _ in range(100):
            x = phi * x + rng.normal()
        for t in range(n_periods):
            x = phi * x + rng.normal()
            rows["site"].append(f"{prefix}{i + 1:02d}")
            rows["month"].append(calendar[t])
            rows["reading"].append(round(level + 5.0 * x, 4))
    return pl.DataFrame(rows, schema={"site": pl.String, "month": pl.Date, "reading": pl.Float64})


def write_table(database: str | Path, frame: pl.DataFrame, table: str = "readings") -> None:
    """Create or replace ``table`` (``name`` or ``schema.name``) in a DuckDB file from a frame."""
    con = duckdb.connect(str(database))
    try:
        if "." in table:
            con.execute(f'CREATE SCHEMA IF NOT EXISTS "{table.split(".")[0]}"')
        con.register("panel_stage", frame.to_arrow())
        quoted = ".".join(f'"{p}"' for p in table.split("."))
        con.execute(f"CREATE OR REPLACE TABLE {quoted} AS SELECT * FROM panel_stage")
        con.unregister("panel_stage")
    finally:
        con.close()


def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return '"' + value.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    return repr(value)


def job_toml(sections: dict[str, dict[str, Any]]) -> str:
    """Render ``{"section": {"key": value}}`` as a TOML job file."""
    out = []
    for name, body in sections.items():
        out.append(f"[{name}]")
        out.extend(f"{k} = {_toml_value(v)}" for k, v in body.items())
        out.append("")
    return "\n".join(out)


def default_job(database: str = "warehouse.duckdb", table: str = "readings", name: str = "meters") -> dict[str, dict[str, Any]]:
    """A job (as nested dicts) over :func:`ar_panel` data; edit and render with :func:`job_toml`."""
    return {
        "job": {"name": name},
        "source": {"database": database, "table": table, "keys": ["site"], "period": "month",
                   "value": "reading", "frequency": "month"},
        "model": {"max_order": 3, "seasonal_lag": "off"},
        "forecast": {"horizon": 6, "coverage": [0.8, 0.95]},
        "gates": {"alpha": 0.01, "min_observations": 24, "max_quarantine_share": 0.9},
        "publish": {"schema": "arflow", "on_failure": "keep-previous"},
    }


def mixed_panel(n_clean: int = 6, n_periods: int = 96, seed: int = 11) -> pl.DataFrame:
    """Clean AR(1) sites ``s01``.. plus one site per problem.

    ``short`` (12 months), ``flat`` (constant), ``dup`` (one month twice) and
    ``lag6`` (dependence at lag 6 that a low-order AR leaves in the residuals).
    """
    start = dt.date(2019, 1, 1)
    calendar = months(start, n_periods)
    short = ar_panel(1, 12, seed=seed + 1, start=calendar[-12]).with_columns(site=pl.lit("short"))
    flat = pl.DataFrame({"site": ["flat"] * n_periods, "month": calendar, "reading": [50.0] * n_periods})
    dup = ar_panel(1, n_periods, seed=seed + 2, start=start).with_columns(site=pl.lit("dup"))
    dup = pl.concat([dup, dup[n_periods // 2: n_periods // 2 + 1]])
    rng = np.random.default_rng(seed + 3)
    x = np.zeros(n_periods + 100)
    for t in range(6, len(x)):
        x[t] = 0.85 * x[t - 6] + rng.normal()
    lag6 = pl.DataFrame({"site": ["lag6"] * n_periods, "month": calendar, "reading": (100 + 5 * x[-n_periods:]).round(4)})
    clean = ar_panel(n_clean, n_periods, seed=seed, start=start)
    return pl.concat([clean, short, flat, dup, lag6]).sort("site", "month", maintain_order=True)


def warehouse_state(database: str | Path, schema: str = "arflow") -> dict[str, list[tuple[Any, ...]]]:
    """Every row of every table and view in ``schema`` (sorted), to compare before/after a run."""
    if not Path(database).exists():
        return {}
    con = duckdb.connect(str(database), read_only=True)
    try:
        names = [r[0] for r in con.execute(
            "SELECT table_name FROM information_schema.tables WHERE table_schema = ? ORDER BY 1", [schema]
        ).fetchall()]
        return {n: con.execute(f'SELECT * FROM "{schema}"."{n}" ORDER BY ALL').fetchall() for n in names}
    finally:
        con.close()
