"""The scheduled job: source -> engine -> targets, in one call.

:func:`run_job` is the only place that wires the pieces together, and only
through their interfaces: the engine (``engines/registry.py``) opens its
source and stages every chunk's results, the targets (``warehouse/registry.py``)
are prepared and then committed in their fixed order. The command line parses
arguments, prints and maps errors to exit codes. Events go to an optional
``on_event`` callback as plain dicts (``{"event": "start", ...}``).
"""

from __future__ import annotations

import datetime as dt
import time
from dataclasses import dataclass, field
from typing import Any

from .allocator import tune_for_batch
from .engines.base import Engine, EventSink, WorkPlan
from .engines.registry import engine_for
from .errors import SettingsError, SourceError
from .job_file import JobSpec
from .machine import resolve_workers
from .run import ChunkSummary
from .warehouse.contract import PendingPublication, RunRecord, SourceStats, TableLayout, Target, run_id_for
from .warehouse.duckdb_source import periods_between
from .warehouse.registry import targets_for
from .warehouse.stage import StagedRun
from .version import arflow_version

Event = dict[str, Any]


@dataclass(frozen=True)
class JobOutcome:
    """What a run did: counts, reasons, timing and where results went."""

    job: str
    run_id: str
    as_of: Any
    dry_run: bool
    rows_read: int
    series_total: int
    series_published: int
    series_quarantined: int
    reason_counts: dict[str, int]
    quarantine_share: float
    max_quarantine_share: float
    chunks: int
    seconds: float
    target: str
    attempt: int | None = None
    notes: tuple[str, ...] = ()
    phase_seconds: dict[str, float] = field(default_factory=dict)
    #: the run was over the alarm level and [publish] hold_on_alarm kept the published view as it was
    held: bool = False
    #: warning checks that failed without holding a series back -> number of series
    warning_counts: dict[str, int] = field(default_factory=dict)

    @property
    def alarm(self) -> bool:
        """True when the quarantined share is over ``gates.max_quarantine_share``."""
        return self.quarantine_share > self.max_quarantine_share


@dataclass(frozen=True)
class ValidationReport:
    """What ``arflow validate`` found without fitting anything."""

    job: str
    source: str
    columns: tuple[tuple[str, str], ...]
    rows: int
    series: int
    first_period: Any
    latest_period: Any
    target: str
    target_status: str
    notes: tuple[str, ...] = field(default_factory=tuple)



def _layout(spec: JobSpec, source: Any) -> TableLayout:
    src = source.layout()
    return TableLayout(spec.publish.schema, spec.source.keys, src.key_types, src.period_type)


def _target_text(targets: list[Target]) -> str:
    return "; ".join(t.describe() for t in targets)


def _check_targets(targets: list[Target]) -> str:
    """Every target's layout check (raises on the first mismatch); their status lines joined."""
    return "; ".join(t.check_layout() for t in targets)


def validate_job(spec: JobSpec) -> ValidationReport:
    """Check what ``run`` checks before fitting: columns, types, NULL keys, the calendar, the as-of guards, every target."""
    previous = _previous_vintage(spec, strict=False)
    with engine_for(spec).open_source() as source:
        src = source.layout()
        source.check_rows()
        latest, as_of_notes = place_as_of(spec, source, None, previous=previous)
        stats = source.stats(latest)
        layout = _layout(spec, source)
    targets = targets_for(spec.publish, layout)
    status = _check_targets(targets)
    wanted = {*spec.source.keys, spec.source.period, spec.source.value}
    columns = tuple((n, t) for n, t in src.columns if n in wanted)
    return ValidationReport(spec.name, spec.source.describe(), columns, stats.rows, stats.series, stats.first_period, latest,
                            _target_text(targets), status, tuple(as_of_notes))


#: [publish] max_periods_ahead when the job file leaves it out: about a year (five for yearly data)
DEFAULT_PERIODS_AHEAD = {"day": 366, "week": 53, "month": 12, "quarter": 4, "year": 5, "step": 1000}


def _previous_vintage(spec: JobSpec, strict: bool) -> Any:
    """The job's latest vintage in its targets (the first that has one, in commit order), read before the source is opened.

    A target locked by another process gives None here: the lock is reported
    by the target checks, and the publishing transaction checks the far-ahead
    guard again.
    """
    for target in targets_for(spec.publish, _names_only(spec)):
        value = target.latest_vintage(spec.name)
        if value is not None:
            return value
    return None


def _names_only(spec: JobSpec) -> TableLayout:
    """The layout before the source is open: names only (enough to find a target and read its vintages)."""
    return TableLayout(spec.publish.schema, spec.source.keys, (), "")


def place_as_of(
    spec: JobSpec, source: Any, as_of: Any, *, previous: Any = None, allow_beyond_data: bool = False,
    allow_jump: bool = False,
) -> tuple[Any, list[str]]:
    """The vintage a run will write, and notes: the as-of guards.

    The as-of (default: the latest period in the source) is moved onto the
    source's calendar label; one later than the latest period in the source is
    refused unless ``allow_beyond_data``; one more than ``[publish]
    max_periods_ahead`` periods after ``previous`` (the job's latest vintage in
    the target) is refused unless ``allow_jump`` (a stray far-future row must
    not become the latest vintage).
    """
    notes: list[str] = []
    latest = source.latest_period()
    freq = spec.settings.frequency
    source.calendar()  # the source's calendar is checked here (a label off its calendar fails), as-of or not
    if as_of is None:
        value = latest
    else:
        value, given = source.place_as_of(as_of)
        if value != given:
            notes.append(f"--as-of {_iso(given)} was moved to {_iso(value)}, the source's label of that {freq}")
        if value > latest and not allow_beyond_data:
            raise SettingsError(
                f"--as-of {_iso(value)} is after the latest period in the source, {_iso(latest)}; use an as-of at or "
                "before it, or add --allow-beyond-data to write such a vintage deliberately"
            )
    limit = _jump_limit(spec)
    if previous is not None and value > previous and not allow_jump:
        gap = periods_between(freq, previous, value)
        if gap > limit:
            where = "--as-of" if as_of is not None else "the latest period in the source"
            rows = source.example_rows_at(value) if as_of is None else None
            example = f" (rows at {_iso(value)}: {rows})" if rows else ""
            error = SettingsError if as_of is not None else SourceError
            raise error(
                f"{where}, {_iso(value)}, is {gap:,} {freq} period(s) after this job's latest vintage {_iso(previous)}, "
                f"more than publish.max_periods_ahead = {limit}{example}; fix the source or the as-of, "
                "or add --allow-jump to write it deliberately"
            )
    return value, notes


def _jump_limit(spec: JobSpec) -> int:
    """``[publish] max_periods_ahead``, or the frequency's default."""
    limit = spec.publish.max_periods_ahead
    return DEFAULT_PERIODS_AHEAD[spec.settings.frequency] if limit is None else limit


def _iso(value: Any) -> str:
    return value.isoformat() if isinstance(value, (dt.date, dt.datetime)) else str(value)


@dataclass(frozen=True)
class _Planned:
    """What a run settled before any fitting: its vintage, its size, how it is cut up and where it goes."""

    as_of: Any
    run_id: str
    stats: SourceStats
    plan: WorkPlan
    targets: list[Target]
    target_note: str


def run_job(
    spec: JobSpec, as_of: Any = None, dry_run: bool = False, on_event: EventSink | None = None, *,
    allow_beyond_data: bool = False, allow_jump: bool = False, tune_allocator: bool = True,
) -> JobOutcome:
    """Run a job: read, forecast chunk by chunk, publish to every target (see :func:`publish_run`).

    ``allow_beyond_data`` / ``allow_jump`` lift the as-of guards (see :func:`place_as_of`).
    ``tune_allocator=False`` leaves this process's allocator as it is (worker processes are tuned
    either way): the typed run call in a long-lived process passes it.
    """
    if tune_allocator:
        tune_for_batch()
    emit: EventSink = on_event or (lambda event: None)
    clock = time.perf_counter()
    started_at = _utcnow()
    notes: list[str] = []
    engine = engine_for(spec)
    if not dry_run:  # writable and not held by another program, before any work
        for target in targets_for(spec.publish, _names_only(spec)):
            target.preflight()
    previous = _previous_vintage(spec, strict=not dry_run)
    with engine.open_source() as source:
        planned = _plan(spec, engine, source, as_of, previous, notes, allow_beyond_data, allow_jump)
        emit(_start_event(spec, planned, dry_run, notes))
        stage = StagedRun()
        try:
            summary = engine.run(source, planned.as_of, planned.plan, planned.stats.series, stage, emit)
        except BaseException:
            stage.cleanup()
            raise
        notes.extend(engine.notes)
        phases = {"read_and_compute": time.perf_counter() - clock}
    try:
        held, attempt = _finish(spec, planned, summary, stage, started_at, dry_run, allow_jump, notes, emit, phases)
    finally:
        stage.cleanup()
    outcome = JobOutcome(
        job=spec.name, run_id=planned.run_id, as_of=planned.as_of, dry_run=dry_run, rows_read=planned.stats.rows,
        series_total=summary.series_total, series_published=summary.series_published,
        series_quarantined=summary.series_quarantined, reason_counts=summary.reason_counts,
        quarantine_share=_share(summary), max_quarantine_share=spec.settings.gates.max_quarantine_share,
        chunks=summary.chunks, seconds=time.perf_counter() - clock, target=_target_text(planned.targets),
        attempt=attempt, notes=tuple(notes), phase_seconds={k: round(v, 3) for k, v in phases.items()}, held=held,
        warning_counts=summary.warning_counts,
    )
    emit({"event": "finish", **outcome_dict(outcome)})
    return outcome


def _plan(
    spec: JobSpec, engine: Engine, source: Any, as_of: Any, previous: Any, notes: list[str],
    allow_beyond_data: bool, allow_jump: bool,
) -> _Planned:
    """Checks before any fitting: the source's columns and rows, the as-of guards, the plan, every target's layout."""
    source.layout()
    source.check_rows()
    as_of_value, as_of_notes = place_as_of(
        spec, source, as_of, previous=previous, allow_beyond_data=allow_beyond_data, allow_jump=allow_jump
    )
    notes.extend(as_of_notes)
    stats = source.stats(as_of_value)
    if stats.rows == 0:
        raise SourceError(f"the source has no rows at or before --as-of {as_of}; pick a later period")
    plan = engine.plan(source, stats.series)
    notes.extend(plan.notes)
    targets = targets_for(spec.publish, _layout(spec, source))
    target_note = _check_targets(targets)  # every target is arflow's, with this job's layout
    return _Planned(as_of_value, run_id_for(spec.name, as_of_value), stats, plan, targets, target_note)


def _start_event(spec: JobSpec, planned: _Planned, dry_run: bool, notes: list[str]) -> Event:
    return {
        "event": "start", "job": spec.name, "run_id": planned.run_id, "as_of": planned.as_of, "dry_run": dry_run,
        "source": spec.source.describe(), "target": _target_text(planned.targets), "rows": planned.stats.rows,
        "series": planned.stats.series, "chunks": planned.plan.chunks,
        "workers": min(resolve_workers(spec.run.workers), max(planned.plan.chunks, 1)), "notes": notes,
    }


def _share(summary: ChunkSummary) -> float:
    return summary.series_quarantined / summary.series_total if summary.series_total else 0.0


def _finish(
    spec: JobSpec, planned: _Planned, summary: ChunkSummary, stage: StagedRun, started_at: dt.datetime, dry_run: bool,
    allow_jump: bool, notes: list[str], emit: EventSink, phases: dict[str, float],
) -> tuple[bool, int | None]:
    """After the compute: the alarm and hold rule, then publish (or say what a dry run would have); (held, attempt)."""
    alarm = _share(summary) > spec.settings.gates.max_quarantine_share
    held = alarm and spec.publish.hold_on_alarm and not dry_run
    if held:
        notes.append(
            "held: the quarantined share is over gates.max_quarantine_share, so this run's records were written but "
            "published_forecasts was left as it was (publish.hold_on_alarm)"
        )
    if dry_run:
        notes.append(f"dry run: nothing was written; target {planned.target_note}")
        return held, None
    clock = time.perf_counter()
    emit({"event": "publish", "run_id": planned.run_id, "target": _target_text(planned.targets)})
    record = _record(spec, planned, summary, started_at, "held" if held else ("alarm" if alarm else "ok"), held, allow_jump)
    attempt = publish_run(planned.targets, record, stage)
    phases["publish"] = time.perf_counter() - clock
    return held, attempt


def _record(
    spec: JobSpec, planned: _Planned, summary: ChunkSummary, started_at: dt.datetime, status: str, held: bool,
    allow_jump: bool,
) -> RunRecord:
    settings = spec.settings
    return RunRecord(
        run_id=planned.run_id, job=spec.name, as_of=planned.as_of, started_at=started_at, finished_at=_utcnow(),
        status=status, series_total=summary.series_total, series_published=summary.series_published,
        series_quarantined=summary.series_quarantined, quarantine_share=_share(summary),
        on_failure=spec.publish.on_failure, frequency=settings.frequency, horizon=settings.forecast.horizon,
        coverage=settings.forecast.coverage, source=spec.source.describe(), config_sha256=spec.config_sha256,
        arflow_version=arflow_version(), reason_counts=summary.reason_counts, held=held,
        stale_after_periods=spec.publish.stale_after_periods, jump_limit=None if allow_jump else _jump_limit(spec),
    )


def publish_run(targets: list[Target], record: RunRecord, staged: StagedRun) -> int | None:
    """Prepare the run on every target, then commit them in ``commit_order``; the first commit's attempt.

    A failure while preparing (or before the first commit) aborts every
    pending publication, so no target shows the run; aborting after a commit
    is a no-op for the committed ones.
    """
    pending: list[PendingPublication] = []
    attempt: int | None = None
    try:
        for target in sorted(targets, key=lambda t: t.commit_order):
            pending.append(target.prepare(record, staged))
        for publication in pending:
            number = publication.commit()
            attempt = number if attempt is None else attempt
    finally:
        for publication in pending:
            publication.abort()  # no-op after a commit
    return attempt


def outcome_dict(outcome: JobOutcome) -> dict[str, Any]:
    """A JSON-friendly dict of an outcome."""
    return {
        "job": outcome.job, "run_id": outcome.run_id, "as_of": outcome.as_of, "dry_run": outcome.dry_run,
        "attempt": outcome.attempt, "rows_read": outcome.rows_read, "series_total": outcome.series_total,
        "series_published": outcome.series_published, "series_quarantined": outcome.series_quarantined,
        "quarantine_share": round(outcome.quarantine_share, 6), "alarm": outcome.alarm, "held": outcome.held,
        "reason_counts": outcome.reason_counts, "warning_counts": outcome.warning_counts, "chunks": outcome.chunks, "seconds": round(outcome.seconds, 3),
        "target": outcome.target, "notes": list(outcome.notes), "phase_seconds": outcome.phase_seconds,
    }


def _utcnow() -> dt.datetime:
    return dt.datetime.now(dt.timezone.utc).replace(tzinfo=None)
