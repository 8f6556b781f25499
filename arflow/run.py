"""One chunk of work: a long frame of whole series in, the core run on it, a result object out.

Every engine calls :func:`forecast_frame` on its chunks (the local engine in
this process or in worker processes, the Spark engine inside its tasks), and
:func:`arflow.forecast` calls it for a frame in memory, so the numbers are the
same whichever path ran them. The rules that travel with a chunk live here
once: which recent rows are kept as actuals for accuracy tracking
(:func:`recent_actuals`), the counts a chunk adds to its run
(:class:`ChunkSummary`) and the progress event (:func:`chunk_event`).
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
import polars as pl

from .core.panel import build_panel
from .core.pipeline import run_core
from .frames import encode_as_of, result_frames, to_panel_inputs
from .machine import available_cpus
from .results import ForecastRun
from .settings import Settings

#: series a frame needs before ``workers=None`` starts worker processes: four blocks of
#: the core (below, starting the processes and copying results back cost more than they save)
MIN_SERIES_FOR_WORKERS = 4096


def forecast_frame(
    frame: Any, keys: list[str], period: str, value: str, settings: Settings, as_of: Any = None,
    workers: int | None = None,
) -> ForecastRun:
    """Fit, check, gate and forecast every series of a long polars/Arrow frame (settings already resolved).

    ``workers`` None: the CPUs available to the process when the frame holds at
    least :data:`MIN_SERIES_FOR_WORKERS` series, else one process.
    """
    inp = to_panel_inputs(frame, keys, period, value, settings.frequency)
    as_of_ord = encode_as_of(as_of, inp.codec)
    panel = build_panel(
        inp.codes, inp.ordinals, inp.values, len(inp.keys), as_of=as_of_ord,
        min_observations=settings.gates.min_observations,
    )
    if inp.flags is not None:  # what only the frame adapter can see (resolved duplicates, off-calendar labels)
        panel = replace(panel, flags=panel.flags | inp.flags)
    if workers is None:  # worker processes pay only from a few blocks of series on
        workers = available_cpus() if panel.n_series >= MIN_SERIES_FOR_WORKERS else 1
    core = run_core(panel, settings, workers=workers)
    as_of_label = inp.codec.decode(np.array([panel.as_of])).item()
    return ForecastRun.from_tables(result_frames(inp, core, settings), as_of=as_of_label, settings=settings)


def actuals_window(settings: Settings) -> int:
    """How many recent periods of actuals a chunk keeps: twice the longer of the forecast and backtest horizons."""
    return 2 * max(settings.forecast.horizon, settings.backtest.horizon or 0)


def recent_actuals(frame: Any, keys: list[str], period: str, value: str, periods: int) -> pl.DataFrame:
    """The last ``periods`` distinct periods of a chunk, as (keys, ``period``, ``value``) for accuracy tracking."""
    if not isinstance(frame, pl.DataFrame):
        frame = pl.from_arrow(frame)
        assert isinstance(frame, pl.DataFrame)
    recent = frame.get_column(period).unique().sort().tail(periods)
    if recent.len() == 0:
        return pl.DataFrame()
    return (
        frame.filter(pl.col(period) >= recent[0])
        .select(*keys, pl.col(period).alias("period"), pl.col(value).cast(pl.Float64).alias("value"))
    )


@dataclass(frozen=True)
class ChunkSummary:
    """Counts of one or more chunks (what the run log needs; the rows are staged on disk)."""

    series_total: int = 0
    series_published: int = 0
    reason_counts: dict[str, int] = field(default_factory=dict)
    chunks: int = 0
    #: warning checks (failed without holding a series back) -> number of series
    warning_counts: dict[str, int] = field(default_factory=dict)

    @classmethod
    def of(cls, run: ForecastRun) -> "ChunkSummary":
        """The counts of one chunk's results."""
        return cls(run.series_total, run.series_published, run.reason_counts(), 1, run.warning_counts())

    @property
    def series_quarantined(self) -> int:
        return self.series_total - self.series_published

    def __add__(self, other: "ChunkSummary") -> "ChunkSummary":
        reasons = dict(self.reason_counts)
        for k, v in other.reason_counts.items():
            reasons[k] = reasons.get(k, 0) + v
        reasons = dict(sorted(reasons.items(), key=lambda kv: (-kv[1], kv[0])))
        warnings = dict(self.warning_counts)
        for k, v in other.warning_counts.items():
            warnings[k] = warnings.get(k, 0) + v
        warnings = dict(sorted(warnings.items(), key=lambda kv: (-kv[1], kv[0])))
        return ChunkSummary(self.series_total + other.series_total, self.series_published + other.series_published,
                            reasons, self.chunks + other.chunks, warnings)


def chunk_event(done: ChunkSummary, chunks: int, series_total: int) -> dict[str, Any]:
    """The progress event after a chunk: chunks and series done so far out of the run's."""
    return {"event": "chunk", "chunk": done.chunks, "chunks": chunks, "series_done": done.series_total,
            "series_total": series_total}
