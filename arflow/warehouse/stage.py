"""A run's results staged on local disk as Parquet, chunk by chunk, until one transaction publishes them.

Holding every result of a million-series run in memory until the publishing
transaction would cost gigabytes; writing each chunk's frames to a private
temporary folder keeps memory bounded by one chunk, and DuckDB streams the
files into the warehouse inside the single publishing transaction
(each target's ``prepare``, see ``warehouse/contract.py``). The folder is
removed afterwards whatever happens (normal end, error, SIGTERM, Ctrl-C; and at
interpreter exit as a last resort); nothing there is ever visible to readers.

A kill -9 cannot clean up, so every folder records its owner (process id, the
process's start time and its pid namespace) in a file ``owner``; a run that starts removes the
folders of owners that are gone (:func:`sweep_stale`). A folder whose owner is
alive, whose owner file is missing or unreadable, is never touched.
"""

from __future__ import annotations

import atexit
import os
import shutil
import sys
import tempfile
from pathlib import Path

from collections.abc import Iterator

import polars as pl
import pyarrow as pa
import pyarrow.parquet as pq

STAGE_PREFIX = "arflow-stage-"
OWNER_FILE = "owner"
_live: set[Path] = set()


def process_start_time(pid: int) -> str | None:
    """The process's start time (clock ticks since boot) on Linux; None where unknown or gone."""
    try:
        with open(f"/proc/{pid}/stat", "rb") as fh:
            stat = fh.read().decode("ascii", "replace")
    except OSError:
        return None
    fields = stat[stat.rfind(")") + 2:].split()
    return fields[19] if len(fields) > 19 else None


def _pid_alive(pid: int) -> bool:
    if pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    except OSError:
        return True
    return True


def _pid_namespace() -> str:
    """This process's pid namespace (Linux; '-' elsewhere): pids of another namespace mean nothing here."""
    try:
        return os.readlink("/proc/self/ns/pid").replace(" ", "")
    except (OSError, AttributeError):
        return "-"


def _owner_record() -> str:
    pid = os.getpid()
    return f"{pid} {process_start_time(pid) or '-'} {_pid_namespace()}\n"


def _owner_gone(record: str) -> bool:
    """True only when the recorded owner process certainly no longer exists."""
    parts = record.split()
    if len(parts) not in (2, 3) or not parts[0].isdigit():
        return False
    pid, started = int(parts[0]), parts[1]
    if pid == os.getpid():
        return False
    if len(parts) == 3 and parts[2] != _pid_namespace():  # written from another container: cannot tell
        return False
    if not _pid_alive(pid):
        return True
    if sys.platform.startswith("linux") and started != "-":
        now = process_start_time(pid)
        return now is not None and now != started  # the pid now belongs to another process
    return False


def sweep_stale(parent: Path | None = None) -> list[Path]:
    """Remove stage folders under ``parent`` (default: the temp folder) whose owner process is gone."""
    root = Path(parent) if parent is not None else Path(tempfile.gettempdir())
    removed: list[Path] = []
    try:
        candidates = [p for p in root.iterdir() if p.name.startswith(STAGE_PREFIX)]
    except OSError:
        return removed
    for folder in candidates:
        try:
            if folder.is_symlink() or not folder.is_dir():
                continue
            record = (folder / OWNER_FILE).read_text(encoding="ascii")
        except (OSError, UnicodeDecodeError):
            continue
        if _owner_gone(record):
            shutil.rmtree(folder, ignore_errors=True)
            removed.append(folder)
    return removed


@atexit.register
def _remove_live_stages() -> None:
    for folder in list(_live):
        shutil.rmtree(folder, ignore_errors=True)
    _live.clear()


class StagedRun:
    """A run's rows as Parquet parts per table under a fresh temporary folder (what targets publish).

    Tables are those of :data:`arflow.results.STAGED_TABLES`; ``actuals``
    (keys, ``period``, ``value``) are the recent observations accuracy tracking
    scores earlier vintages with.

    >>> stage = StagedRun()
    >>> stage.write(0, {"models": pl.DataFrame({"k": [1], "decision": ["published"]})})
    >>> len(stage.files("models")), stage.files("gates")
    (1, [])
    >>> stage.cleanup()
    """

    def __init__(self, parent: Path | None = None) -> None:
        sweep_stale(parent)
        self.dir = Path(tempfile.mkdtemp(prefix=STAGE_PREFIX, dir=parent))
        _live.add(self.dir)
        tmp = self.dir / (OWNER_FILE + ".tmp")
        tmp.write_text(_owner_record(), encoding="ascii")
        os.replace(tmp, self.dir / OWNER_FILE)

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

    def arrow(self, table: str) -> pa.Table | None:
        """All rows of ``table`` as one Arrow table (columns unioned by name); None when there are none."""
        parts = [pq.read_table(f) for f in self.files(table)]
        if not parts:
            return None
        return pa.concat_tables(parts, promote_options="permissive")

    def batches(self, table: str) -> Iterator[pa.RecordBatch]:
        """``table``'s rows part by part (memory bounded by one part)."""
        for f in self.files(table):
            yield from pq.ParquetFile(f).iter_batches()

    def frame(self, table: str) -> pl.DataFrame:
        """All rows of ``table`` as a polars frame (empty when there are none)."""
        files = self.files(table)
        return pl.concat([pl.read_parquet(f) for f in files], how="diagonal_relaxed") if files else pl.DataFrame()

    def cleanup(self) -> None:
        shutil.rmtree(self.dir, ignore_errors=True)
        _live.discard(self.dir)

    def __enter__(self) -> "StagedRun":
        return self

    def __exit__(self, *exc: object) -> None:
        self.cleanup()
