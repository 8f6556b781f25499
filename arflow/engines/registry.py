"""Which ``[source] engine`` builds which engine: the one dispatch point of the compute side.

A new engine is a module with a class that satisfies
:class:`arflow.engines.base.Engine` (with ``from_spec(job_spec)``) and one
line here; ``job_file.ENGINES`` lists the names a job file may use.
"""

from __future__ import annotations

from typing import Any

from .base import Engine
from .local import LocalEngine
from .spark.engine import SparkEngine

#: ``[source] engine`` -> engine class
ENGINES: dict[str, Any] = {
    "duckdb": LocalEngine,
    "spark": SparkEngine,
}


def engine_for(spec: Any) -> Engine:
    """The engine a job spec asks for (``[source] engine``, ``"duckdb"`` by default)."""
    return ENGINES[spec.source.engine].from_spec(spec)
