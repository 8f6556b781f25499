"""What every source and target of arflow agrees on: records, the layout rule, and the interfaces.

This module holds no database code. A source (where rows are read) and a
target (where results are published) are plain classes that satisfy the
:class:`Source` and :class:`Target` protocols below; ``warehouse/registry.py``
says which job-file key builds which class, and ``job.py`` only talks to them
through these protocols.

Publishing is two-phase: the job calls :meth:`Target.prepare` on every
configured target (each writes the run invisibly: an open transaction, data
files no marker names yet), then :meth:`PendingPublication.commit` on each in
``commit_order`` (databases first, the lakehouse marker last). A failure before
the first commit aborts every pending publication, so nothing is half-written.
"""

from __future__ import annotations

import datetime as dt
import json
from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Protocol, runtime_checkable

from ..errors import PublishError

if TYPE_CHECKING:  # pragma: no cover - typing only
    from .stage import StagedRun

#: commit_order of database targets (DuckDB, PostgreSQL): committed first
DATABASE_ORDER = 0
#: commit_order of the lakehouse: its marker is written after every database committed
LAKEHOUSE_ORDER = 10


def run_id_for(job: str, as_of: Any) -> str:
    """The deterministic id of a job's vintage, ``"<job>@<as_of>"``."""
    text = as_of.isoformat() if isinstance(as_of, (dt.date, dt.datetime)) else str(as_of)
    return f"{job}@{text}"


@dataclass(frozen=True)
class TableLayout:
    """What the output tables are templated by: schema, key columns and types, period type."""

    schema: str
    keys: tuple[str, ...]
    key_types: tuple[str, ...]
    period_type: str


@dataclass(frozen=True)
class RunRecord:
    """The ``runs`` row of one run (``attempt`` is set by the target)."""

    run_id: str
    job: str
    as_of: Any
    started_at: dt.datetime
    finished_at: dt.datetime
    status: str
    series_total: int
    series_published: int
    series_quarantined: int
    quarantine_share: float
    on_failure: str
    frequency: str
    horizon: int
    coverage: tuple[float, ...]
    source: str
    config_sha256: str
    arflow_version: str
    reason_counts: dict[str, int] = field(default_factory=dict)
    #: hold_on_alarm: write the run's records but leave series_status, forecasts and the view as they were
    held: bool = False
    #: [publish] stale_after_periods (None: kept forecasts expire only when all their periods are past)
    stale_after_periods: int | None = None
    #: refuse (inside the transaction) a vintage more than this many periods after the job's latest one (None: no check)
    jump_limit: int | None = None


def runs_row(record: RunRecord, attempt: int) -> dict[str, Any]:
    """The ``runs`` table's row of ``record`` (without ``run_id``), in the DDL's column order."""
    return {
        "job": record.job,
        "as_of": record.as_of,
        "attempt": attempt,
        "started_at": record.started_at,
        "finished_at": record.finished_at,
        "duration_seconds": (record.finished_at - record.started_at).total_seconds(),
        "status": record.status,
        "series_total": record.series_total,
        "series_published": record.series_published,
        "series_quarantined": record.series_quarantined,
        "quarantine_share": record.quarantine_share,
        "reason_counts": json.dumps(record.reason_counts, sort_keys=True),
        "on_failure": record.on_failure,
        "frequency": record.frequency,
        "horizon": record.horizon,
        "coverage": list(record.coverage),
        "source": record.source,
        "config_sha256": record.config_sha256,
        "arflow_version": record.arflow_version,
    }


def check_layout_match(where: str, keys: list[str] | tuple[str, ...], period_type: str, layout: TableLayout) -> None:
    """Refuse to mix jobs with different keys or period types in one place (``where``: e.g. "schema x in y")."""
    if [k.lower() for k in keys] != [k.lower() for k in layout.keys]:
        raise PublishError(
            f"{where} holds results keyed by ({', '.join(keys)}), this job's keys are "
            f"({', '.join(layout.keys)}); publish this job to another schema with [publish] schema"
        )
    if period_type != layout.period_type:
        raise PublishError(
            f"{where} holds {period_type} periods, this job's are {layout.period_type}; "
            "publish this job to another schema with [publish] schema"
        )


@dataclass(frozen=True)
class SourceLayout:
    """Checked types of the source: DuckDB type names used in the output DDL."""

    key_types: tuple[str, ...]
    period_type: str  # DATE, TIMESTAMP or BIGINT
    value_type: str
    columns: tuple[tuple[str, str], ...]


@dataclass(frozen=True)
class SourceStats:
    """What a source holds at or before an as-of: rows, distinct series, the first period."""

    rows: int
    series: int
    first_period: Any


@runtime_checkable
class Source(Protocol):
    """Where rows are read (a context manager)."""

    def __enter__(self) -> Any: ...
    def __exit__(self, *exc: object) -> None: ...
    def close(self) -> None: ...
    def layout(self) -> SourceLayout: ...
    def check_rows(self) -> int: ...
    def latest_period(self) -> Any: ...
    def calendar(self) -> Any: ...                               # None: no calendar placement
    def parse_as_of(self, text: Any) -> Any: ...
    def place_as_of(self, text: Any) -> tuple[Any, Any]: ...      # (placed on the calendar, as given)
    def example_rows_at(self, period: Any) -> str | None: ...     # a few rows for a message, None if costly
    def stats(self, as_of: Any) -> SourceStats: ...
    def chunks(self, as_of: Any, chunk_series: int) -> Iterator[Any]: ...


class PendingPublication(Protocol):
    """A run written invisibly to one target; exactly one of commit/abort makes it final."""

    def commit(self) -> int:
        """Make the run visible atomically; returns the vintage's attempt number."""
        ...

    def abort(self) -> None:
        """Drop what was written (idempotent; a no-op after commit); published state stays as it was."""
        ...


@runtime_checkable
class Target(Protocol):
    """Where results are published (see the module docstring for the two phases)."""

    #: databases 0 (DuckDB, PostgreSQL) before the lakehouse 10
    commit_order: int

    def describe(self) -> str:
        """One line naming the target (never a password)."""
        ...

    def preflight(self) -> None:
        """Reachable and writable, before any work (cheap)."""
        ...

    def check_layout(self) -> str:
        """Raise when the target holds another job's layout or is not arflow's; else a status line."""
        ...

    def latest_vintage(self, job: str) -> Any | None:
        """The job's latest vintage that changed the published view (None when none yet)."""
        ...

    def prepare(self, record: RunRecord, staged: "StagedRun") -> PendingPublication:
        """Write the run invisibly; the returned publication is then committed or aborted."""
        ...

