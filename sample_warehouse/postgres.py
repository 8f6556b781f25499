"""The sample warehouse in a PostgreSQL database, and the demo job that reads and publishes there.

``arflow demo --postgres URL`` calls :func:`prepare_postgres_demo`: the
table ``water.monthly_demand`` (the same rows as the DuckDB sample) is
(re)loaded in one transaction, and a job file that reads it and publishes to
schema ``arflow`` of the same database is written next to the DuckDB demo.
"""

from __future__ import annotations

from pathlib import Path

import pyarrow as pa

from ..errors import PublishError
from ..warehouse.postgres_connection import PgAddress, connect, detail, driver_errors
from .generate import DEFAULT_SEED, SOURCE_SCHEMA, SOURCE_TABLE, sample_frame

DEMO_PG_JOB_FILE = "demo_job_postgres.toml"

_SCHEMA = pa.schema([pa.field("district", pa.string()), pa.field("zone", pa.string()), pa.field("month", pa.date32()),
                     pa.field("demand_ml", pa.float64())])


def load_sample_into_postgres(address: PgAddress, seed: int = DEFAULT_SEED, *, small: bool = False) -> int:
    """Create (or refresh) ``water.monthly_demand`` in the database; returns the number of rows.

    Other schemas (published results included) are left alone.
    """
    frame = sample_frame(seed, small=small).sort("district", "zone", "month")
    con = connect(address, "sample database", PublishError)
    try:
        cur = con.cursor()
        cur.execute(f"CREATE SCHEMA IF NOT EXISTS {SOURCE_SCHEMA}")
        cur.execute(f"DROP TABLE IF EXISTS {SOURCE_SCHEMA}.{SOURCE_TABLE}")
        cur.execute(
            f"CREATE TABLE {SOURCE_SCHEMA}.{SOURCE_TABLE} (district text NOT NULL, zone text NOT NULL, "
            "month date NOT NULL, demand_ml double precision)"
        )
        cur.adbc_ingest(SOURCE_TABLE, frame.to_arrow().cast(_SCHEMA), mode="append", db_schema_name=SOURCE_SCHEMA)
        cur.close()
        con.commit()
    except driver_errors() as exc:
        try:
            con.rollback()
        except driver_errors():
            pass
        raise PublishError(
            f"cannot load the sample table into {address.describe()} ({detail(exc)}); the role needs CREATE on the database"
        ) from None
    finally:
        con.close()
    return frame.height


def postgres_job_text(url: str) -> str:
    """The demo job, reading and publishing in the PostgreSQL database at ``url`` (password-free)."""
    return f"""# Demo job on PostgreSQL: the (invented) Vellmar Basin Water Board's monthly
# demand, read from and published into the same database. The password comes
# from PGPASSWORD, ~/.pgpass or a service file, never from this file.

[job]
name = "vellmar_demand"

[source]
postgres = "{url}"
table = "water.monthly_demand"
keys = ["district", "zone"]
period = "month"
value = "demand_ml"
frequency = "month"

[model]
order = "auto"
max_order = 6
criterion = "aic"
seasonal_lag = "auto"
unit_root = "difference"

[forecast]
horizon = 12
coverage = [0.8, 0.95]

[gates]
residual_test = "ljung-box"
residual_lags = 12
alpha = 0.01
min_observations = 36
max_quarantine_share = 0.5

[publish]
postgres = "{url}"
schema = "arflow"
on_failure = "keep-previous"

[run]
chunk_series = 100
"""


def prepare_postgres_demo(directory: Path, address: PgAddress, seed: int = DEFAULT_SEED) -> Path:
    """Load the sample into the database and write the demo job file; returns the job file."""
    load_sample_into_postgres(address, seed)
    directory.mkdir(parents=True, exist_ok=True)
    path = directory / DEMO_PG_JOB_FILE
    path.write_text(postgres_job_text(address.url), encoding="utf-8")
    return path
