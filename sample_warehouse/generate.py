"""Seeded generator of the sample warehouse: monthly metered water demand.

The scenario is invented: the Vellmar Basin Water Board supplies supply
zones grouped in districts, and meters monthly demand in megalitres
(``water.monthly_demand``: district, zone, month, demand_ml). Most zones
behave like stationary AR processes, some are seasonal (lag 12), some drift
like random walks, and a few carry the problems a real feed has: short
history, missing months, duplicated rows, an outlier, a stuck (constant)
meter, a meter that stopped reporting, and NULL readings.

``build_sample_warehouse(path, seed=...)`` is deterministic for a seed.
"""

from __future__ import annotations

import datetime as dt
from importlib import resources
from pathlib import Path

import duckdb
import numpy as np
import polars as pl

from ..errors import PublishError

DEMO_DATABASE = "vellmar_water.duckdb"
DEMO_JOB_FILE = "demo_job.toml"
DEFAULT_SEED = 20240611
SOURCE_TABLE = "monthly_demand"
SOURCE_SCHEMA = "water"

DISTRICTS = (
    ("QML", "Quillmere"),
    ("OSV", "Ostervane"),
    ("TLC", "Tallowcrest"),
    ("FNR", "Fennick Reach"),
    ("CVH", "Corvel Heights"),
    ("WDF", "Windlow Flats"),
    ("BRK", "Brisklow"),
    ("AMB", "Amberlode"),
    ("HRM", "Harrowmint"),
    ("GLV", "Glenvask"),
)

#: Series kinds and how many zones of each (full size, small size).
KINDS: dict[str, tuple[int, int]] = {
    "steady": (170, 8),
    "seasonal": (70, 4),
    "drifting": (24, 2),
    "short": (10, 1),
    "gappy": (8, 1),
    "duplicated": (6, 1),
    "outlier": (5, 1),
    "flat": (3, 1),
    "stopped": (4, 1),
    "unread": (3, 1),
}


def months(start: dt.date, count: int) -> list[dt.date]:
    """``count`` month starts from ``start``."""
    out = []
    y, m = start.year, start.month
    for _ in range(count):
        out.append(dt.date(y, m, 1))
        m += 1
        if m == 13:
            y, m = y + 1, 1
    return out


def _ar_path(rng: np.random.Generator, n: int, level: float, phis: dict[int, float], scale: float) -> np.ndarray:
    burn = 240
    lags = max(phis)
    x = np.zeros(n + burn)
    shocks = rng.normal(0.0, scale, n + burn)
    for t in range(lags, n + burn):
        x[t] = sum(phi * x[t - lag] for lag, phi in phis.items()) + shocks[t]
    return level + x[burn:]


def _series(kind: str, rng: np.random.Generator, n: int) -> np.ndarray:
    level = float(rng.uniform(40, 400))
    scale = level * float(rng.uniform(0.03, 0.07))
    if kind in ("steady", "short", "gappy", "duplicated", "outlier", "stopped", "unread"):
        phi1 = float(rng.uniform(0.2, 0.75))
        phis = {1: phi1} if rng.random() < 0.6 else {1: phi1, 2: float(rng.uniform(-0.25, 0.15))}
        return _ar_path(rng, n, level, phis, scale)
    if kind == "seasonal":
        return _ar_path(rng, n, level, {1: float(rng.uniform(0.2, 0.5)), 12: float(rng.uniform(0.45, 0.7))}, scale)
    if kind == "drifting":
        return level + np.cumsum(rng.normal(level * 0.002, scale, n))
    if kind == "flat":
        return np.full(n, round(level, 1))
    raise ValueError(kind)


def sample_frame(seed: int = DEFAULT_SEED, *, small: bool = False, n_months: int = 120) -> pl.DataFrame:
    """The sample panel as a polars frame (district, zone, month, demand_ml)."""
    rng = np.random.default_rng(seed)
    calendar = months(dt.date(2026 - n_months // 12, 1, 1), n_months)
    kinds = [k for k, sizes in KINDS.items() for _ in range(sizes[1] if small else sizes[0])]
    rng.shuffle(kinds)
    districts, zones, periods, values = [], [], [], []
    for i, kind in enumerate(kinds):
        code, name = DISTRICTS[i % len(DISTRICTS)]
        zone = f"{code}-{i + 1:03d}"
        y = _series(kind, rng, n_months)
        idx = list(range(n_months))
        vals: list[float | None] = [round(float(v), 3) for v in y]
        if kind == "short":
            idx = idx[-int(rng.integers(12, 20)):]
        elif kind == "gappy":
            drop = set(rng.choice(np.arange(20, n_months - 6), size=3, replace=False).tolist())
            idx = [t for t in idx if t not in drop]
        elif kind == "duplicated":
            t = int(rng.integers(30, n_months - 3))
            idx = sorted(idx + [t])
        elif kind == "outlier":
            t = int(rng.integers(40, n_months - 12))
            vals[t] = round(float(y[t]) * 6.0, 3)
        elif kind == "stopped":
            idx = idx[: n_months - int(rng.integers(5, 10))]
        elif kind == "unread":
            for t in rng.choice(np.arange(10, n_months), size=4, replace=False).tolist():
                vals[t] = None
        for t in idx:
            districts.append(name)
            zones.append(zone)
            periods.append(calendar[t])
            values.append(vals[t])
    return pl.DataFrame(
        {"district": districts, "zone": zones, "month": periods, "demand_ml": values},
        schema={"district": pl.String, "zone": pl.String, "month": pl.Date, "demand_ml": pl.Float64},
    )


def build_sample_warehouse(path: str | Path, seed: int = DEFAULT_SEED, *, small: bool = False) -> Path:
    """Create (or refresh) ``water.monthly_demand`` in the DuckDB file ``path``.

    Published results in other schemas of the same file are left alone.
    """
    path = Path(path)
    frame = sample_frame(seed, small=small)
    try:
        con = duckdb.connect(str(path))
    except duckdb.IOException as exc:
        if "lock" in str(exc).lower():
            raise PublishError(f"database {path} is in use by another process; retry when it finishes") from None
        raise PublishError(f"cannot open {path} ({str(exc).splitlines()[0]}); check the folder") from None
    try:
        con.execute(f"CREATE SCHEMA IF NOT EXISTS {SOURCE_SCHEMA}")
        con.register("sample_stage", frame.to_arrow())
        con.execute(
            f"CREATE OR REPLACE TABLE {SOURCE_SCHEMA}.{SOURCE_TABLE} AS "
            "SELECT district, zone, month, demand_ml FROM sample_stage ORDER BY district, zone, month"
        )
        con.unregister("sample_stage")
    finally:
        con.close()
    return path


def demo_job_text() -> str:
    """The shipped demo job file."""
    return resources.files("arflow.sample").joinpath(DEMO_JOB_FILE).read_text(encoding="utf-8")


if __name__ == "__main__":  # pragma: no cover - manual use
    import sys

    target = Path(sys.argv[1] if len(sys.argv) > 1 else DEMO_DATABASE)
    print(build_sample_warehouse(target))
