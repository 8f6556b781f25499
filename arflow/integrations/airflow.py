"""Apache Airflow: one arflow job as a task (``pip install 'arflow-gated[airflow]'``, Airflow 3).

:class:`ArflowJobOperator` runs the job for the DAG run's logical date (moved
back ``periods_back`` periods; a run without a logical date, or ``as_of=""``,
uses the latest period in the source; ``as_of`` is templated and overrides
the date). The run summary is the task's return value (XCom
``return_value``, also pushed as ``arflow_summary`` when the task fails on
the alarm) and the ``extra`` of the asset events of the task's ``outlets``,
so DAGs scheduled on that asset start only after vetted forecasts were
published. The quarantine alarm fails the task (``on_alarm="fail"``, the
default, without retries: the same data gives the same alarm); with
``on_alarm="warn"`` the task logs a warning and succeeds, or is skipped when
``publish.hold_on_alarm`` kept the published view as it was (so
downstream tasks and assets do not refresh from it). Job-file errors fail the
task without retries; source and target errors (a locked or unreachable
warehouse) fail it with the task's retries.
"""

from __future__ import annotations

import json
from collections.abc import Mapping, Sequence
from typing import Any

from airflow.sdk import BaseOperator
from airflow.sdk.exceptions import AirflowFailException, AirflowSkipException

from ..errors import SettingsError
from ..job_file import load_job
from ..runner import QuarantineAlarm, RunSummary, run_job_file
from .common import as_of_for_date, run_environment

_ALARM_MODES = ("fail", "warn")


class ArflowJobOperator(BaseOperator):
    """Run one arflow job for the DAG run's logical date.

    ``job_file``: the job file (templated). ``as_of``: an explicit as-of
    (templated; ``None`` = the logical date, ``""`` = the latest period).
    ``periods_back``: whole periods of the job's frequency before the logical
    date (1 for a monthly run on the first of the month that forecasts from
    the month just ended). ``on_alarm``: ``"fail"`` or ``"warn"``. ``env``:
    environment variables for the run only (templated, e.g. libpq's
    ``PGPASSWORD`` from ``{{ conn.<id>.password }}``); names are logged,
    values never. ``dry_run``: compute and report, write nothing.
    """

    template_fields: Sequence[str] = ("job_file", "as_of", "env")
    ui_color = "#d9ead3"

    def __init__(
        self,
        *,
        job_file: str,
        as_of: str | None = None,
        periods_back: int = 0,
        on_alarm: str = "fail",
        env: Mapping[str, str] | None = None,
        dry_run: bool = False,
        allow_beyond_data: bool = False,
        **kwargs: Any,
    ) -> None:
        super().__init__(**kwargs)
        if on_alarm not in _ALARM_MODES:
            raise SettingsError(f"on_alarm = {on_alarm!r} is not one of {', '.join(_ALARM_MODES)}; use one of them")
        self.job_file = job_file
        self.as_of = as_of
        self.periods_back = periods_back
        self.on_alarm = on_alarm
        self.env = dict(env or {})
        self.dry_run = dry_run
        self.allow_beyond_data = allow_beyond_data

    def _as_of(self, context: Any, frequency: str) -> Any:
        if self.as_of is not None:
            return self.as_of or None
        logical = context.get("logical_date")
        if logical is None:  # a manual or asset-triggered run without a logical date
            return None
        return as_of_for_date(logical, frequency, self.periods_back)

    def execute(self, context: Any) -> dict[str, Any]:
        try:
            spec = load_job(self.job_file)
            as_of = self._as_of(context, spec.settings.frequency)
        except SettingsError as exc:
            raise AirflowFailException(f"arflow: {exc}") from exc

        def log_event(event: dict[str, Any]) -> None:
            self.log.info("arflow %s", json.dumps(event, default=str))

        alarm = None
        with run_environment(self.env) as names:
            if names:
                self.log.info("arflow: environment for the run: %s", ", ".join(names))
            try:
                summary = run_job_file(spec, as_of=as_of, dry_run=self.dry_run, on_event=log_event,
                                       allow_beyond_data=self.allow_beyond_data)
            except QuarantineAlarm as exc:
                alarm, summary = exc, exc.summary
            except SettingsError as exc:
                raise AirflowFailException(f"arflow: {exc}") from exc
        self.log.info("%s", summary.text())
        data = summary.to_dict()
        if alarm is None:
            self._attach_to_outlets(context, data)
            return data
        context["ti"].xcom_push(key="arflow_summary", value=data)
        if self.on_alarm == "fail":
            raise AirflowFailException(f"arflow: {alarm}")
        self.log.warning("arflow: %s", alarm)
        if summary.held:
            raise AirflowSkipException(f"arflow: {alarm}")
        self._attach_to_outlets(context, data)
        return data

    def _attach_to_outlets(self, context: Any, data: dict[str, Any]) -> None:
        """Put the summary on the asset events this task emits (shown with each event in Airflow's UI)."""
        events = context.get("outlet_events")
        if events is None:
            return
        for outlet in self.outlets or ():
            try:
                events[outlet].extra.update(summary_extra(data))
            except (KeyError, TypeError, AttributeError):  # not an asset (e.g. an alias): nothing to attach
                continue


def summary_extra(data: Mapping[str, Any]) -> dict[str, Any]:
    """The fields of a run summary worth keeping with each asset event (counts, vintage, alarm)."""
    keep = ("job", "run_id", "as_of", "attempt", "series_total", "series_published", "series_quarantined",
            "quarantine_share", "alarm", "held", "dry_run")
    return {k: data[k] for k in keep if k in data}


__all__ = ["ArflowJobOperator", "RunSummary", "summary_extra"]
