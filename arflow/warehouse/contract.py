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
from collections.abc import Iterable, Iterator, Mapping
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Protocol, runtime_checkable

from ..errors import PublishError
from ..settings import MAX_COVERAGE_LEVELS

if TYPE_CHECKING:  # pragma: no cover - typing only
    from .stage import StagedRun

#: commit_order of database targets (DuckDB, PostgreSQL): committed first
DATABASE_ORDER = 0
#: commit_order of the lakehouse: its marker is written after every database committed
LAKEHOUSE_ORDER = 10
#: per coverage level: table -> column prefixes added with ALTER TABLE
COVERAGE_COLUMNS = {"forecasts": ("lower", "upper"), "backtests": ("hit_rate",), "accuracy": ("covered",)}
#: columns an earlier release wrote under another name: table -> (old name or prefix, new); renamed in place
RENAMED_COLUMNS = {"backtests": (("horizon", "step"), ("coverage_", "hit_rate_")),
                   "accuracy": (("run_id", "forecast_run_id"),)}


def run_id_for(job: str, as_of: Any) -> str:
    """The deterministic id of a job's vintage, ``"<job>@<as_of>"``."""
    text = as_of.isoformat() if isinstance(as_of, (dt.date, dt.datetime)) else str(as_of)
    return f"{job}@{text}"


def periods_between(frequency: str, earlier: Any, later: Any) -> int:
    """Whole periods of ``frequency`` from ``earlier`` to ``later`` (negative when later is earlier)."""
    if frequency == "step":
        return int(later) - int(earlier)
    a = earlier.date() if isinstance(earlier, dt.datetime) else earlier
    b = later.date() if isinstance(later, dt.datetime) else later
    if frequency == "day":
        return (b - a).days
    if frequency == "week":
        return (b - a).days // 7
    months = (b.year - a.year) * 12 + (b.month - a.month)
    return months // {"month": 1, "quarter": 3, "year": 12}[frequency]


def check_coverage_levels(where: str, forecast_columns: Iterable[str], labels: Iterable[str]) -> None:
    """Refuse a run that would take a schema past :data:`MAX_COVERAGE_LEVELS` interval levels
    (``forecast_columns``: the columns ``forecasts`` has now; ``labels``: this run's levels)."""
    levels = {c[len("lower_"):] for c in forecast_columns if c.startswith("lower_")} | set(labels)
    if len(levels) > MAX_COVERAGE_LEVELS:
        raise PublishError(
            f"{where} would hold {len(levels)} coverage levels, at most {MAX_COVERAGE_LEVELS} are allowed (each adds "
            "columns for good); reuse the levels already there or publish to another schema"
        )


def check_jump(record: "RunRecord", latest: Any) -> None:
    """The far-ahead guard inside a target's publication: refuse a vintage more than
    ``publish.max_periods_ahead`` periods after the job's ``latest`` vintage there (the job
    checked it before fitting; a run that started since may have moved the latest)."""
    if record.jump_limit is None or latest is None or not record.as_of > latest:
        return
    gap = periods_between(record.frequency, latest, record.as_of)
    if gap > record.jump_limit:
        raise PublishError(
            f"vintage {record.as_of} is {gap:,} {record.frequency} period(s) after this job's latest vintage {latest}, "
            f"more than publish.max_periods_ahead = {record.jump_limit}; nothing was published "
            "(add --allow-jump to write it deliberately)"
        )


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


def renamed_column(table: str, column: str) -> str:
    """The current name of a column an earlier release may have written under another name."""
    for old, new in RENAMED_COLUMNS.get(table, ()):
        if column == old or (old.endswith("_") and column.startswith(old)):
            return new + column[len(old):]
    return column


def column_difference(
    expected: list[tuple[str, str]], actual: dict[str, str], table: str, recorded: set[str] | None,
    level_types: Mapping[str, str],
) -> tuple[str | None, list[tuple[str, str]]]:
    """(what differs between a table's columns and arflow's definition or None, columns new in this version).

    Types are compared as the target's catalogue spells them (``expected``
    and ``level_types``, a coverage level's column type per table, in the
    same spelling). ``recorded``: the columns arflow created the table with
    (None: every defined column must be there). A defined column missing
    from the table and from ``recorded`` is new in this version, not dropped;
    other columns are refused unless they are a coverage level's.
    """
    want = {c.lower(): t for c, t in expected}
    lowered = {c.lower(): t for c, t in actual.items()}
    new: list[tuple[str, str]] = []
    for column, typ in want.items():
        if column not in lowered:
            if recorded is not None and column not in recorded:
                new.append((column, typ))
                continue
            return f"column {table}.{column} was dropped", []
        if lowered[column] != typ:
            return f"column {table}.{column} is {lowered[column]}, arflow writes {typ}", []
    prefixes = tuple(f"{p}_" for p in COVERAGE_COLUMNS.get(table, ()))
    for column, typ in lowered.items():
        if column in want:
            continue
        if prefixes and column.startswith(prefixes):
            if typ != level_types[table]:
                return f"column {table}.{column} is {typ}, arflow writes {level_types[table]}", []
            continue
        return f"table {table} has a column {column} that arflow did not create", []
    return None, new


def check_owned_tables(
    where: str, tables: tuple[str, ...], expected: Mapping[str, list[tuple[str, str]]],
    present: Mapping[str, dict[str, str]], recorded: Mapping[str, set[str]], level_types: Mapping[str, str],
) -> tuple[list[str], list[tuple[str, str, str]]]:
    """Refuse a schema whose arflow-named tables arflow did not create, or whose columns were altered.

    Every target reads its own catalogue and passes: ``tables``, arflow's
    tables in creation order; ``expected``, their columns and types;
    ``present``, table -> {column: type} as the schema holds them;
    ``recorded``, table -> the columns arflow created it with (arflow's
    marker table; a target may adopt tables that match exactly). Returns the
    tables still to be created and the (table, column, type) columns this
    version defines that the tables never had (to be added).
    """
    fix = "publish this job to another schema with [publish] schema"
    ours = [t for t in tables if t in present]
    # columns an earlier release named otherwise count under their new names (renamed when the run publishes)
    present = {t: {renamed_column(t, c): typ for c, typ in cols.items()} for t, cols in present.items()}
    recorded = {t: {renamed_column(t, c) for c in cols} for t, cols in recorded.items()}
    for table in ours:
        if table not in recorded:
            raise PublishError(f"{where} has a table {table} that arflow did not create; {fix} (or rename that table)")
    for table in sorted(set(recorded) - set(present)):
        if table in tables:
            raise PublishError(f"{where}: arflow's table {table} was dropped; {fix} (or restore the table)")
    new_columns: list[tuple[str, str, str]] = []
    for table in ours:
        problem, new = column_difference(expected[table], present[table], table, recorded[table], level_types)
        if problem:
            raise PublishError(f"{where}: {problem}; {fix} (or restore the column)")
        new_columns.extend((table, c, t) for c, t in new)
    # a coverage level has its columns in every table that carries levels
    labels = {c[len(p) + 1:] for t, prefixes in COVERAGE_COLUMNS.items() if t in present
              for p in prefixes for c in present[t] if c.startswith(p + "_")}
    for label in sorted(labels):
        for table, prefixes in COVERAGE_COLUMNS.items():
            for prefix in prefixes:
                if table in present and f"{prefix}_{label}" not in present[table]:
                    raise PublishError(f"{where}: column {table}.{prefix}_{label} was dropped; {fix} (or restore the column)")
    return [t for t in tables if t not in present], new_columns


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

