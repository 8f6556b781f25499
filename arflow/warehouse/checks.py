"""The row checks every source applies before any fitting, with their one-line messages (once, for all sources)."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

from ..errors import SourceError


@dataclass(frozen=True)
class RowCounts:
    """What a source counted over all its rows: the checks need nothing else."""

    total: int
    values: int  # rows whose value is not NULL
    null_keys: int
    null_periods: int


def check_row_counts(
    counts: RowCounts, keys: tuple[str, ...] | list[str], period: str, value: str,
    examples: Callable[[str], str] | None = None,
) -> int:
    """Refuse an empty source, an all-NULL value column, NULL keys and NULL periods; the row count.

    ``examples(kind)`` (kind ``"key"`` or ``"period"``) may give a few
    offending rows for the message; sources that cannot cheaply show rows leave it out.
    """
    if counts.total == 0:
        raise SourceError("the source has no rows; check source.table / source.query (or the parquet files)")
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
