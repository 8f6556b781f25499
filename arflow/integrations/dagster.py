"""Dagster: one arflow job as an asset with a quarantine check (``pip install 'arflow-gated[dagster]'``).

:func:`build_forecast_asset` returns an asset whose materialization runs the
job for the run's partition (a time-window partition's start date, moved back
``periods_back`` periods; another partition key is used as the as-of text;
no partitions: the latest period in the source) and records the run summary
as the materialization's metadata. Its asset check ``quarantine_share``
passes when the quarantined share is at most ``gates.max_quarantine_share``
and fails otherwise: with ``on_alarm="warn"`` as a check of WARN severity
(the run succeeds), with ``on_alarm="fail"`` (the default) as a blocking
check of ERROR severity, so the run fails and downstream assets are not
materialized. Job-file errors fail the step without retries; source and
target errors fail it with retries allowed (a locked or unreachable
warehouse may come back). Downstream assets list the asset in ``deps`` and
read ``published_forecasts``.
"""

from __future__ import annotations

import datetime as dt
import json
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import dagster as dg

from ..errors import DataError, SettingsError
from ..job_file import load_job
from ..runner import QuarantineAlarm, RunSummary, run_job_file
from .common import LIBPQ_VARIABLES, as_of_for_date, run_environment

#: the name of the asset check that carries the quarantine alarm
QUARANTINE_CHECK = "quarantine_share"
_ALARM_MODES = ("fail", "warn")


class WarehouseCredentials(dg.ConfigurableResource):  # type: ignore[misc]
    """Connection settings for a server warehouse, set as libpq environment variables during the run only.

    Fill the secrets from Dagster's own mechanism, e.g.
    ``WarehouseCredentials(user="forecaster", password=dg.EnvVar("FORECAST_DB_PASSWORD"))``
    or ``passfile=dg.EnvVar("FORECAST_DB_PASSFILE")``. Values are never logged.
    """

    host: str | None = None
    port: int | None = None
    dbname: str | None = None
    user: str | None = None
    password: str | None = None
    passfile: str | None = None
    service: str | None = None
    servicefile: str | None = None
    sslmode: str | None = None
    sslrootcert: str | None = None

    def environment(self) -> dict[str, str]:
        """The libpq variables to set (only the fields given)."""
        out = {}
        for name, variable in LIBPQ_VARIABLES.items():
            value = getattr(self, name)
            if value is not None and value != "":
                out[variable] = str(value)
        return out


def summary_metadata(summary: RunSummary) -> dict[str, Any]:
    """The run summary as Dagster metadata (counts as numbers, the whole summary as JSON, the text summary)."""
    data = summary.to_dict()
    return {
        "as_of": str(data["as_of"]),
        "run_id": summary.run_id,
        "attempt": dg.MetadataValue.int(summary.attempt) if summary.attempt is not None else dg.MetadataValue.null(),
        "series_total": summary.series_total,
        "series_published": summary.series_published,
        "series_quarantined": summary.series_quarantined,
        "quarantine_share": dg.MetadataValue.float(summary.quarantine_share),
        "alarm": summary.alarm,
        "held": summary.held,
        "reason_counts": dg.MetadataValue.json(dict(summary.reason_counts)),
        "target": summary.target,
        "summary": dg.MetadataValue.json(data),
        "text_summary": dg.MetadataValue.md("```\n" + summary.text() + "```"),
    }


def _as_of(context: Any, frequency: str, periods_back: int) -> Any:
    if not context.has_partition_key:
        return None
    try:
        window = context.partition_time_window
    except Exception:  # noqa: BLE001 - not a time-window partition: the key is the as-of text
        return context.partition_key
    start = window.start
    return as_of_for_date(start.date() if isinstance(start, dt.datetime) else start, frequency, periods_back)


def build_forecast_asset(
    job_file: str | Path,
    *,
    name: str = "forecasts",
    key_prefix: str | Sequence[str] | None = None,
    partitions_def: Any = None,
    periods_back: int = 0,
    on_alarm: str = "fail",
    deps: Sequence[Any] | None = None,
    group_name: str | None = None,
    credentials_key: str | None = None,
    description: str | None = None,
) -> Any:
    """An asset that runs the arflow job ``job_file`` once per materialization, with its quarantine check.

    ``partitions_def``: e.g. ``dg.MonthlyPartitionsDefinition(start_date=...)``;
    each partition's start date (``periods_back`` periods earlier) is the
    as-of. ``on_alarm``: ``"fail"`` or ``"warn"`` (see the module docstring).
    ``deps``: the assets that load the series (the job waits for them).
    ``credentials_key``: the resource key of a :class:`WarehouseCredentials`.
    """
    if on_alarm not in _ALARM_MODES:
        raise SettingsError(f"on_alarm = {on_alarm!r} is not one of {', '.join(_ALARM_MODES)}; use one of them")
    path = Path(job_file)
    prefix = [key_prefix] if isinstance(key_prefix, str) else list(key_prefix or [])
    key = dg.AssetKey([*prefix, name])
    check = dg.AssetCheckSpec(
        QUARANTINE_CHECK, asset=key, blocking=True,
        description="the share of quarantined series is at most gates.max_quarantine_share",
    )
    severity = dg.AssetCheckSeverity.ERROR if on_alarm == "fail" else dg.AssetCheckSeverity.WARN

    @dg.asset(
        key=key, partitions_def=partitions_def, check_specs=[check], deps=list(deps or []), group_name=group_name,
        required_resource_keys={credentials_key} if credentials_key else set(),
        description=description or f"vetted forecasts of the arflow job {path.name}", kinds={"arflow"},
    )
    def _forecast_asset(context) -> dg.MaterializeResult:  # type: ignore[no-untyped-def]  (Dagster reads the annotation)
        try:
            spec = load_job(path)
            as_of = _as_of(context, spec.settings.frequency, periods_back)
        except SettingsError as exc:
            raise dg.Failure(description=str(exc), metadata={"exit_code": exc.exit_code}, allow_retries=False) from exc
        env = getattr(context.resources, credentials_key).environment() if credentials_key else {}

        def log_event(event: dict[str, Any]) -> None:
            context.log.info("arflow " + json.dumps(event, default=str))

        alarm = None
        with run_environment(env) as names:
            if names:
                context.log.info("arflow: warehouse settings from the resource: " + ", ".join(names))
            try:
                summary = run_job_file(spec, as_of=as_of, on_event=log_event)
            except QuarantineAlarm as exc:
                alarm, summary = exc, exc.summary
            except SettingsError as exc:
                raise dg.Failure(description=str(exc), metadata={"exit_code": exc.exit_code},
                                 allow_retries=False) from exc
            except DataError as exc:
                raise dg.Failure(description=str(exc), metadata={"exit_code": exc.exit_code},
                                 allow_retries=True) from exc
        context.log.info(summary.text())
        if alarm is not None:
            context.log.warning(f"arflow: {alarm}")
        result = dg.AssetCheckResult(
            check_name=QUARANTINE_CHECK, passed=not summary.alarm, severity=severity,
            metadata={
                "quarantine_share": dg.MetadataValue.float(summary.quarantine_share),
                "max_quarantine_share": dg.MetadataValue.float(summary.max_quarantine_share),
                "series_quarantined": summary.series_quarantined, "held": summary.held,
            },
            description=str(alarm) if alarm is not None else None,
        )
        return dg.MaterializeResult(metadata=summary_metadata(summary), check_results=[result])

    return _forecast_asset
