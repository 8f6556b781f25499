"""pyspark and the SparkSession: the one-line errors when Spark is missing, and starting a session."""

from __future__ import annotations

import importlib.util
import os
import sys
import warnings
from typing import Any

from ...errors import SettingsError, SourceError, one_line
#: the project's own distribution name (``version.DISTRIBUTION``; the import package and command stay ``arflow``)
INSTALL_HINT = "pip install 'arflow-gated[spark]'"


def require_pyspark() -> None:
    """Raise a one-line error unless pyspark 4 (and the pandas it checks for) can be imported."""
    try:
        import pyspark
    except ImportError:
        raise SettingsError(
            f'[source] engine = "spark" needs the spark extra, which is not installed; install it with: {INSTALL_HINT}'
        ) from None
    major = int(str(pyspark.__version__).split(".")[0])
    if major < 4:
        raise SettingsError(
            f'engine = "spark" needs pyspark 4.0 or later (found {pyspark.__version__}); upgrade with: pip install -U \'arflow-gated[spark]\''
        )
    # pyspark warns about pandas versions before Arrow UDFs; arflow never converts to pandas
    warnings.filterwarnings("ignore", message="PySpark does not yet fully support pandas", category=FutureWarning)
    if importlib.util.find_spec("pandas") is None:
        raise SettingsError(
            'engine = "spark" needs pandas importable (pyspark checks for it before any Arrow UDF, though arflow passes '
            "Arrow only); install it with: pip install 'pyspark[sql]>=4.0'"
        )


def start_session(options: Any = None) -> tuple[Any, bool]:
    """The active SparkSession, or a new one from ``[spark]``; returns (session, started_here)."""
    require_pyspark()
    from pyspark.sql import SparkSession

    active = SparkSession.getActiveSession()
    if active is not None:
        return active, False
    master = getattr(options, "master", None)
    builder = SparkSession.builder.appName("arflow").config("spark.ui.showConsoleProgress", "false")
    if master is None and "PYSPARK_GATEWAY_PORT" not in os.environ:  # not under spark-submit
        master = "local[*]"
    if master is not None:
        builder = builder.master(master)
        if master.startswith("local"):
            # local workers must run this interpreter (which has arflow and pyarrow)
            if not os.environ.get("PYSPARK_PYTHON"):
                os.environ["PYSPARK_PYTHON"] = sys.executable
    for key, value in getattr(options, "config", ()) or ():
        builder = builder.config(key, value)
    try:
        spark = builder.getOrCreate()
    except Exception as exc:  # noqa: BLE001 - Java missing, bad master, ...
        raise SourceError(
            f"cannot start Spark ({one_line(exc)}); check that Java 17+ is installed (JAVA_HOME) and spark.master is right"
        ) from None
    try:
        spark.sparkContext.setLogLevel("ERROR")  # a session arflow starts: errors only on stderr
    except Exception:  # noqa: BLE001
        pass
    return spark, True


def best_effort(spark: Any, method: str, *args: Any) -> None:
    """Call a session method, ignoring failures (job tags are missing on some session kinds)."""
    try:
        getattr(spark, method)(*args)
    except Exception:  # noqa: BLE001
        pass


def default_parallelism(spark: Any) -> int:
    """The session's default parallelism (2 where it cannot be read, e.g. Spark Connect)."""
    try:
        return int(spark.sparkContext.defaultParallelism)
    except Exception:  # noqa: BLE001 - e.g. Spark Connect has no SparkContext
        return 2


def master_of(spark: Any) -> str:
    """The session's master URL, for notes."""
    try:
        return str(spark.conf.get("spark.master"))
    except Exception:  # noqa: BLE001
        return "spark"
