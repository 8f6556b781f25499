"""Chunks of whole series as key ranges: the rule the SQL sources share.

A source lists its series keys once, in the order the database sorts them,
and reads each chunk with one plain scan over a key range (``low <= keys <
next low``). Nothing aggregates or sorts the whole table before the first
chunk can start, and every chunk holds the same series whichever source or
worker count reads it (the first ``chunk_series`` keys, the next ones, ...).

>>> import pyarrow as pa
>>> range_starts(pa.table({"k": ["a", "b", "c", "d", "e"]}), 2)
[('a',), ('c',), ('e',)]
>>> range_predicate(["k1", "k2"], first=2, upper=True)
'(k1, k2) >= ($2, $3) AND (k1, k2) < ($4, $5)'
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from typing import Any

import pyarrow as pa


def range_starts(listing: pa.Table, chunk_series: int) -> list[tuple[Any, ...]]:
    """The first key of every chunk, from the ordered listing of all keys (one column per key)."""
    return [tuple(column[i].as_py() for column in listing.columns) for i in range(0, listing.num_rows, chunk_series)]


def range_predicate(key_exprs: Sequence[str], first: int, upper: bool) -> str:
    """``(keys) >= (low)`` and, unless this is the last range, ``(keys) < (next low)``.

    Parameters are numbered ``$first``, ``$first + 1``, ... (the low key, then
    the next range's low key), as DuckDB and PostgreSQL both accept.
    """
    n = len(key_exprs)
    row = f"({', '.join(key_exprs)})"
    text = f"{row} >= ({', '.join(f'${first + j}' for j in range(n))})"
    if upper:
        text += f" AND {row} < ({', '.join(f'${first + n + j}' for j in range(n))})"
    return text


def ranges(starts: list[tuple[Any, ...]]) -> Iterator[tuple[tuple[Any, ...], tuple[Any, ...] | None]]:
    """(low key, next range's low key or None for the last range) per chunk."""
    for i, low in enumerate(starts):
        yield low, (starts[i + 1] if i + 1 < len(starts) else None)
