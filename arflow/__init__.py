"""arflow: batched AR(p) forecasting with statistical gates, published atomically to a warehouse.

The public namespace is small: :func:`forecast` (one call on a long frame),
its result :class:`ForecastRun`, the settings classes, and the error base.
"""

from .api import ForecastRun, forecast
from .errors import ArflowError, SchemaError, SettingsError, SourceError
from .settings import ForecastSettings, GateSettings, ModelSettings, Settings

__version__ = "0.1.0"

__all__ = [
    "ArflowError",
    "ForecastRun",
    "ForecastSettings",
    "GateSettings",
    "ModelSettings",
    "SchemaError",
    "SettingsError",
    "Settings",
    "SourceError",
    "__version__",
    "forecast",
]
