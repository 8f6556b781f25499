"""The typed run call: run a job from a program and get a :class:`RunSummary` back.

``arflow.run_job_file(job, as_of=...)`` does what ``arflow run`` does, for programs
that schedule jobs themselves (an orchestrator's task, a service, a
notebook)::

    summary = arflow.run_job_file("demo_job.toml", as_of="2025-06")
    print(summary.series_published, summary.reason_counts)

Every outcome of the command line has one Python form:

==========  ==========================================================
exit code   the call
==========  ==========================================================
0           returns a :class:`RunSummary`
1           raises :class:`InternalError` (a bug; the cause is chained)
2           raises :class:`arflow.SettingsError` (job file or argument)
3           raises :class:`arflow.DataError` (source, data or target;
            :class:`~arflow.SourceError` and ``PublishError`` are kinds of it)
4           raises :class:`QuarantineAlarm`; its ``summary`` holds the
            run (results were written), or, with ``raise_on_alarm=False``,
            returns the summary with ``alarm`` true
130         ``KeyboardInterrupt`` passes through unchanged
==========  ==========================================================

The call is safe in a long-lived process: it installs no signal handlers
(the host owns them), leaves the process's memory allocator as it is,
starts worker processes (``[run] workers``) only for the run and ends them
before it returns or raises, and its workers never re-run the caller's main
script, so no ``if __name__ == "__main__"`` guard is needed.
"""

from __future__ import annotations

import datetime as dt
import errno
import json
import os
import tempfile
import types
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any

from .errors import ArflowError, DataError, SettingsError, clean_message
from .job_file import JobSpec, load_job

Event = dict[str, Any]

#: the one exception class of each exit code (exit 1 and 4 are defined below)
_CLASS_OF_CODE: dict[int, type[ArflowError]] = {2: SettingsError, 3: DataError}


class QuarantineAlarm(ArflowError):
    """The quarantined share was over ``gates.max_quarantine_share`` (exit code 4).

    The run's records were written (with ``publish.hold_on_alarm`` the
    published view was left as it was); :attr:`summary` holds the run.
    """

    exit_code = 4

    def __init__(self, message: object, summary: "RunSummary") -> None:
        super().__init__(message)
        self.summary = summary


class InternalError(RuntimeError):
    """An unexpected error inside arflow (exit code 1): a bug; nothing was published by the run.

    The original exception is chained as ``__cause__``.
    """

    exit_code = 1


def _frozen_map(value: Mapping[str, Any] | None) -> Mapping[str, Any]:
    return types.MappingProxyType(dict(value or {}))


def _json_value(value: Any) -> Any:
    """``value`` with only JSON types (dates as ISO text, mappings as dicts, tuples as lists)."""
    if isinstance(value, (dt.date, dt.datetime)):
        return value.isoformat()
    if isinstance(value, Mapping):
        return {str(k): _json_value(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_json_value(v) for v in value]
    if value is None or isinstance(value, (bool, int, float, str)):
        return value
    if isinstance(value, Path):
        return str(value)
    return str(value)


@dataclass(frozen=True)
class RunSummary:
    """What one run did: the numbers of the text summary and of the JSON ``finish`` event.

    ``as_of`` is the vintage written (a ``date``, ``datetime`` or integer
    period); ``attempt`` is None for a dry run; ``quarantine_share`` is a
    fraction (rounded to 6 digits as in the finish event); ``alarm`` is true
    when it is over ``max_quarantine_share``, and ``held`` when
    ``publish.hold_on_alarm`` then kept the published view as it was.
    ``reason_counts`` counts reasons (a series can have several). Fields of
    the finish event that this class does not name yet (added by newer
    versions, e.g. counts of warn-only findings) are in ``extra``.
    :meth:`to_dict` gives JSON types only; :meth:`text` the command line's
    text summary.
    """

    job: str
    run_id: str
    as_of: Any
    dry_run: bool
    attempt: int | None
    rows_read: int
    series_total: int
    series_published: int
    series_quarantined: int
    quarantine_share: float
    max_quarantine_share: float
    alarm: bool
    held: bool
    reason_counts: Mapping[str, int]
    chunks: int
    seconds: float
    target: str
    notes: tuple[str, ...] = ()
    phase_seconds: Mapping[str, float] = field(default_factory=dict)
    extra: Mapping[str, Any] = field(default_factory=dict)
    _text: str = field(default="", repr=False, compare=False)

    def __post_init__(self) -> None:
        for name in ("reason_counts", "phase_seconds", "extra"):
            object.__setattr__(self, name, _frozen_map(getattr(self, name)))
        object.__setattr__(self, "notes", tuple(self.notes))

    @property
    def exit_code(self) -> int:
        """What ``arflow run`` exits with for this run: 4 on the alarm, else 0."""
        return 4 if self.alarm else 0

    @classmethod
    def from_outcome(cls, outcome: Any) -> "RunSummary":
        """Build from the job's outcome (``arflow.job.JobOutcome``), through the same dict as the finish event."""
        from .job import outcome_dict

        event = dict(outcome_dict(outcome))
        named = {f.name for f in fields(cls)} - {"extra", "_text", "max_quarantine_share"}
        values = {k: event.pop(k) for k in list(event) if k in named}
        try:
            from .cli import summary_text

            text = summary_text(outcome)
        except Exception:  # noqa: BLE001 - the text is a convenience; the numbers are the summary
            text = ""
        return cls(**values, max_quarantine_share=outcome.max_quarantine_share, extra=event, _text=text)

    def to_dict(self) -> dict[str, Any]:
        """The summary as JSON types: every key of the finish event, plus ``max_quarantine_share`` and ``exit_code``."""
        out: dict[str, Any] = {}
        for f in fields(self):
            if f.name in ("extra", "_text"):
                continue
            out[f.name] = _json_value(getattr(self, f.name))
        out.update({k: _json_value(v) for k, v in self.extra.items() if k not in out})
        out["exit_code"] = self.exit_code
        return out

    def to_json(self) -> str:
        """:meth:`to_dict` as one line of JSON."""
        return json.dumps(self.to_dict(), sort_keys=False)

    def text(self) -> str:
        """The text summary ``arflow run`` prints for this run."""
        return self._text


class _Sink:
    """Passes events to the caller's callback and remembers an exception it raised (re-raised unchanged)."""

    def __init__(self, callback: Callable[[Event], Any] | None) -> None:
        self.callback = callback
        self.error: BaseException | None = None

    def __call__(self, event: Event) -> None:
        if self.callback is None:
            return
        try:
            self.callback(dict(event))
        except BaseException as exc:
            self.error = exc
            raise


def _disk_full(exc: BaseException) -> bool:
    text = str(exc)
    return (isinstance(exc, OSError) and exc.errno in (errno.ENOSPC, errno.EDQUOT)) or (
        "No space left on device" in text or "Disk quota exceeded" in text
    )


def _typed(exc: ArflowError) -> ArflowError:
    """``exc`` as the one class of its exit code (an error class added later maps by its ``exit_code``)."""
    wanted = _CLASS_OF_CODE.get(exc.exit_code)
    if wanted is None or isinstance(exc, wanted):
        return exc
    typed = wanted(str(exc))
    typed.__cause__ = exc
    return typed


def run_job_file(
    job: str | os.PathLike[str] | JobSpec,
    *,
    as_of: str | dt.date | dt.datetime | int | None = None,
    dry_run: bool = False,
    on_event: Callable[[Event], Any] | None = None,
    raise_on_alarm: bool = True,
    allow_beyond_data: bool = False,
    allow_jump: bool = False,
) -> RunSummary:
    """Run a job file (path) or a loaded job spec, as ``arflow run`` does; returns its :class:`RunSummary`.

    ``as_of``: the vintage to write (``"2025-06"``, ``"2025-06-15"``, a
    ``date``/``datetime`` placed on the source's calendar, an integer period;
    default the latest period in the source). ``on_event`` receives each
    event as a dict (``{"event": "start" | "chunk" | "publish" | "finish",
    ...}``, the objects ``--log-format json`` prints, without the time
    stamp); an exception it raises stops the run (nothing is published when
    that happens before the commit) and propagates unchanged.
    ``raise_on_alarm=False`` returns an alarmed run's summary instead of
    raising :class:`QuarantineAlarm`. Errors: see the module docstring.
    """
    from .job import run_job

    sink = _Sink(on_event)
    try:
        spec = job if isinstance(job, JobSpec) else load_job(job)
        outcome = run_job(
            spec, as_of=as_of, dry_run=dry_run, on_event=sink, allow_beyond_data=allow_beyond_data,
            allow_jump=allow_jump, tune_allocator=False,
        )
    except ArflowError as exc:
        if sink.error is exc:
            raise
        typed = _typed(exc)
        if typed is exc:
            raise
        raise typed from exc
    except Exception as exc:
        if sink.error is exc:
            raise
        if _disk_full(exc):
            raise DataError(
                f"a disk is full (No space left on device) while writing the run's temporary files under "
                f"{tempfile.gettempdir()}; free space there or point TMPDIR to a larger folder; nothing was "
                "published by this run"
            ) from exc
        raise InternalError(
            f"internal error ({type(exc).__name__}: {clean_message(exc)}); nothing was published by this run; "
            "please report it"
        ) from exc
    summary = RunSummary.from_outcome(outcome)
    if summary.alarm and raise_on_alarm:
        raise QuarantineAlarm(
            f"alarm: {100 * outcome.quarantine_share:.1f}% of series were quarantined, over "
            f"gates.max_quarantine_share = {outcome.max_quarantine_share:g}; "
            f"{'nothing was written (dry run)' if summary.dry_run else 'results were written'}"
            f"{'; published_forecasts was left as it was (publish.hold_on_alarm)' if summary.held else ''}",
            summary,
        )
    return summary
