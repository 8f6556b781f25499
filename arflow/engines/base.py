"""What every engine provides, and the one way a chunk's results are staged.

An engine opens its own source, plans how the series are cut into chunks (or
buckets), runs :func:`arflow.run.forecast_frame` on each and stages each
chunk's results itself with :func:`stage_chunk`; the job only sees counts.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Protocol

from ..results import ACTUALS, ForecastRun
from ..run import ChunkSummary
from ..warehouse.contract import Source
from ..warehouse.stage import StagedRun

Event = dict[str, Any]
EventSink = Callable[[Event], None]


@dataclass(frozen=True)
class WorkPlan:
    """How a run's series are cut up: ``chunks`` pieces of about ``chunk_series`` whole series each."""

    chunks: int
    chunk_series: int
    notes: tuple[str, ...] = ()


class Engine(Protocol):
    """Runs the core over a source's series; built by ``engines/registry.py`` from the job spec."""

    #: what the engine has to say about the run (e.g. how the work spread), filled by :meth:`run`
    notes: list[str]

    def open_source(self) -> Source:
        """The job's source for this engine (a context manager, not yet entered)."""
        ...

    def plan(self, source: Source, series: int) -> WorkPlan:
        """How ``series`` series will be cut into chunks (or buckets)."""
        ...

    def run(self, source: Source, as_of: Any, plan: WorkPlan, series: int, stage: StagedRun, emit: EventSink) -> ChunkSummary:
        """Forecast every chunk, stage each chunk's results in ``stage``; the run's counts.

        Emits one :func:`arflow.run.chunk_event` per chunk done.
        """
        ...


def stage_chunk(run: ForecastRun, stage_dir: str | Path, chunk_no: int, actuals: Any) -> ChunkSummary:
    """Write one chunk's result tables and its recent actuals as Parquet parts; the chunk's counts."""
    StagedRun.write_to(stage_dir, chunk_no, {**run.tables(), ACTUALS: actuals})
    return ChunkSummary.of(run)
