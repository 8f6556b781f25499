"""arflow: batched AR(p) forecasting with statistical gates, published atomically to a warehouse.

The public namespace is small: :func:`forecast` (one call on a long frame),
its result :class:`ForecastRun`, :func:`run_job_file` (the typed form
of ``arflow run``) and its :class:`RunSummary`, the settings classes, and the
errors (one class per exit code).
"""

from .api import ForecastRun, forecast
from .errors import ArflowError, DataError, PublishError, SchemaError, SettingsError, SourceError
from .runner import InternalError, QuarantineAlarm, RunSummary, run_job_file
from .settings import ForecastSettings, GateSettings, ModelSettings, Settings

__version__ = "0.1.0"

__all__ = [
    "ArflowError",
    "DataError",
    "ForecastRun",
    "ForecastSettings",
    "GateSettings",
    "InternalError",
    "ModelSettings",
    "PublishError",
    "QuarantineAlarm",
    "RunSummary",
    "SchemaError",
    "SettingsError",
    "Settings",
    "SourceError",
    "__version__",
    "forecast",
    "run_job_file",
]
