"""A run's results staged on local disk as Parquet, chunk by chunk, until one transaction publishes them.

Holding every result of a million-series run in memory until the publishing
transaction would cost gigabytes; writing each chunk's frames to a private
temporary folder keeps memory bounded by one chunk, and DuckDB streams the
files into the warehouse inside the single publishing transaction
(:meth:`arflow.warehouse.duckdb_store.DuckDBStore.publish`). The folder is
removed afterwards whatever happens; nothing there is ever visible to readers.
"""

from __future__ import annotations

import shutil
import tempfile
from pathlib import Path

import duckdb
import polars as pl

from .duckdb_store import RunTables

STAGED_TABLES = ("models", "gates", "residual_acf", "forecasts", "backtests", "actuals")


def _literal(text: str) -> str:
    return "'" + text.replace("'", "''") + "'"


class RunStage(RunTables):
    """Parquet parts per table under a fresh temporary folder.

    >>> stage = RunStage()
    >>> stage.write(0, {"models": pl.DataFrame({"k": [1], "decision": ["published"]})})
    >>> len(stage.files("models")), stage.files("gates")
    (1, [])
    >>> stage.cleanup()
    """

    def __init__(self, parent: Path | None = None) -> None:
        self.dir = Path(tempfile.mkdtemp(prefix="arflow-stage-", dir=parent))

    @staticmethod
    def write_to(directory: str | Path, chunk_no: int, frames: dict[str, pl.DataFrame | None]) -> None:
        """Write one chunk's frames (usable from a worker process that only knows the folder)."""
        for table, frame in frames.items():
            if frame is None or frame.height == 0:
                continue
            folder = Path(directory) / table
            folder.mkdir(parents=True, exist_ok=True)
            frame.write_parquet(folder / f"{chunk_no:06d}.parquet", compression="lz4")

    def write(self, chunk_no: int, frames: dict[str, pl.DataFrame | None]) -> None:
        self.write_to(self.dir, chunk_no, frames)

    def files(self, table: str) -> list[str]:
        folder = self.dir / table
        return sorted(str(p) for p in folder.glob("*.parquet")) if folder.is_dir() else []

    def columns(self, table: str) -> list[str]:
        seen: dict[str, None] = {}
        for f in self.files(table):
            for c in pl.read_parquet_schema(f):
                seen.setdefault(c, None)
        return list(seen)

    def relation(self, con: duckdb.DuckDBPyConnection, table: str) -> str | None:
        files = self.files(table)
        if not files:
            return None
        return f"read_parquet([{', '.join(_literal(f) for f in files)}], union_by_name = true)"

    def cleanup(self) -> None:
        shutil.rmtree(self.dir, ignore_errors=True)

    def __enter__(self) -> "RunStage":
        return self

    def __exit__(self, *exc: object) -> None:
        self.cleanup()
