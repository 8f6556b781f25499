"""What the orchestrator steps share: the as-of of a scheduled date, and credentials for one run.

An orchestrator names each run by a date (its logical date, a partition's
start). :func:`as_of_for_date` turns it into the job's as-of: the period
holding the date, or ``periods_back`` periods before it (a monthly run on the
first of the month that forecasts from the month just ended uses 1). The job
places the date on its source's calendar, as ``--as-of`` does.
"""

from __future__ import annotations

import datetime as dt
import os
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from typing import Any

from ..errors import SettingsError


def _months_back(day: dt.date, months: int) -> dt.date:
    index = day.year * 12 + (day.month - 1) - months
    return dt.date(index // 12, index % 12 + 1, 1)


def as_of_for_date(date: dt.date | dt.datetime, frequency: str, periods_back: int = 0) -> dt.date:
    """The as-of for a run dated ``date``: that date, moved back ``periods_back`` periods of ``frequency``.

    Only the calendar date counts (a time of day and a time zone are dropped:
    the orchestrator's date is taken as it reads). Integer periods
    (``frequency = "step"``) have no date: such a job needs an explicit as-of.
    """
    if periods_back < 0:
        raise SettingsError(f"periods_back = {periods_back} is negative; use 0 (the period holding the date) or more")
    day = date.date() if isinstance(date, dt.datetime) else date
    if frequency == "day":
        return day - dt.timedelta(days=periods_back)
    if frequency == "week":
        return day - dt.timedelta(weeks=periods_back)
    if frequency in ("month", "quarter", "year"):
        months = {"month": 1, "quarter": 3, "year": 12}[frequency] * periods_back
        if months == 0:
            return day
        return _months_back(day, months)
    raise SettingsError(
        f"a job with frequency = {frequency!r} has integer periods, which a scheduled date cannot name; "
        "give the step an explicit as_of"
    )


#: libpq's environment variables (PostgreSQL's client library reads them when arflow connects)
LIBPQ_VARIABLES = {
    "host": "PGHOST", "port": "PGPORT", "dbname": "PGDATABASE", "user": "PGUSER", "password": "PGPASSWORD",
    "passfile": "PGPASSFILE", "service": "PGSERVICE", "servicefile": "PGSERVICEFILE", "sslmode": "PGSSLMODE",
    "sslrootcert": "PGSSLROOTCERT",
}


@contextmanager
def run_environment(values: Mapping[str, Any] | None) -> Iterator[tuple[str, ...]]:
    """Set environment variables for the length of one run and put the previous values back after it.

    Yields the names set (never the values: they may be passwords). Empty
    values (None or "") are left out, so an unset secret does not hide a
    password file.
    """
    wanted = {str(k): str(v) for k, v in (values or {}).items() if v is not None and str(v) != ""}
    previous = {k: os.environ.get(k) for k in wanted}
    os.environ.update(wanted)
    try:
        yield tuple(sorted(wanted))
    finally:
        for key, old in previous.items():
            if old is None:
                os.environ.pop(key, None)
            else:
                os.environ[key] = old
