"""Which job-file key builds which source or target: the one dispatch point of the warehouse side.

A new target is one line in :data:`TARGETS` (its ``[publish]`` key and its
class, which has ``from_spec(publish_spec, layout)`` and satisfies
:class:`arflow.warehouse.contract.Target`) plus the parsing of that key in
``job_file.py``. Sources are picked by the ``[source]`` keys the same way.
"""

from __future__ import annotations

from typing import Any

from .contract import Source, TableLayout, Target
from .duckdb_source import DuckDBSource
from .duckdb_target import DuckDBTarget
from .delta_target import DeltaTarget
from .postgres_source import PostgresSource
from .postgres_target import PostgresTarget

#: ``[publish]`` key -> target class (a target is configured when its key is set)
TARGETS: dict[str, Any] = {
    "database": DuckDBTarget,
    "lakehouse": DeltaTarget,
    "postgres": PostgresTarget,
}


def targets_for(publish: Any, layout: TableLayout) -> list[Target]:
    """The targets ``[publish]`` configures, in commit order (databases first, the lakehouse last)."""
    built = [cls.from_spec(publish, layout) for key, cls in TARGETS.items() if getattr(publish, key, None) is not None]
    return sorted(built, key=lambda target: target.commit_order)


def source_for(source: Any, frequency: str) -> Source:
    """The source ``[source]`` configures (DuckDB file, query or Parquet files, PostgreSQL); not yet opened."""
    if getattr(source, "postgres", None) is not None:
        return PostgresSource.from_spec(source, frequency)
    return DuckDBSource(source, frequency)
