"""Lakehouse output: a run's tables as Parquet datasets, made visible by a commit marker written last.

Layout under ``[publish] lakehouse`` (one folder per ``[publish] schema``)::

    <lakehouse>/<schema>/_layout.json                      key columns and period type of this folder
    <lakehouse>/<schema>/<table>/run=<run>/attempt=<n>/part-00000.parquet
    <lakehouse>/<schema>/_commits/<run>.json               commit marker of a run (written last)

``<table>`` is ``runs``, ``series_status``, ``models``, ``gates``,
``residual_acf``, ``forecasts`` (and any further result table of the run,
such as ``backtests``), with the same columns as the DuckDB tables of the same
names. ``<run>`` is the run id (``"<job>@<as_of>"``), percent-encoded for file
names. Every file also holds a ``run_id`` column.

Protocol. A run is written in three steps: (1) every table goes into a new
``attempt=<n>`` folder that no marker names yet; (2) the marker
``_commits/<run>.json`` is written to a temporary name, flushed to disk and
renamed over the old one (an atomic replace), naming the attempt and its
files; (3) attempts the marker no longer names are removed, except the one it
named before (kept one more commit for readers still holding the old marker).
A reader that follows the markers (:func:`committed_runs`, :func:`read_table`,
:func:`published_forecasts`) therefore only ever sees complete runs: a run
that failed or was killed before step 2 left an attempt folder that nothing
names, and a re-run of a vintage switches from the old attempt to the new one
in one rename. Plain globbing of ``<table>/**/*.parquet`` does **not** have
this guarantee (it also sees uncommitted and superseded attempts); read the
file lists from the markers instead.

One writer per run at a time (the last marker rename wins). The folder must
be on a file system with atomic rename (a local or mounted disk); object
stores without it are not supported.
"""

from __future__ import annotations

import datetime as dt
import json
import os
import shutil
import uuid
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any
from urllib.parse import quote as _url_quote

import duckdb
import polars as pl

from ..errors import PublishError, SourceError
from ..results import RESULT_TABLES, SERIES_STATUS, VIEW_TABLES
from ..runtime import fault_point
from .contract import LAKEHOUSE_ORDER, RunRecord, TableLayout, check_layout_match, runs_row
from .duckdb_source import parse_vintage
from .duckdb_target import VIEW_FILE, render_sql
from .identifiers import check_identifier
from .stage import StagedRun

FORMAT_VERSION = 1
COMMITS = "_commits"
LAYOUT_FILE = "_layout.json"


def run_dir_name(run_id: str) -> str:
    """The run id as one safe path segment (``vellmar@2025-12-01`` stays readable)."""
    return _url_quote(run_id, safe="@-_.")


def _fsync_file(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _fsync_dir(path: Path) -> None:
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def _write_json_atomic(path: Path, payload: dict[str, Any]) -> None:
    tmp = path.parent / f".{path.name}.{os.getpid()}.{uuid.uuid4().hex}.tmp"
    try:
        with open(tmp, "w", encoding="utf-8") as fh:
            json.dump(payload, fh, indent=1, sort_keys=True, default=_json_default)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()
    _fsync_dir(path.parent)


def _json_default(value: Any) -> Any:
    if isinstance(value, (dt.date, dt.datetime)):
        return value.isoformat()
    return str(value)


def store_root(lakehouse: Path, schema: str) -> Path:
    """The folder of one schema in a lakehouse."""
    return Path(lakehouse) / check_identifier(schema, "publish.schema")


@dataclass
class LakehousePending:
    """A run whose files are written but not yet visible; :meth:`commit` or :meth:`abort` it."""

    root: Path
    record: RunRecord
    attempt: int
    tables: dict[str, dict[str, Any]]
    written: list[Path] = field(default_factory=list)
    done: bool = False

    def commit(self) -> int:
        """Write the commit marker (the run becomes visible), then tidy old attempts; returns the attempt."""
        fault_point("lakehouse:commit")
        rec = self.record
        marker = {
            "format": FORMAT_VERSION,
            "run_id": rec.run_id,
            "job": rec.job,
            "as_of": rec.as_of,
            "attempt": self.attempt,
            "committed_at": dt.datetime.now(dt.timezone.utc).replace(tzinfo=None),
            "status": rec.status,
            "tables": self.tables,
            "frequency": rec.frequency,
            "stale_after_periods": rec.stale_after_periods,
            "counts": {"series_total": rec.series_total, "series_published": rec.series_published,
                       "series_quarantined": rec.series_quarantined},
        }
        path = self.root / COMMITS / f"{run_dir_name(rec.run_id)}.json"
        previous = read_marker(path)
        if rec.held:
            # hold_on_alarm: the records are new, what the view reads stays as the earlier attempt had it
            marker["changed_view"] = bool(previous and previous.get("changed_view", True))
            for table in VIEW_TABLES:
                marker["tables"].pop(table, None)
                if previous and table in previous["tables"]:
                    marker["tables"][table] = previous["tables"][table]
            if previous is not None:
                marker["committed_at"] = previous.get("committed_at", marker["committed_at"])
        _write_json_atomic(path, marker)
        self.done = True
        keep = {self.attempt} | ({int(previous["attempt"])} if previous else set()) | _attempts_named(marker)
        _remove_attempts(self.root, rec.run_id, keep)
        return self.attempt

    def abort(self) -> None:
        """Remove this attempt's files (nothing names them; best effort)."""
        if self.done:
            return
        for folder in self.written:
            shutil.rmtree(folder, ignore_errors=True)
            try:
                folder.parent.rmdir()  # the run's folder, when no other attempt is in it
            except OSError:
                pass
        self.done = True


class ParquetTarget:
    """Writes runs as Parquet datasets under ``<lakehouse>/<schema>`` (``[publish] lakehouse``)."""

    commit_order = LAKEHOUSE_ORDER

    def __init__(self, lakehouse: Path, layout: TableLayout) -> None:
        self.lakehouse = Path(lakehouse)
        self.layout = layout
        self.root = store_root(self.lakehouse, layout.schema)

    @classmethod
    def from_spec(cls, publish: Any, layout: TableLayout) -> "ParquetTarget":
        """The target of ``[publish] lakehouse`` (``publish``: a ``PublishSpec``)."""
        return cls(publish.lakehouse, layout)

    def describe(self) -> str:
        return f"lakehouse {self.root} (Parquet, committed runs only)"

    def preflight(self) -> None:
        """Nothing to reach ahead of time: the folder is checked by :meth:`check_layout`."""

    def check_layout(self) -> str:
        """Read-only: the folder's layout file matches this job's layout (or there is none yet)."""
        if not self.lakehouse.parent.is_dir():
            raise PublishError(
                f"folder {self.lakehouse.parent} of publish.lakehouse does not exist; create it or fix the path"
            )
        have = read_marker(self.root / LAYOUT_FILE)
        if have is None:
            return "lakehouse folder will be created"
        check_layout_match(f"lakehouse folder {self.root}", have["keys"], have["period_type"], self.layout)
        return "lakehouse folder exists"

    def latest_vintage(self, job: str) -> Any | None:
        """The job's latest committed vintage that changed the view (None when none)."""
        values = [m["as_of"] for m in read_markers(self.root) if m.get("job") == job and m.get("changed_view", True)]
        if not values:
            return None
        ptype = (read_marker(self.root / LAYOUT_FILE) or {}).get("period_type", "DATE")
        return max(parse_vintage(v, ptype) for v in values)

    def _check_layout(self) -> None:
        self.check_layout()
        path = self.root / LAYOUT_FILE
        if read_marker(path) is None:
            want = {"keys": list(self.layout.keys), "key_types": list(self.layout.key_types), "period_type": self.layout.period_type}
            (self.root / COMMITS).mkdir(parents=True, exist_ok=True)
            _write_json_atomic(path, want)

    def prepare(self, record: RunRecord, staged: StagedRun) -> LakehousePending:
        """Write every table of the staged run into a new attempt folder that no marker names yet."""
        return self.stage(record, {t: staged.frame(t) for t in RESULT_TABLES})

    def _next_attempt(self, run_id: str) -> int:
        seen = [0]
        marker = read_marker(self.root / COMMITS / f"{run_dir_name(run_id)}.json")
        if marker:
            seen.append(int(marker["attempt"]))
        for run_dir in self.root.glob(f"*/run={run_dir_name(run_id)}"):
            for attempt_dir in run_dir.glob("attempt=*"):
                try:
                    seen.append(int(attempt_dir.name.split("=", 1)[1]))
                except ValueError:
                    continue
        return max(seen) + 1

    def stage(self, record: RunRecord, frames: dict[str, pl.DataFrame]) -> LakehousePending:
        """Write every table of a run into a new attempt folder that no marker names yet."""
        try:
            self._check_layout()
            attempt = self._next_attempt(record.run_id)
        except OSError as exc:
            raise PublishError(f"cannot write to lakehouse {self.root} ({exc}); check publish.lakehouse") from None
        staged = LakehousePending(self.root, record, attempt, {})
        try:
            models = frames["models"]
            status = models.select(*self.layout.keys, "decision").with_columns(
                pl.lit(record.job).alias("job"), pl.lit(record.as_of).alias("as_of"), pl.lit(record.on_failure).alias("on_failure")
            ).select("job", "as_of", *self.layout.keys, "decision", "on_failure") if models.height else None
            ordered: dict[str, pl.DataFrame | None] = {SERIES_STATUS: status}
            ordered.update({name: frames.get(name) for name in RESULT_TABLES})
            ordered.update({name: f for name, f in frames.items() if name not in ordered})
            if record.held:
                for name in VIEW_TABLES:
                    ordered[name] = None
            else:
                kept = _kept_forecasts(self.root, record, models, self.layout.keys)
                if kept is not None:
                    fresh = ordered.get("forecasts")
                    ordered["forecasts"] = kept if fresh is None or not fresh.height else pl.concat(
                        [fresh, kept.select([c for c in fresh.columns if c in kept.columns])], how="diagonal_relaxed")
            for table, frame in ordered.items():
                if frame is None or frame.width == 0:
                    continue
                self._write(staged, table, frame)
                fault_point(f"lakehouse:{table}")
            self._write(staged, "runs", _runs_frame(record, attempt))
            fault_point("lakehouse:runs")
        except BaseException as exc:
            staged.abort()
            if isinstance(exc, OSError):
                raise PublishError(
                    f"writing to lakehouse {self.root} failed ({exc}); nothing was committed there"
                ) from None
            raise
        return staged

    def _write(self, staged: LakehousePending, table: str, frame: pl.DataFrame) -> None:
        check_identifier(table, "table")
        folder = self.root / table / f"run={run_dir_name(staged.record.run_id)}" / f"attempt={staged.attempt}"
        folder.mkdir(parents=True, exist_ok=False)
        staged.written.append(folder)
        frame = frame.select(pl.lit(staged.record.run_id).alias("run_id"), pl.all().exclude("run_id"))
        path = folder / "part-00000.parquet"
        frame.write_parquet(path)
        _fsync_file(path)
        _fsync_dir(folder)
        staged.tables[table] = {"files": [path.relative_to(self.root).as_posix()], "rows": frame.height}


def _runs_frame(record: RunRecord, attempt: int) -> pl.DataFrame:
    return pl.DataFrame({k: [v] for k, v in runs_row(record, attempt).items()})


def read_marker(path: Path) -> dict[str, Any] | None:
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        return None


def _attempts_named(marker: dict[str, Any]) -> set[int]:
    """Attempt numbers whose files a marker names (a held run names an earlier attempt's files)."""
    out = set()
    for entry in marker["tables"].values():
        for f in entry["files"]:
            for part in f.split("/"):
                if part.startswith("attempt="):
                    try:
                        out.add(int(part.split("=", 1)[1]))
                    except ValueError:
                        pass
    return out


def _kept_forecasts(root: Path, record: RunRecord, models: pl.DataFrame, keys: tuple[str, ...]) -> pl.DataFrame | None:
    """keep-previous: the earlier attempt's forecasts of series this attempt quarantines (None when none)."""
    if record.on_failure != "keep-previous" or not models.height:
        return None
    previous = read_marker(root / COMMITS / f"{run_dir_name(record.run_id)}.json")
    entry = previous["tables"].get("forecasts") if previous else None
    if not entry:
        return None
    old = pl.concat([pl.read_parquet(root / f) for f in entry["files"]], how="diagonal_relaxed")
    quarantined = models.filter(pl.col("decision") != "published").select(*keys).unique()
    kept = old.join(quarantined, on=list(keys), how="semi").drop("run_id", strict=False)
    return kept if kept.height else None


def _remove_attempts(root: Path, run_id: str, keep: set[int]) -> None:
    for run_dir in root.glob(f"*/run={run_dir_name(run_id)}"):
        for attempt_dir in run_dir.glob("attempt=*"):
            try:
                number = int(attempt_dir.name.split("=", 1)[1])
            except ValueError:
                continue
            if number not in keep:
                shutil.rmtree(attempt_dir, ignore_errors=True)


# ------------------------------------------------------------------------------------ readers


def read_markers(root: Path) -> list[dict[str, Any]]:
    folder = root / COMMITS
    if not folder.is_dir():
        return []
    out = []
    for path in sorted(folder.glob("*.json")):
        if path.name.startswith("."):
            continue
        marker = read_marker(path)
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
    rows = [{k: m[k] for k in ("run_id", "job", "as_of", "attempt", "committed_at", "status")} for m in read_markers(root)]
    schema_ = {"run_id": pl.String, "job": pl.String, "as_of": pl.String, "attempt": pl.Int64,
               "committed_at": pl.String, "status": pl.String}
    return pl.DataFrame(rows, schema=schema_)


def committed_files(lakehouse: str | Path, table: str, schema: str = "arflow") -> list[str]:
    """Absolute paths of ``table``'s files in committed runs (give them to any Parquet reader)."""
    root = _open_root(lakehouse, schema)
    files = []
    for marker in read_markers(root):
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
    layout_info = read_marker(root / LAYOUT_FILE)
    status_files = committed_files(lakehouse, "series_status", schema)
    forecast_files = committed_files(lakehouse, "forecasts", schema)
    if layout_info is None or not status_files or not forecast_files:
        return pl.DataFrame()
    layout = TableLayout(schema, tuple(layout_info["keys"]), tuple(layout_info["key_types"]), layout_info["period_type"])
    con = duckdb.connect(":memory:")
    try:
        con.execute(f'CREATE SCHEMA "{schema}"')
        for table, files in (("series_status", status_files), ("forecasts", forecast_files)):
            listing = ", ".join("'" + f.replace("'", "''") + "'" for f in files)
            con.execute(f'CREATE VIEW "{schema}"."{table}" AS SELECT * FROM read_parquet([{listing}], union_by_name = true, hive_partitioning = false)')
        con.execute(f'CREATE TABLE "{schema}".job_policy (job VARCHAR, frequency VARCHAR, stale_after_periods INTEGER)')
        policy: dict[str, dict[str, Any]] = {}
        for m in sorted(read_markers(root), key=lambda m: str(m.get("committed_at"))):
            if m.get("changed_view", True) and m.get("frequency"):
                policy[m["job"]] = m
        for job, m in policy.items():
            con.execute(f'INSERT INTO "{schema}".job_policy VALUES (?, ?, ?)', [job, m["frequency"], m.get("stale_after_periods")])
        con.execute(render_sql(VIEW_FILE, layout))
        keys = ", ".join(f'"{k}"' for k in layout.keys)
        return con.sql(f'SELECT * FROM "{schema}".published_forecasts ORDER BY job, {keys}, step').pl()
    finally:
        con.close()
