"""The local engine: chunks of whole series from the source, forecast in this process or in worker processes.

Processes, not threads: the statistical core is memory-bound numpy, and
threads in one address space were measured slower than one thread on a
2-core virtual machine. Workers start fresh (spawn), so they share no thread
pools with this process; at most ``2 x workers`` chunks are in flight, which
bounds memory by the chunk size. Each chunk is staged by whoever forecast it
(a worker writes its own Parquet parts); only counts come back.
"""

from __future__ import annotations

import math
import os
from concurrent.futures import Future
from typing import Any

from ..allocator import tune_for_batch
from ..machine import resolve_workers
from ..runtime import bind_to_parent, stop_pool, worker_context
from ..run import ChunkSummary, actuals_window, chunk_event, forecast_frame, recent_actuals
from ..settings import Settings
from ..warehouse.contract import Source
from ..warehouse.registry import source_for
from ..warehouse.stage import StagedRun
from .base import EventSink, WorkPlan, stage_chunk


class LocalEngine:
    """``[source] engine = "duckdb"`` (the default): DuckDB reads, this machine's processes compute."""

    def __init__(self, spec: Any) -> None:
        self.spec = spec
        self.notes: list[str] = []

    @classmethod
    def from_spec(cls, spec: Any) -> "LocalEngine":
        return cls(spec)

    def open_source(self) -> Source:
        return source_for(self.spec.source, self.spec.settings.frequency)

    def plan(self, source: Source, series: int) -> WorkPlan:
        """Chunks of ``[run] chunk_series``; one chunk when ``gates.series_fdr`` adjusts across all series."""
        chunk_series = self.spec.run.chunk_series
        if self.spec.settings.gates.series_fdr is not None and series > chunk_series:
            note = "gates.series_fdr adjusts across all series of a run, so the run used one chunk"
            return WorkPlan(1, series, (note,))
        return WorkPlan(math.ceil(series / chunk_series), chunk_series)

    def run(self, source: Any, as_of: Any, plan: WorkPlan, series: int, stage: StagedRun, emit: EventSink) -> ChunkSummary:
        src = self.spec.source
        args = (list(src.keys), src.period, src.value, self.spec.settings, as_of, str(stage.dir))
        frames = source.chunks(as_of, plan.chunk_series)
        done = ChunkSummary()

        def progress(part: ChunkSummary) -> None:
            nonlocal done
            done = done + part
            emit(chunk_event(done, plan.chunks, series))

        workers = min(resolve_workers(self.spec.run.workers), plan.chunks)  # default: the CPUs available
        if workers <= 1:
            for i, frame in enumerate(frames):
                progress(forecast_chunk(frame, *args, i))
        else:
            _in_workers(frames, args, workers, progress)
        return done


def forecast_chunk(
    frame: Any, keys: list[str], period: str, value: str, settings: Settings, as_of: Any, stage_dir: str, chunk_no: int,
) -> ChunkSummary:
    """Forecast one chunk of whole series and stage its rows (runs in a worker process too)."""
    run = forecast_frame(frame, keys, period, value, settings, as_of, workers=1)  # the job's workers are the parallelism
    return stage_chunk(run, stage_dir, chunk_no, recent_actuals(frame, keys, period, value, actuals_window(settings)))


def _in_workers(frames: Any, args: tuple, workers: int, progress: Any) -> None:
    """Forecast the chunks in ``workers`` spawned processes, at most two chunks per worker in flight."""
    from concurrent.futures import ProcessPoolExecutor

    ctx = worker_context()  # spawn, without re-running the caller's __main__ in the workers
    # workers die with this process (kill -9 included) and do not hold its output open
    pool = ProcessPoolExecutor(max_workers=workers, mp_context=ctx, initializer=start_worker, initargs=(os.getpid(),))
    try:
        # start the workers (and their imports) while this process runs the source query
        for _ in range(workers):
            pool.submit(start_worker)
        pending: list[Future[ChunkSummary]] = []
        for i, frame in enumerate(frames):
            pending.append(pool.submit(forecast_chunk, frame, *args, i))
            while len(pending) >= workers * 2:
                progress(pending.pop(0).result())
        for fut in pending:
            progress(fut.result())
    except BaseException:
        stop_pool(pool)  # an error or a stop signal: end the workers now, before the stage is removed
        raise
    pool.shutdown(wait=True)


def start_worker(parent: int | None = None) -> None:
    """Worker process set-up: bound to its parent's life, allocator tuning and the imports a chunk needs."""
    if parent is not None:
        bind_to_parent(parent)
    tune_for_batch()
    from ..core import pipeline  # noqa: F401  (imports numpy, scipy.special and the core once)
