"""The job file (TOML): where the data is, how to model it, where results go.

:func:`load_job` reads a file into a frozen :class:`JobSpec`. Every problem
(unknown key, wrong type, impossible value, unsafe identifier) raises
:class:`~arflow.errors.SettingsError` with one line naming the key and what
is allowed. Relative paths resolve against the job file's folder.

The specs check themselves when built (``__post_init__``), rules that span
fields included, so a spec built in code gets every check a job file gets;
the parsing here only turns TOML values into fields.
"""

from __future__ import annotations

import difflib
import hashlib
import json
import re
import tomllib
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any

from .errors import SettingsError
from .settings import (
    FREQUENCIES, BacktestSettings, ForecastSettings, GateSettings, ModelSettings, Settings, refuse_series_fdr_on_spark,
)
from .warehouse.identifiers import check_identifier, check_qualified, is_identifier
from .warehouse.postgres_connection import PgAddress, check_url

ON_FAILURE_POLICIES = ("keep-previous", "withdraw")
JOB_NAME_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}$")



def reserved_columns() -> frozenset[str]:
    """Column names of arflow's output tables (lower-case); a key column may not reuse one.

    Read off the table definitions themselves
    (:func:`arflow.warehouse.duckdb_target.output_columns`), so the two never drift apart.
    """
    from .warehouse.duckdb_target import output_columns

    return output_columns()


#: Functions whose result changes from run to run: a source query using one would
#: publish different numbers for the same vintage, so it is refused.
NONDETERMINISTIC_FUNCTIONS = frozenset(
    {"random", "gen_random_uuid", "uuid", "uuidv4", "uuidv7", "setseed"}
)

_SOURCE_KEYS = ("engine", "database", "parquet", "postgres", "table", "query", "keys", "period", "value", "frequency",
                "statement_timeout_seconds")
_PUBLISH_KEYS = ("database", "lakehouse", "postgres", "schema", "on_failure", "hold_on_alarm", "stale_after_periods",
                 "max_periods_ahead", "lakehouse_options", "lock_wait_seconds", "statement_timeout_seconds")
ENGINES = ("duckdb", "spark")
_SPARK_KEYS = ("master", "partitions", "config")
_RUN_KEYS = ("chunk_series", "workers")
_SECTIONS: dict[str, tuple[str, ...]] = {
    "job": ("name",),
    "source": _SOURCE_KEYS,
    "model": tuple(f.name for f in fields(ModelSettings)),
    "forecast": tuple(f.name for f in fields(ForecastSettings)),
    "gates": tuple(f.name for f in fields(GateSettings)),
    "backtest": tuple(f.name for f in fields(BacktestSettings)),
    "publish": _PUBLISH_KEYS,
    "run": _RUN_KEYS,
    "spark": _SPARK_KEYS,
}


@dataclass(frozen=True)
class SourceSpec:
    """Where the long-format panel comes from.

    Exactly one of ``database`` (a DuckDB file) and ``parquet`` (path or glob).
    With a database, exactly one of ``table`` (``("table",)`` or
    ``("schema", "table")``) and ``query``; with parquet, ``query`` is optional
    and reads the files as the relation ``source``.

    ``engine = "spark"``: exactly one of ``table`` (a name in Spark's catalog,
    up to ``catalog.schema.table``) and ``parquet`` (a path or URI Spark reads).
    """

    keys: tuple[str, ...]
    period: str
    value: str
    database: Path | None = None
    parquet: str | None = None
    table: tuple[str, ...] | None = None
    query: str | None = None
    engine: str = "duckdb"
    #: a PostgreSQL source (``[source] postgres``: a password-free URL); with ``table`` or ``query``
    postgres: PgAddress | None = None
    #: ``[source] statement_timeout_seconds`` (PostgreSQL): the limit of each statement the source runs
    statement_timeout: float = 600.0

    def __post_init__(self) -> None:
        if self.engine not in ENGINES:
            raise SettingsError(f"source.engine = {self.engine!r} is not allowed; use " + " / ".join(f'"{e}"' for e in ENGINES))
        if self.postgres is not None:
            if isinstance(self.postgres, str):
                object.__setattr__(self, "postgres", check_url(self.postgres, "source.postgres"))
            _check_postgres_source(self)
        elif self.engine == "spark":
            _check_spark_source(self)
        else:
            _check_duckdb_source(self)
        _check_columns(self.keys, self.period, self.value)

    def describe(self) -> str:
        """Short human description for logs (never a password)."""
        if self.postgres is not None:
            return f"{self.postgres.describe()} ({'.'.join(self.table) if self.table else 'query'})"
        if self.engine == "spark":
            return f"spark table {'.'.join(self.table)}" if self.table else f"spark parquet {self.parquet}"
        where = str(self.database) if self.database else f"parquet {self.parquet}"
        what = ".".join(self.table) if self.table else ("query" if self.query else "files")
        return f"{where} ({what})"


@dataclass(frozen=True)
class PublishSpec:
    """Where vetted results go and what happens to a series that fails its gates.

    ``database``: the DuckDB warehouse (None when only ``lakehouse`` is set).
    ``lakehouse``: a folder or object-store URI holding one Delta table per
    result table (see :mod:`arflow.warehouse.delta_target`);
    ``lakehouse_options``: the Delta writer's storage options.
    """

    database: Path | None
    schema: str = "arflow"
    on_failure: str = "keep-previous"
    lakehouse: Path | str | None = None
    lakehouse_options: dict[str, str] = field(default_factory=dict, hash=False)
    #: a run over gates.max_quarantine_share writes its records but leaves published_forecasts as it was
    hold_on_alarm: bool = True
    #: a kept (stale) forecast leaves the view once its vintage is this many periods behind the latest (None: no limit)
    stale_after_periods: int | None = None
    #: refuse a vintage more than this many periods after the job's latest one (None: per-frequency default)
    max_periods_ahead: int | None = None
    #: a PostgreSQL target (``[publish] postgres``: a password-free URL)
    postgres: PgAddress | None = None
    #: PostgreSQL: how long a run waits for another run publishing to the same schema (0: fail at once)
    lock_wait: float = 60.0
    #: PostgreSQL: the limit of each statement of the publishing transaction
    statement_timeout: float = 3600.0

    def __post_init__(self) -> None:
        from .warehouse.registry import TARGETS

        if isinstance(self.postgres, str):
            object.__setattr__(self, "postgres", check_url(self.postgres, "publish.postgres"))
        if self.postgres is not None and self.database is not None:
            raise SettingsError(
                "[publish] takes one database: database (a DuckDB file) or postgres (a server URL), not both "
                "(lakehouse may go with either)"
            )
        _check_seconds(self.lock_wait, "publish.lock_wait_seconds", low=0.0)
        _check_seconds(self.statement_timeout, "publish.statement_timeout_seconds", low=0.001)

        if not any(getattr(self, key, None) is not None for key in TARGETS):
            raise SettingsError(
                "publish.database is missing; name the DuckDB file to publish to (or publish.lakehouse, a folder)"
            )
        check_identifier(self.schema, "publish.schema")
        if self.on_failure not in ON_FAILURE_POLICIES:
            raise SettingsError(
                f"publish.on_failure = {self.on_failure!r} is not allowed; use "
                + " / ".join(f'"{p}"' for p in ON_FAILURE_POLICIES)
            )
        if not isinstance(self.hold_on_alarm, bool):
            raise SettingsError(f"publish.hold_on_alarm = {self.hold_on_alarm!r} is not allowed; use true or false")
        for key, low in (("stale_after_periods", 0), ("max_periods_ahead", 1)):
            value = getattr(self, key)
            if value is not None and not (isinstance(value, int) and not isinstance(value, bool) and low <= value <= 100_000):
                raise SettingsError(f"publish.{key} = {value!r} is not allowed; use an integer from {low} to 100000")


@dataclass(frozen=True)
class RunOptions:
    """How the work is cut up: series per chunk and parallel workers.

    ``workers`` None (the default, or ``"auto"`` in the job file): the CPUs
    available to the process when the run starts (:func:`arflow.machine.available_cpus`).
    """

    chunk_series: int = 10_000
    workers: int | None = None

    def __post_init__(self) -> None:
        chunk, workers = self.chunk_series, self.workers
        if not (isinstance(chunk, int) and not isinstance(chunk, bool) and chunk >= 1):
            raise SettingsError(f"run.chunk_series = {chunk!r} is not allowed; use an integer of at least 1")
        if workers is not None and not (isinstance(workers, int) and not isinstance(workers, bool) and 1 <= workers <= 256):
            raise SettingsError(f'run.workers = {workers!r} is not allowed; use an integer from 1 to 256 or "auto"')


@dataclass(frozen=True)
class SparkOptions:
    """``[spark]``: how arflow starts Spark when no session is active.

    ``master``: e.g. ``"local[2]"`` or ``"spark://host:7077"`` (None: Spark's
    own setting, else ``local[*]``). ``partitions``: number of tasks the
    series are hash-bucketed into (None: one per 10,000 series, or per
    ``run.chunk_series`` if smaller, at least Spark's default parallelism). ``config``: extra Spark settings,
    as (key, value) text pairs, used only when arflow starts the session.
    """

    master: str | None = None
    partitions: int | None = None
    config: tuple[tuple[str, str], ...] = ()

    def __post_init__(self) -> None:
        master, partitions = self.master, self.partitions
        if master is not None and not (isinstance(master, str) and master.strip() == master and master):
            raise SettingsError(f"spark.master = {master!r} is not allowed; use a Spark master URL such as \"local[2]\"")
        if partitions is not None and not (
            isinstance(partitions, int) and not isinstance(partitions, bool) and 1 <= partitions <= 100_000
        ):
            raise SettingsError(f"spark.partitions = {partitions!r} is not allowed; use an integer from 1 to 100000")
        for key, value in self.config:
            if not (isinstance(key, str) and key.startswith("spark.") and isinstance(value, str)):
                raise SettingsError(
                    f"spark.config: {key} = {value!r} is not allowed; use Spark setting names (spark.*) with text, "
                    "number or true/false values"
                )


@dataclass(frozen=True)
class JobSpec:
    """A parsed, validated job file."""

    name: str
    source: SourceSpec
    settings: Settings
    publish: PublishSpec
    run: RunOptions
    config_sha256: str
    path: Path | None = None
    spark: SparkOptions | None = None

    def __post_init__(self) -> None:
        _check_job_name(self.name)
        if self.source.engine != "spark" and self.spark is not None:
            raise SettingsError('[spark] is only used with [source] engine = "spark"; remove it or set the engine')
        if self.source.engine == "spark":
            refuse_series_fdr_on_spark(self.settings)


#: job-file keys an earlier release named otherwise: (section, old key) -> new key; the old key is still read
RENAMED_KEYS = {("gates", "max_stale_periods"): "max_periods_behind"}


def _current_keys(section: str, body: dict[str, Any]) -> dict[str, Any]:
    """``body`` with old key names (:data:`RENAMED_KEYS`) read as the new ones."""
    out = dict(body)
    for (sec, old), new in RENAMED_KEYS.items():
        if sec == section and old in out:
            if new in out:
                raise SettingsError(f"{section}.{old} is the old name of {section}.{new}; give only {section}.{new}")
            out[new] = out.pop(old)
    return out


def load_job(path: str | Path) -> JobSpec:
    """Read and validate a job file."""
    path = Path(path).expanduser()
    if not path.is_file():
        raise SettingsError(f"job file {path} not found; check the path")
    try:
        # utf-8-sig: a byte-order mark (some editors write one) is accepted and dropped
        text = path.read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as exc:
        raise SettingsError(f"job file {path} cannot be read ({exc}); save it as UTF-8 text") from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise SettingsError(f"job file {path} is not valid TOML ({exc}); fix the syntax") from None
    except RecursionError:
        raise SettingsError(f"job file {path} nests arrays or tables too deeply; a job file needs two levels at most") from None
    return parse_job(data, base_dir=path.resolve().parent, path=path)


def parse_job(data: dict[str, Any], *, base_dir: Path, path: Path | None = None) -> JobSpec:
    """Validate a parsed TOML document; relative paths resolve against ``base_dir``."""
    for section, body in data.items():
        if section not in _SECTIONS:
            raise SettingsError(_unknown(f"[{section}]", section, tuple(_SECTIONS), "sections"))
        if not isinstance(body, dict):
            raise SettingsError(f"{section} must be a table ([{section}]) in the job file, not a single value")
        allowed = _SECTIONS[section]
        for key in body:
            if key not in allowed and (section, key) not in RENAMED_KEYS:
                raise SettingsError(_unknown(f"{section}.{key}", key, allowed, f"keys in [{section}]"))
    job = data.get("job", {})
    name = _check_job_name(_required(job, "job", "name"))
    source, frequency = _parse_source(data.get("source"), base_dir)
    settings = Settings(
        frequency=frequency,
        model=ModelSettings(**_tuples(data.get("model", {}))),
        forecast=ForecastSettings(**_tuples(data.get("forecast", {}))),
        gates=GateSettings(**_tuples(_current_keys("gates", data.get("gates", {})))),
        backtest=BacktestSettings(**_tuples(data.get("backtest", {}))),
    )
    publish = _parse_publish(data.get("publish", {}), source, base_dir)
    run = _parse_run(data.get("run", {}))
    spark = _parse_spark(data.get("spark"), source)
    digest = hashlib.sha256(json.dumps(data, sort_keys=True, default=str).encode()).hexdigest()
    return JobSpec(
        name=name, source=source, settings=settings, publish=publish, run=run, config_sha256=digest, path=path, spark=spark
    )


def _check_job_name(name: Any) -> str:
    if not isinstance(name, str) or not JOB_NAME_RE.fullmatch(name):
        raise SettingsError(
            f"job.name = {name!r} is not allowed; use 1-64 letters, digits, '_', '-' or '.', starting with a letter or digit"
        )
    return name


def _unknown(full: str, key: str, allowed: tuple[str, ...], what: str) -> str:
    close = difflib.get_close_matches(key, allowed, n=1)
    hint = f"did you mean {close[0]}? " if close else ""
    return f"unknown {full} in job file; {hint}allowed {what}: {', '.join(allowed)}"


def _required(section: dict[str, Any], name: str, key: str) -> Any:
    if key not in section:
        raise SettingsError(f"{name}.{key} is missing; add it under [{name}] in the job file")
    return section[key]


def _tuples(section: dict[str, Any]) -> dict[str, Any]:
    return {k: tuple(v) if isinstance(v, list) else v for k, v in section.items()}


def _resolve(value: Any, key: str, base_dir: Path) -> Path:
    if not isinstance(value, str) or not value.strip():
        raise SettingsError(f"{key} = {value!r} is not allowed; use a file path as a string")
    p = Path(value).expanduser()
    return p if p.is_absolute() else (base_dir / p)


def _parse_source(section: Any, base_dir: Path) -> tuple[SourceSpec, str]:
    if section is None:
        raise SettingsError("[source] is missing; add it with database (or parquet), table (or query), keys, period, value and frequency")
    engine = section.get("engine", "duckdb")
    fields_: dict[str, Any] = {"engine": engine}
    if "database" in section:
        fields_["database"] = _resolve(section["database"], "source.database", base_dir)
    if "parquet" in section:
        raw = section["parquet"]
        if engine == "spark" and isinstance(raw, str) and re.match(r"^[A-Za-z][A-Za-z0-9+.-]*://", raw):
            fields_["parquet"] = raw  # a URI (s3a://, hdfs://, file://): Spark resolves it
        else:
            fields_["parquet"] = str(_resolve(raw, "source.parquet", base_dir))
    if "table" in section:
        name = section["table"]
        fields_["table"] = tuple(name.split(".")) if isinstance(name, str) else (name,)
    if "query" in section:
        fields_["query"] = section["query"]
    if "postgres" in section:
        fields_["postgres"] = section["postgres"]
    if "statement_timeout_seconds" in section:
        if "postgres" not in section:
            raise SettingsError("source.statement_timeout_seconds is used with source.postgres only; remove it")
        fields_["statement_timeout"] = section["statement_timeout_seconds"]
    keys = _required(section, "source", "keys")
    if isinstance(keys, str):
        keys = [keys]
    if not isinstance(keys, list) or not keys:
        raise SettingsError(f"source.keys = {keys!r} is not allowed; use a list of column names, e.g. [\"zone\"]")
    spec = SourceSpec(
        keys=tuple(keys), period=_required(section, "source", "period"), value=_required(section, "source", "value"),
        **fields_,
    )
    frequency = _required(section, "source", "frequency")
    if frequency not in FREQUENCIES:
        raise SettingsError(f"source.frequency = {frequency!r} is not allowed; use " + " / ".join(f'"{f}"' for f in FREQUENCIES))
    return spec, frequency


def _table_text(table: tuple[Any, ...]) -> Any:
    return ".".join(table) if all(isinstance(p, str) for p in table) else (table[0] if len(table) == 1 else table)


def _check_duckdb_source(spec: SourceSpec) -> None:
    """[source] rules for the DuckDB engine (a DuckDB file or Parquet files)."""
    has_db, has_pq = spec.database is not None, spec.parquet is not None
    if has_db == has_pq:
        raise SettingsError("[source] needs exactly one of database (a DuckDB file) and parquet (a path or glob)")
    if spec.table is not None:
        if has_pq:
            raise SettingsError("source.table is not used with source.parquet; leave it out (or use query, reading the files as `source`)")
        if check_qualified(_table_text(spec.table), "source.table") != spec.table:
            raise SettingsError(f"source.table = {spec.table!r} is not allowed; use table or schema.table")
    if spec.query is not None:
        if not isinstance(spec.query, str) or not spec.query.strip():
            raise SettingsError("source.query must be a non-empty string holding one SELECT statement")
        if spec.table is not None:
            raise SettingsError("[source] takes either table or query, not both; remove one")
        _check_deterministic(spec.query)
    if has_db and spec.table is None and spec.query is None:
        raise SettingsError("[source] needs table (e.g. table = \"sales\") or query (one SELECT statement)")


def _check_postgres_source(spec: SourceSpec) -> None:
    """[source] rules for PostgreSQL (``postgres`` with ``table`` or ``query``)."""
    if spec.engine == "spark":
        raise SettingsError('source.postgres is read by arflow itself; leave out engine = "spark" (or give Spark a table)')
    if spec.database is not None or spec.parquet is not None:
        raise SettingsError("[source] needs exactly one of database (a DuckDB file), parquet (files) and postgres (a server URL)")
    if (spec.table is None) == (spec.query is None):
        raise SettingsError("with source.postgres, [source] needs table (e.g. table = \"public.sales\") or query (one SELECT), not both")
    if spec.table is not None and check_qualified(_table_text(spec.table), "source.table") != spec.table:
        raise SettingsError(f"source.table = {spec.table!r} is not allowed; use table or schema.table")
    if spec.query is not None:
        if not isinstance(spec.query, str) or not spec.query.strip():
            raise SettingsError("source.query must be a non-empty string holding one SELECT statement")
        _check_deterministic(spec.query)
    _check_seconds(spec.statement_timeout, "source.statement_timeout_seconds", low=0.001)


def _check_seconds(value: Any, key: str, *, low: float) -> None:
    if not (isinstance(value, (int, float)) and not isinstance(value, bool) and low <= value <= 604_800):
        raise SettingsError(f"{key} = {value!r} is not allowed; use a number of seconds from {low:g} to 604800")


def _check_spark_source(spec: SourceSpec) -> None:
    """[source] rules for the Spark engine (a Spark table or a Parquet path Spark reads)."""
    if spec.database is not None:
        raise SettingsError(
            'source.database names a DuckDB file, which Spark does not read; with engine = "spark" give table '
            "(a Spark table) or parquet (a path Spark reads)"
        )
    if spec.query is not None:
        raise SettingsError(
            'source.query is not used with engine = "spark"; register your query as a Spark view and name it in table'
        )
    if (spec.table is not None) == (spec.parquet is not None):
        raise SettingsError('with engine = "spark", [source] needs exactly one of table (a Spark table) and parquet (a path)')
    if spec.table is not None and not (1 <= len(spec.table) <= 3 and all(is_identifier(p) for p in spec.table)):
        raise SettingsError(
            f"source.table = {_table_text(spec.table)!r} is not allowed; use table, schema.table or catalog.schema.table "
            "made of letters, digits and underscores"
        )


def _check_columns(keys: tuple[str, ...], period: str, value: str) -> None:
    """Key, period and value columns: plain identifiers, all different, keys not named like an output column."""
    if not isinstance(keys, tuple) or not keys:
        raise SettingsError(f"source.keys = {keys!r} is not allowed; use a list of column names, e.g. [\"zone\"]")
    for k in keys:
        check_identifier(k, "source.keys")
    check_identifier(period, "source.period")
    check_identifier(value, "source.value")
    lowered = [c.lower() for c in (*keys, period, value)]
    if len(set(lowered)) != len(lowered):
        raise SettingsError("source.keys, source.period and source.value must name different columns")
    from .warehouse.duckdb_target import output_column_prefixes

    reserved, prefixes = reserved_columns(), output_column_prefixes()
    for k in keys:
        if k.lower() in reserved or k.lower().startswith(prefixes):
            raise SettingsError(
                f"source.keys: column name {k!r} is used by arflow's output tables; rename it in a [source] query (e.g. SELECT {k} AS {k}_key ...)"
            )


def _parse_publish(section: dict[str, Any], source: SourceSpec, base_dir: Path) -> PublishSpec:
    lakehouse = _lakehouse(section["lakehouse"], base_dir) if "lakehouse" in section else None
    postgres: Any = section.get("postgres")
    if postgres is None and ("lock_wait_seconds" in section or "statement_timeout_seconds" in section):
        raise SettingsError("publish.lock_wait_seconds and publish.statement_timeout_seconds are used with publish.postgres only")
    pg_bounds = {k: section[v] for k, v in (("lock_wait", "lock_wait_seconds"), ("statement_timeout", "statement_timeout_seconds"))
                 if v in section}
    database: Path | None
    if "database" in section:
        database = _resolve(section["database"], "publish.database", base_dir)
    elif postgres is not None:
        database = None
    elif source.database is not None:
        database = source.database
    elif source.postgres is not None and lakehouse is None:
        database, postgres = None, source.postgres  # the source's database, like a DuckDB source's file
    elif lakehouse is not None:
        database = None
    else:
        what = "a Spark source" if source.engine == "spark" else "a parquet source"
        raise SettingsError(
            f"publish.database is missing; with {what} name the DuckDB file to publish to (or publish.lakehouse, a folder)"
        )
    guards = {k: section[k] for k in ("hold_on_alarm", "stale_after_periods", "max_periods_ahead") if k in section}
    return PublishSpec(database=database, schema=section.get("schema", "arflow"),
                       on_failure=section.get("on_failure", "keep-previous"), lakehouse=lakehouse, postgres=postgres,
                       lakehouse_options=_lakehouse_options(section),
                       **pg_bounds, **guards)


def _lakehouse(value: Any, base_dir: Path) -> Path | str:
    """``[publish] lakehouse``: a folder (relative to the job file) or an object-store URI such as ``s3://bucket/lake``."""
    if isinstance(value, str) and "://" in value and not value.startswith("file://"):
        return value.strip()
    if isinstance(value, str) and value.startswith("file://"):
        value = value[len("file://"):]
    return _resolve(value, "publish.lakehouse", base_dir)


def _lakehouse_options(section: dict[str, Any]) -> dict[str, str]:
    """``[publish] lakehouse_options``: storage options for the Delta writer (strings; no secrets in job files)."""
    options = section.get("lakehouse_options", {})
    if not isinstance(options, dict) or not all(isinstance(k, str) and isinstance(v, (str, bool, int)) for k, v in options.items()):
        raise SettingsError(
            "publish.lakehouse_options must be a table of strings, e.g. { AWS_ENDPOINT_URL = \"http://minio:9000\" }"
        )
    if options and "lakehouse" not in section:
        raise SettingsError("publish.lakehouse_options is set but publish.lakehouse is not; add publish.lakehouse or remove the options")
    return {k: (str(v).lower() if isinstance(v, bool) else str(v)) for k, v in options.items()}


def _parse_run(section: dict[str, Any]) -> RunOptions:
    return RunOptions(chunk_series=section.get("chunk_series", RunOptions.chunk_series),
                      workers=None if section.get("workers") == "auto" else section.get("workers", RunOptions.workers))


def _parse_spark(section: dict[str, Any] | None, source: SourceSpec) -> SparkOptions | None:
    if section is None or source.engine != "spark":  # JobSpec refuses a [spark] section without the Spark engine
        return None if section is None and source.engine != "spark" else SparkOptions()
    master = section.get("master")
    if master is not None and not (isinstance(master, str) and master.strip()):
        raise SettingsError(f"spark.master = {master!r} is not allowed; use a Spark master URL such as \"local[2]\"")
    config = section.get("config", {})
    if not isinstance(config, dict):
        raise SettingsError('spark.config must be a table of Spark settings, e.g. config = { "spark.driver.memory" = "4g" }')
    pairs = []
    for key, value in config.items():
        if isinstance(value, (dict, list)):
            raise SettingsError(
                f"spark.config: {key} = {value!r} is not allowed; use Spark setting names (spark.*) with text, number or true/false values"
            )
        pairs.append((key, str(value).lower() if isinstance(value, bool) else str(value)))
    return SparkOptions(master=master.strip() if master else None, partitions=section.get("partitions"), config=tuple(pairs))


def _check_deterministic(query: str) -> None:
    """Refuse a source query whose rows change from run to run (random numbers, random samples).

    The query is parsed by DuckDB (comments and string literals are not
    mistaken for calls); a query that does not parse is left for the source
    to report.
    """
    import duckdb

    con = duckdb.connect(":memory:")
    try:
        (tree,) = con.execute("SELECT json_serialize_sql(?)", [query]).fetchone()
    except duckdb.Error:
        return
    finally:
        con.close()
    try:
        doc = json.loads(tree)
    except (TypeError, ValueError):
        return
    found: list[str] = []

    def walk(node: Any) -> None:
        if isinstance(node, dict):
            name = node.get("function_name")
            if isinstance(name, str) and name.lower() in NONDETERMINISTIC_FUNCTIONS:
                found.append(f"{name}()")
            sample = node.get("sample")
            if isinstance(sample, dict) and not sample.get("repeatable", False):
                found.append("USING SAMPLE")
            for v in node.values():
                walk(v)
        elif isinstance(node, list):
            for v in node:
                walk(v)

    walk(doc)
    if found:
        raise SettingsError(
            f"source.query uses {found[0]}, which gives different rows on every run (results must be "
            "reproducible); remove it or use a fixed rule (e.g. hash() of the keys, or USING SAMPLE ... REPEATABLE (seed))"
        )
