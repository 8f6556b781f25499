"""The scheduled job: source -> core -> warehouse, in one call.

:func:`run_job` is the only place that wires the edges together; the command
line parses arguments, prints and maps errors to exit codes. Events go to an
optional ``on_event`` callback as plain dicts (``{"event": "start", ...}``).
"""

from __future__ import annotations

import datetime as dt
import os
import time
from collections.abc import Callable
from concurrent.futures import Future
from dataclasses import dataclass, field
from importlib import metadata
from pathlib import Path
from typing import Any

import polars as pl

from . import api
from .allocator import tune_for_batch
from .errors import SettingsError, SourceError
from .job_file import JobSpec, load_job
from .runtime import bind_to_parent, stop_pool
from .results import RESULT_TABLES
from .warehouse.contract import PendingPublication, RunRecord, TableLayout, Target, run_id_for
from .warehouse.registry import source_for, targets_for
from .warehouse.stage import StagedRun

Event = dict[str, Any]
EventSink = Callable[[Event], None]


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


#: the project's distribution name on package indexes (the import package and the command are ``arflow``)
DISTRIBUTION = "arflow-gated"


def arflow_version() -> str:
    """Installed package version (``0+unknown`` when run from a bare checkout)."""
    try:
        return metadata.version(DISTRIBUTION)
    except metadata.PackageNotFoundError:
        return "0+unknown"


def _layout(spec: JobSpec, source: Any) -> TableLayout:
    src = source.layout()
    return TableLayout(spec.publish.schema, spec.source.keys, src.key_types, src.period_type)


def _target_text(targets: list[Target]) -> str:
    return "; ".join(t.describe() for t in targets)


def _check_targets(targets: list[Target]) -> str:
    """Every target's layout check (raises on the first mismatch); their status lines joined."""
    return "; ".join(t.check_layout() for t in targets)


def _open_source(spec: JobSpec) -> Any:
    """The job's source: DuckDB (default) or, with ``[source] engine = "spark"``, Spark."""
    if spec.source.engine == "spark":
        from .spark_engine import SparkSource

        return SparkSource(spec)
    return source_for(spec.source, spec.settings.frequency)


def validate_job(spec: JobSpec) -> ValidationReport:
    """Check what ``run`` checks before fitting: columns, types, NULL keys, the calendar, the as-of guards."""
    previous = _previous_vintage(spec, strict=False)
    with _open_source(spec) as source:
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
    """The job's latest vintage in its target, read before the source is opened (they may be one file).

    A target locked by another process gives None here: the lock is reported
    by the target checks, and the publishing transaction checks the far-ahead
    guard again.
    """
    # the column types are not known before the source is open; the vintage lookup needs only the names
    lookup = TableLayout(spec.publish.schema, spec.source.keys, (), "")
    for target in targets_for(spec.publish, lookup):
        value = target.latest_vintage(spec.name)
        if value is not None:
            return value
    return None


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
    from .warehouse.duckdb_source import periods_between

    notes: list[str] = []
    latest = source.latest_period()
    freq = spec.settings.frequency
    calendar = source.calendar() if hasattr(source, "calendar") else None
    if as_of is None:
        value = latest
    else:
        if calendar is not None:
            value, given = source.place_as_of(as_of)
        else:
            value = given = source.parse_as_of(as_of)
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
            example = ""
            if as_of is None and hasattr(source, "example_rows"):
                example = f" (rows at {_iso(value)}: {source.example_rows(source._period_expr() + ' = ' + _sql_literal(value))})"
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


def _sql_literal(value: Any) -> str:
    if isinstance(value, dt.datetime):
        return f"TIMESTAMP '{value.isoformat(sep=' ')}'"
    if isinstance(value, dt.date):
        return f"DATE '{value.isoformat()}'"
    return str(int(value))


def run_job(
    spec: JobSpec, as_of: Any = None, dry_run: bool = False, on_event: EventSink | None = None, *,
    allow_beyond_data: bool = False, allow_jump: bool = False,
) -> JobOutcome:
    """Run a job: read, forecast chunk by chunk, publish everything in one transaction.

    ``allow_beyond_data`` / ``allow_jump`` lift the as-of guards (see :func:`place_as_of`).
    """
    tune_for_batch()
    emit: EventSink = on_event or (lambda event: None)
    clock = time.perf_counter()
    started_at = _utcnow()
    settings = spec.settings
    notes: list[str] = []
    spark = spec.source.engine == "spark"
    if not dry_run:  # writable and not held by another program, before any work
        for target in targets_for(spec.publish, TableLayout(spec.publish.schema, spec.source.keys, (), "")):
            target.preflight()
    previous = _previous_vintage(spec, strict=not dry_run)
    with _open_source(spec) as source:
        source.layout()
        source.check_rows()
        as_of_value, as_of_notes = place_as_of(
            spec, source, as_of, previous=previous, allow_beyond_data=allow_beyond_data, allow_jump=allow_jump
        )
        notes.extend(as_of_notes)
        stats = source.stats(as_of_value)
        rows, series = stats.rows, stats.series
        if rows == 0:
            raise SourceError(f"the source has no rows at or before --as-of {as_of}; pick a later period")
        chunk_series = spec.run.chunk_series
        if settings.gates.series_fdr is not None and series > chunk_series and not spark:
            chunk_series = series
            notes.append("gates.series_fdr adjusts across all series of a run, so the run used one chunk")
        n_chunks = source.task_count(series, chunk_series) if spark else -(-series // chunk_series)
        layout = _layout(spec, source)
        targets = targets_for(spec.publish, layout)
        # before any fitting: every target is arflow's, with this job's layout
        target_note = _check_targets(targets)
        run_id = run_id_for(spec.name, as_of_value)
        emit({
            "event": "start", "job": spec.name, "run_id": run_id, "as_of": as_of_value, "dry_run": dry_run,
            "source": spec.source.describe(), "target": _target_text(targets), "rows": rows, "series": series,
            "chunks": n_chunks, "workers": spec.run.workers, "notes": notes,
        })
        stage = StagedRun()
        summary = ChunkSummary()
        phases: dict[str, float] = {}
        try:
            if spark:  # the same per-chunk api.forecast, run by Spark tasks on buckets of whole series
                parts = source.forecast_chunks(as_of_value, n_chunks, series, emit)
                notes.extend(source.notes)
                for i, part in enumerate(parts):
                    summary = summary + _stage_run(part, stage.dir, i, source.actuals[i])
            else:
                summary = _forecast_chunks(spec, source, as_of_value, chunk_series, n_chunks, series, emit, stage)
        except BaseException:
            stage.cleanup()
            raise
        phases["read_and_compute"] = time.perf_counter() - clock
    total = summary.series_total
    share = summary.series_quarantined / total if total else 0.0
    alarm = share > settings.gates.max_quarantine_share
    held = alarm and spec.publish.hold_on_alarm and not dry_run
    if held:
        notes.append(
            "held: the quarantined share is over gates.max_quarantine_share, so this run's records were written but "
            "published_forecasts was left as it was (publish.hold_on_alarm)"
        )
    attempt: int | None = None
    try:
        if dry_run:
            notes.append(f"dry run: nothing was written; target {target_note}")
        else:
            t_pub = time.perf_counter()
            emit({"event": "publish", "run_id": run_id, "target": _target_text(targets)})
            record = RunRecord(
                run_id=run_id, job=spec.name, as_of=as_of_value, started_at=started_at, finished_at=_utcnow(),
                status="held" if held else ("alarm" if alarm else "ok"), series_total=total, series_published=summary.series_published,
                series_quarantined=summary.series_quarantined, quarantine_share=share,
                on_failure=spec.publish.on_failure, frequency=settings.frequency, horizon=settings.forecast.horizon,
                coverage=settings.forecast.coverage, source=spec.source.describe(),
                config_sha256=spec.config_sha256, arflow_version=arflow_version(),
                reason_counts=summary.reason_counts, held=held,
                stale_after_periods=spec.publish.stale_after_periods,
                jump_limit=None if allow_jump else _jump_limit(spec),
            )
            attempt = publish_run(targets, record, stage)
            phases["publish"] = time.perf_counter() - t_pub
    finally:
        stage.cleanup()
    outcome = JobOutcome(
        job=spec.name, run_id=run_id, as_of=as_of_value, dry_run=dry_run, rows_read=rows, series_total=total,
        series_published=summary.series_published, series_quarantined=summary.series_quarantined,
        reason_counts=summary.reason_counts, quarantine_share=share,
        max_quarantine_share=settings.gates.max_quarantine_share, chunks=summary.chunks,
        seconds=time.perf_counter() - clock, target=_target_text(targets), attempt=attempt, notes=tuple(notes),
        phase_seconds={k: round(v, 3) for k, v in phases.items()}, held=held,
    )
    emit({"event": "finish", **outcome_dict(outcome)})
    return outcome


def publish_run(targets: list[Target], record: RunRecord, staged: StagedRun) -> int | None:
    """Prepare the run on every target, then commit them in ``commit_order``; the first commit's attempt.

    A failure while preparing (or before the first commit) aborts every
    pending publication, so no target shows the run; aborting after a commit
    is a no-op for the committed ones.
    """
    pending: list[PendingPublication] = []
    attempt: int | None = None
    try:
        for target in targets:  # already in commit order
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
        "reason_counts": outcome.reason_counts, "chunks": outcome.chunks, "seconds": round(outcome.seconds, 3),
        "target": outcome.target, "notes": list(outcome.notes), "phase_seconds": outcome.phase_seconds,
    }


@dataclass(frozen=True)
class ChunkSummary:
    """Counts of one or more chunks (what the run log needs; the rows are staged on disk)."""

    series_total: int = 0
    series_published: int = 0
    reason_counts: dict[str, int] = field(default_factory=dict)
    chunks: int = 0

    @property
    def series_quarantined(self) -> int:
        return self.series_total - self.series_published

    def __add__(self, other: "ChunkSummary") -> "ChunkSummary":
        reasons = dict(self.reason_counts)
        for k, v in other.reason_counts.items():
            reasons[k] = reasons.get(k, 0) + v
        reasons = dict(sorted(reasons.items(), key=lambda kv: (-kv[1], kv[0])))
        return ChunkSummary(self.series_total + other.series_total, self.series_published + other.series_published,
                            reasons, self.chunks + other.chunks)


def _actuals(frame: pl.DataFrame, keys: list[str], period: str, value: str, periods: int) -> pl.DataFrame:
    """The last ``periods`` distinct periods of a chunk, as (keys, period, value) for accuracy tracking."""
    recent = frame.get_column(period).unique().sort().tail(periods)
    if recent.len() == 0:
        return pl.DataFrame()
    return (
        frame.filter(pl.col(period) >= recent[0])
        .select(*keys, pl.col(period).alias("period"), pl.col(value).cast(pl.Float64).alias("value"))
    )


def _stage_run(run: api.ForecastRun, stage_dir: str | Path, chunk_no: int, actuals: pl.DataFrame | None) -> ChunkSummary:
    frames = {t: getattr(run, t) for t in RESULT_TABLES}
    frames["actuals"] = actuals
    StagedRun.write_to(stage_dir, chunk_no, frames)
    return ChunkSummary(run.series_total, run.series_published, run.reason_counts(), 1)


def _stage_chunk(
    frame: pl.DataFrame, keys: list[str], period: str, value: str, settings: Any, as_of: Any,
    stage_dir: str, chunk_no: int,
) -> ChunkSummary:
    """Forecast one chunk of whole series and stage its rows (runs in a worker process too)."""
    run = api.forecast(frame, keys=keys, period=period, value=value, settings=settings, as_of=as_of)
    window = 2 * max(settings.forecast.horizon, settings.backtest.horizon or 0)
    return _stage_run(run, stage_dir, chunk_no, _actuals(frame, keys, period, value, window))


def _forecast_chunks(
    spec: JobSpec, source: Any, as_of: Any, chunk_series: int, n_chunks: int, series: int, emit: EventSink,
    stage: StagedRun,
) -> ChunkSummary:
    """Forecast chunk by chunk, staging each chunk's rows; ``[run] workers`` > 1 uses worker processes.

    Processes, not threads: the statistical core is memory-bound numpy, and
    threads in one address space were measured slower than one thread on a
    2-core virtual machine. Workers start fresh (spawn), so they share no
    thread pools with this process; at most ``2 x workers`` chunks are in flight,
    which bounds memory by the chunk size.
    """
    keys = list(spec.source.keys)
    args = (keys, spec.source.period, spec.source.value, spec.settings, as_of, str(stage.dir))
    summary = ChunkSummary()

    def progress(part: ChunkSummary) -> None:
        nonlocal summary
        summary = summary + part
        emit({"event": "chunk", "chunk": summary.chunks, "chunks": n_chunks, "series_done": summary.series_total,
              "series_total": series})

    if spec.run.workers <= 1 or n_chunks <= 1:
        for i, frame in enumerate(source.chunks(as_of, chunk_series)):
            progress(_stage_chunk(frame, *args, i))
        return summary
    import multiprocessing as mp
    from concurrent.futures import ProcessPoolExecutor

    ctx = mp.get_context("spawn")
    workers = min(spec.run.workers, n_chunks)
    # workers die with this process (kill -9 included) and do not hold its output open
    pool = ProcessPoolExecutor(max_workers=workers, mp_context=ctx, initializer=_start_worker, initargs=(os.getpid(),))
    try:
        # start the workers (and their imports) while this process runs the source query
        for _ in range(workers):
            pool.submit(_start_worker)
        pending: list[Future[ChunkSummary]] = []
        for i, frame in enumerate(source.chunks(as_of, chunk_series)):
            pending.append(pool.submit(_stage_chunk, frame, *args, i))
            while len(pending) >= spec.run.workers * 2:
                progress(pending.pop(0).result())
        for fut in pending:
            progress(fut.result())
    except BaseException:
        stop_pool(pool)  # an error or a stop signal: end the workers now, before the stage is removed
        raise
    pool.shutdown(wait=True)
    return summary


def _start_worker(parent: int | None = None) -> None:
    """Worker process set-up: bound to its parent's life, allocator tuning and the imports a chunk needs."""
    if parent is not None:
        bind_to_parent(parent)
    tune_for_batch()
    from .core import pipeline  # noqa: F401  (imports numpy, scipy.special and the core once)


def _utcnow() -> dt.datetime:
    return dt.datetime.now(dt.timezone.utc).replace(tzinfo=None)


def prepare_demo(directory: Path, seed: int | None = None) -> Path:
    """Build the sample warehouse and its job file in ``directory``; returns the job file.

    A job file already there that differs from the shipped one (the user
    edited it) is kept as it is; :func:`demo_job_note` says so.
    """
    from .sample import generate

    directory.mkdir(parents=True, exist_ok=True)
    job_path = directory / generate.DEMO_JOB_FILE
    generate.build_sample_warehouse(directory / generate.DEMO_DATABASE, **({} if seed is None else {"seed": seed}))
    if demo_job_note(job_path) is None:
        job_path.write_text(generate.demo_job_text(), encoding="utf-8")
    return job_path


def demo_job_note(job_path: Path) -> str | None:
    """A note when ``job_path`` exists and is not the shipped demo job (so the demo must not overwrite it)."""
    from .sample import generate

    try:
        text = job_path.read_text(encoding="utf-8")
    except FileNotFoundError:
        return None
    except (OSError, UnicodeDecodeError):
        text = None
    if text == generate.demo_job_text():
        return None
    return f"kept your edited job file {job_path} (not overwritten) and ran it; delete it to get the shipped demo job back"


def run_demo(directory: Path, on_event: EventSink | None = None) -> JobOutcome:
    """``arflow demo``: build the sample warehouse in ``directory`` and run its job (an edited job file is kept)."""
    from .sample import generate

    note = demo_job_note(directory / generate.DEMO_JOB_FILE)
    if note is not None and on_event is not None:
        on_event({"event": "note", "message": note})
    job_path = prepare_demo(directory)
    outcome = run_job(load_job(job_path), on_event=on_event)
    if note is not None:
        from dataclasses import replace

        outcome = replace(outcome, notes=(*outcome.notes, note))
    return outcome
