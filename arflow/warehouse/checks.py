"""The checks every source applies before any fitting, with their one-line messages (once, for all sources).

Row counts (empty source, NULL values, keys and periods), the column lookup,
integer periods against frequency "step", and how periods are labelled
(weekday of weekly labels, period starts or ends). A source supplies its own
SQL through small callables; the rule and the message live here.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

from ..errors import SchemaError, SourceError
from .identifiers import quote

#: weekday names, Monday first (index = ISO weekday - 1)
WEEKDAYS = ("Monday", "Tuesday", "Wednesday", "Thursday", "Friday", "Saturday", "Sunday")


@dataclass(frozen=True)
class RowCounts:
    """What a source counted over all its rows: the checks need nothing else."""

    total: int
    values: int  # rows whose value is not NULL
    null_keys: int
    null_periods: int


def check_row_counts(
    counts: RowCounts, keys: tuple[str, ...] | list[str], period: str, value: str,
    examples: Callable[[str], str] | None = None, where: str = "source.table / source.query (or the parquet files)",
) -> int:
    """Refuse an empty source, an all-NULL value column, NULL keys and NULL periods; the row count.

    ``examples(kind)`` (kind ``"key"`` or ``"period"``) may give a few
    offending rows for the message; sources that cannot cheaply show rows leave it out.
    ``where``: the job-file keys that name the rows (for the empty-source message).
    """
    if counts.total == 0:
        raise SourceError(f"the source has no rows; check {where}")
    if counts.values == 0:
        raise SourceError(
            f"the value column {value} is NULL in all {counts.total} row(s); check source.value or the [source] query"
        )
    if counts.null_keys:
        example = f", e.g. {examples('key')}" if examples is not None else ""
        raise SourceError(
            f"the source has {counts.null_keys:,} row(s) with a NULL key ({', '.join(keys)}){example}; "
            "filter them out or fill them in with a [source] query"
        )
    if counts.null_periods:
        example = f", e.g. {examples('period')}" if examples is not None else ""
        raise SourceError(
            f"the source has {counts.null_periods:,} row(s) with a NULL period ({period}){example}; "
            "filter them out with a [source] query"
        )
    return int(counts.total)


def count_and_check_rows(
    rows: Callable[[str], Sequence[tuple[Any, ...]]], examples: Callable[[str], str], relation: str,
    keys: tuple[str, ...] | list[str], period: str, value: str,
    where: str = "source.table / source.query (or the parquet files)",
) -> int:
    """``check_row_counts`` on counts taken by one SQL statement (standard SQL: DuckDB and PostgreSQL run it).

    ``rows(sql)`` runs a statement on the source; ``examples(condition)``
    gives a few rows of ``relation`` that match an SQL condition.
    """
    null_key = " OR ".join(f"{quote(k)} IS NULL" for k in keys)
    null_period = f"{quote(period)} IS NULL"
    total, null_keys, null_periods, values = rows(
        f"SELECT count(*), count(*) FILTER (WHERE {null_key}), count(*) FILTER (WHERE {null_period}), "
        f"count({quote(value)}) FROM {relation}"
    )[0]
    counts = RowCounts(total=int(total), values=int(values), null_keys=int(null_keys), null_periods=int(null_periods))
    conditions = {"key": null_key, "period": null_period}
    return check_row_counts(counts, keys, period, value, lambda kind: examples(conditions[kind]), where)


def column_type(columns: Sequence[tuple[str, str]], column: str, role: str) -> str:
    """The type of ``column`` among a source's (name, type) ``columns``.

    Refuses a column the source lacks (listing those it has) and one spelt
    with other capitals (``role``: the job-file key that names it).
    """
    by_lower = {name.lower(): (name, typ) for name, typ in columns}
    if column.lower() not in by_lower:
        available = ", ".join(name for name, _ in columns) or "none"
        raise SchemaError(f"source has no column {column!r} (named as {role}); columns available: {available}")
    name, typ = by_lower[column.lower()]
    if name != column:
        raise SchemaError(f"source column is spelled {name!r}, the job file says {column!r} ({role}); use the exact spelling")
    return typ


def check_step_frequency(period_type: str, frequency: str, period: str, shown_type: str) -> None:
    """Integer periods go with frequency "step" and only with it (``shown_type``: the column's type for the message)."""
    if period_type == "BIGINT" and frequency != "step":
        raise SchemaError(f"period column {period!r} holds integers; set source.frequency = \"step\" for integer periods")
    if period_type != "BIGINT" and frequency == "step":
        raise SchemaError(
            f"source.frequency = \"step\" needs an integer period column, but {period!r} is {shown_type}; "
            "use day/week/month/quarter/year"
        )


def period_labels(
    frequency: str,
    weekday_counts: Callable[[], Sequence[tuple[Any, Any]]],
    off_weekday_examples: Callable[[int], str],
    all_period_ends: Callable[[str], Any],
) -> tuple[int | None, str]:
    """How a source labels its periods: (weekday of weekly labels or None, "start" or "end").

    The source answers in its own SQL: ``weekday_counts()`` gives (weekday,
    0 = Monday, rows) of the weekly labels, most rows first;
    ``off_weekday_examples(weekday)`` a few rows not on that weekday;
    ``all_period_ends(frequency)`` whether every month / quarter / year label
    is the period's last day (then periods are labelled by their ends).
    Weekly labels on different weekdays are refused, naming the count and examples.
    """
    if frequency == "week":
        counts = weekday_counts()
        weekday = int(counts[0][0])
        if len(counts) > 1:
            off = sum(int(n) for _, n in counts[1:])
            raise SchemaError(
                f"weekly periods fall on different weekdays: {off:,} row(s) are not on a {WEEKDAYS[weekday]} "
                f"(the weekday of most rows), e.g. {off_weekday_examples(weekday)}; label each week by the same "
                "weekday (e.g. its Monday) or use frequency 'day'"
            )
        return weekday, "start"
    if frequency in ("month", "quarter", "year"):
        return None, "end" if all_period_ends(frequency) else "start"
    return None, "start"
