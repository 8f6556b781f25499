"""The marker-based Parquet lakehouse layout of arflow 0.1: read-only, kept for one release.

arflow 0.1 wrote ``[publish] lakehouse`` as Parquet folders per run and
attempt, made visible by JSON commit markers::

    <lakehouse>/<schema>/<table>/run=<run>/attempt=<n>/part-00000.parquet
    <lakehouse>/<schema>/_commits/<run>.json
    <lakehouse>/<schema>/_layout.json

Runs now go to Delta tables (:mod:`arflow.warehouse.delta_target`). This
module still reads the old layout through its markers (:func:`committed_runs`,
:func:`read_table`, :func:`published_forecasts`) and converts it once
(:func:`convert`, the command ``arflow lakehouse-convert JOB.toml``). It will be
removed in the release after next.
"""

from __future__ import annotations

import json
import os
import shutil
from pathlib import Path
from typing import Any
from urllib.parse import quote as _url_quote

import polars as pl

from ..errors import PublishError, SourceError
from .contract import TableLayout
from .duckdb_source import open_duckdb
from .duckdb_target import VIEW_FILE, render_sql
from .identifiers import check_identifier

COMMITS = "_commits"
LAYOUT_FILE = "_layout.json"


def run_dir_name(run_id: str) -> str:
    """The run id as one safe path segment (``vellmar@2025-12-01`` stays readable)."""
    return _url_quote(run_id, safe="@-_.")


def store_root(lakehouse: Path, schema: str) -> Path:
    """The folder of one schema in a lakehouse."""
    return Path(lakehouse) / check_identifier(schema, "publish.schema")


# ------------------------------------------------------------------------------------ readers


def _read_marker(path: Path) -> dict[str, Any] | None:
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        return None


def _markers(root: Path) -> list[dict[str, Any]]:
    folder = root / COMMITS
    if not folder.is_dir():
        return []
    out = []
    for path in sorted(folder.glob("*.json")):
        if path.name.startswith("."):
            continue
        marker = _read_marker(path)
        if marker is not None:
            out.append(marker)
    return out


def _open_root(lakehouse: str | Path, schema: str) -> Path:
    root = store_root(Path(lakehouse).expanduser(), schema)
    if not root.is_dir():
        raise SourceError(f"lakehouse folder {root} does not exist; check the lakehouse path and schema")
    return root


def committed_runs(lakehouse: str | Path, schema: str = "arflow") -> pl.DataFrame:
    """One row per committed run: ``run_id``, ``job``, ``as_of`` (ISO text), ``attempt``, ``committed_at``, ``status``."""
    root = _open_root(lakehouse, schema)
    rows = [{k: m[k] for k in ("run_id", "job", "as_of", "attempt", "committed_at", "status")} for m in _markers(root)]
    schema_ = {"run_id": pl.String, "job": pl.String, "as_of": pl.String, "attempt": pl.Int64,
               "committed_at": pl.String, "status": pl.String}
    return pl.DataFrame(rows, schema=schema_)


def committed_files(lakehouse: str | Path, table: str, schema: str = "arflow") -> list[str]:
    """Absolute paths of ``table``'s files in committed runs (give them to any Parquet reader)."""
    root = _open_root(lakehouse, schema)
    files = []
    for marker in _markers(root):
        entry = marker["tables"].get(table)
        if entry:
            files.extend(str(root / f) for f in entry["files"])
    return files


def read_table(lakehouse: str | Path, table: str, schema: str = "arflow") -> pl.DataFrame:
    """All committed rows of ``table`` (columns of runs with other coverage levels are unioned by name)."""
    files = committed_files(lakehouse, table, schema)
    if not files:
        return pl.DataFrame()
    return pl.concat([pl.read_parquet(f) for f in files], how="diagonal_relaxed")


def published_forecasts(lakehouse: str | Path, schema: str = "arflow") -> pl.DataFrame:
    """The lakehouse's ``published_forecasts``: the same rows as the DuckDB view of that name.

    Runs the view's own SQL (``sql/published_forecasts.sql``) in an in-memory
    DuckDB over the committed files only.
    """
    root = _open_root(lakehouse, schema)
    layout_info = _read_marker(root / LAYOUT_FILE)
    status_files = committed_files(lakehouse, "series_status", schema)
    forecast_files = committed_files(lakehouse, "forecasts", schema)
    if layout_info is None or not status_files or not forecast_files:
        return pl.DataFrame()
    layout = TableLayout(schema, tuple(layout_info["keys"]), tuple(layout_info["key_types"]), layout_info["period_type"])
    con = open_duckdb(":memory:")
    try:
        con.execute(f'CREATE SCHEMA "{schema}"')
        for table, files in (("series_status", status_files), ("forecasts", forecast_files)):
            listing = ", ".join("'" + f.replace("'", "''") + "'" for f in files)
            con.execute(f'CREATE VIEW "{schema}"."{table}" AS SELECT * FROM read_parquet([{listing}], union_by_name = true, hive_partitioning = false)')
        con.execute(f'CREATE TABLE "{schema}".job_policy (job VARCHAR, frequency VARCHAR, stale_after_periods INTEGER)')
        policy: dict[str, dict[str, Any]] = {}
        for m in sorted(_markers(root), key=lambda m: str(m.get("committed_at"))):
            if m.get("changed_view", True) and m.get("frequency"):
                policy[m["job"]] = m
        for job, m in policy.items():
            con.execute(f'INSERT INTO "{schema}".job_policy VALUES (?, ?, ?)', [job, m["frequency"], m.get("stale_after_periods")])
        con.execute(render_sql(VIEW_FILE, layout))
        keys = ", ".join(f'"{k}"' for k in layout.keys)
        return con.sql(f'SELECT * FROM "{schema}".published_forecasts ORDER BY job, {keys}, step').pl()
    finally:
        con.close()


def is_legacy(lakehouse: str | Path, schema: str = "arflow") -> bool:
    """True when ``<lakehouse>/<schema>`` holds the old marker layout (and no Delta tables yet)."""
    if "://" in str(lakehouse):
        return False
    root = Path(lakehouse).expanduser() / schema
    return (root / COMMITS).is_dir() and not (root / "commits" / "_delta_log").is_dir()


LEGACY_SUFFIX = ".parquet-markers"


def convert(lakehouse: str | Path, schema: str = "arflow") -> dict[str, int]:
    """Convert the old layout of one schema to Delta tables in place; returns rows per table.

    The old folder is renamed to ``<schema>.parquet-markers`` first (kept for you to delete), and the Delta
    tables are written to ``<schema>``; if writing fails the old folder is put back.
    """
    from .delta_target import convert_frames

    lakehouse = Path(lakehouse).expanduser()
    root = _open_root(lakehouse, schema)
    if not is_legacy(lakehouse, schema):
        raise PublishError(f"lakehouse {root} does not hold the old Parquet-marker layout; nothing to convert")
    info = _read_marker(root / LAYOUT_FILE)
    if info is None:
        raise PublishError(f"lakehouse {root} has no {LAYOUT_FILE}; it cannot be converted automatically")
    layout = TableLayout(schema, tuple(info["keys"]), tuple(info["key_types"]), info["period_type"])
    tables = {t: read_table(lakehouse, t, schema) for t in ("series_status", "models", "gates", "residual_acf",
                                                           "forecasts", "backtests")}
    markers = _markers(root)
    runs = read_table(lakehouse, "runs", schema)
    view = published_forecasts(lakehouse, schema)
    policy: dict[str, dict[str, Any]] = {}
    vintages = []
    for m in sorted(markers, key=lambda m: str(m.get("committed_at"))):
        if m.get("changed_view", True):
            policy[m["job"]] = m
            vintages.append({"job": m["job"], "as_of": m["as_of"], "run_id": m["run_id"], "attempt": int(m["attempt"]),
                             "published_at": m["committed_at"]})
    aside = root.with_name(root.name + LEGACY_SUFFIX)
    if aside.exists():
        raise PublishError(f"{aside} exists already; move it away and run the conversion again")
    os.replace(root, aside)
    try:
        counts = convert_frames(lakehouse, layout, tables, runs, view, vintages,
                                [{"job": j, "frequency": m.get("frequency"), "stale_after_periods": m.get("stale_after_periods")}
                                 for j, m in policy.items()])
    except BaseException:
        shutil.rmtree(root, ignore_errors=True)
        os.replace(aside, root)
        raise
    return counts
