"""The result tables of a run: their names, in one place.

Every list of run table names in arflow is derived from the tuples here:
the per-chunk result frames (:data:`RESULT_TABLES`), what a chunk stages on
disk (:data:`STAGED_TABLES`, the results plus the recent ``actuals``), and the
tables a target writes per run (:data:`RUN_TABLES`, in insert order).
"""

from __future__ import annotations

#: frames one chunk of work produces (``arflow.ForecastRun`` has one attribute per name)
RESULT_TABLES = ("models", "gates", "residual_acf", "forecasts", "backtests")
#: the recent actuals of a chunk (keys, ``period``, ``value``): accuracy tracking scores earlier vintages with them
ACTUALS = "actuals"
#: what a chunk stages on local disk until the run is published
STAGED_TABLES = (*RESULT_TABLES, ACTUALS)
#: per-series decision rows a target derives from ``models``
SERIES_STATUS = "series_status"
#: tables written per run, in insert order (the fault hook names these)
RUN_TABLES = (SERIES_STATUS, *RESULT_TABLES, "accuracy")
#: tables the published view reads (a held run leaves these as they were)
VIEW_TABLES = (SERIES_STATUS, "forecasts")
