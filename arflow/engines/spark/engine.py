"""The Spark engine of a job: buckets of whole series forecast by Spark tasks, each bucket staged on the driver."""

from __future__ import annotations

from typing import Any

from ...run import ChunkSummary, actuals_window, chunk_event
from ...settings import refuse_series_fdr_on_spark
from ...warehouse.stage import StagedRun
from ..base import EventSink, WorkPlan, stage_chunk
from .bucketing import bucket_count
from .session import master_of
from .source import SparkSource
from .tasks import run_buckets, task_job


class SparkEngine:
    """``[source] engine = "spark"``: Spark reads the source and runs the core in its tasks."""

    def __init__(self, spec: Any) -> None:
        refuse_series_fdr_on_spark(spec.settings)
        self.spec = spec
        self.notes: list[str] = []

    @classmethod
    def from_spec(cls, spec: Any) -> "SparkEngine":
        return cls(spec)

    def open_source(self) -> SparkSource:
        return SparkSource(self.spec)

    def plan(self, source: Any, series: int) -> WorkPlan:
        """Buckets (= tasks): ``[spark] partitions``, else about one per 10,000 series (see :func:`bucket_count`)."""
        chunk_series = self.spec.run.chunk_series
        partitions = getattr(self.spec.spark, "partitions", None)
        return WorkPlan(bucket_count(source.spark, series, chunk_series, partitions), chunk_series)

    def run(self, source: Any, as_of: Any, plan: WorkPlan, series: int, stage: StagedRun, emit: EventSink) -> ChunkSummary:
        """Fit every series in Spark tasks, then stage each bucket's results (same numbers as the local engine)."""
        src, settings = self.spec.source, self.spec.settings
        job = task_job(src.keys, src.period, src.value, settings, as_of, plan.chunks, actuals_window(settings))
        results = run_buckets(source.rows_to(as_of), job)
        stats = results.stats
        source.timings["spark_job"] = stats.spark_seconds
        source.timings["decode"] = stats.decode_seconds
        done = ChunkSummary()
        for i, bucket in enumerate(results.buckets):
            done = done + stage_chunk(bucket.run, stage.dir, i, bucket.actuals)
            emit(chunk_event(done, len(results.buckets), series))
        master = master_of(source.spark)
        emit({
            "event": "spark", "master": master, "buckets": stats.buckets, "tasks": stats.tasks,
            "series_per_task": list(stats.series_per_task), "task_seconds": [round(s, 3) for s in stats.task_seconds],
            "timings": {k: round(v, 3) for k, v in source.timings.items()},
        })
        self.notes.append(stats.describe(master))
        return done
