"""Chunks read as key ranges hold the same whole series as the one-pass grouped read."""

from __future__ import annotations

import datetime as dt
from pathlib import Path
from types import SimpleNamespace

import duckdb
import numpy as np
import polars as pl

from arflow.warehouse.duckdb_source import DuckDBSource


def _spec(db: Path, table: tuple[str, ...] | None = None, query: str | None = None) -> SimpleNamespace:
    return SimpleNamespace(database=db, parquet=None, table=table, query=query, keys=("region", "store"),
                           period="period", value="value")


def _write(db: Path) -> None:
    rng = np.random.default_rng(4)
    rows = []
    for region in ("north", "South", "east-2", "Ölmark"):  # mixed case and a non-ASCII name: byte order
        for store in (3, 11, 2, 100, 7):
            n = int(rng.integers(5, 30))  # ragged histories
            months = rng.permutation(n)  # rows stored out of period order
            rows += [(region, store, dt.date(2020 + m // 12, m % 12 + 1, 1), float(rng.normal())) for m in months]
    order = rng.permutation(len(rows))  # and out of key order
    frame = pl.DataFrame([rows[i] for i in order], schema=["region", "store", "period", "value"], orient="row")
    con = duckdb.connect(str(db))
    con.register("f", frame.to_arrow())
    con.execute("CREATE TABLE readings AS SELECT * FROM f")
    con.close()


def _chunks(spec: SimpleNamespace, as_of: dt.date, size: int) -> list[pl.DataFrame]:
    source = DuckDBSource(spec, "month")
    with source as s:
        return list(s.chunks(as_of, size))


def test_key_range_chunks_equal_the_grouped_read(tmp_path: Path) -> None:
    db = tmp_path / "w.duckdb"
    _write(db)
    as_of = dt.date(2021, 6, 1)
    for size in (1, 3, 7, 20, 50):
        ranged = _chunks(_spec(db, table=("readings",)), as_of, size)
        grouped = _chunks(_spec(db, query="SELECT * FROM readings"), as_of, size)
        assert len(ranged) == len(grouped)
        for a, b in zip(ranged, grouped):
            # same series in the same order, every row of each (rows within a series may differ in order)
            assert a.select("region", "store").unique(maintain_order=True).equals(
                b.select("region", "store").unique(maintain_order=True))
            assert a.sort(pl.all()).equals(b.sort(pl.all()))
            assert a.get_column("period").max() <= as_of
            assert a.height == a.filter(pl.col("period") <= as_of).height
        # every key of the listing lands in exactly one chunk, chunks hold `size` series but the last
        counts = [c.select("region", "store").unique().height for c in ranged]
        assert all(c == size for c in counts[:-1]) and 0 < counts[-1] <= size
        assert sum(counts) == pl.concat(ranged).select("region", "store").unique().height


def test_key_range_chunks_of_an_as_of_before_the_data_are_empty(tmp_path: Path) -> None:
    db = tmp_path / "w.duckdb"
    _write(db)
    assert _chunks(_spec(db, table=("readings",)), dt.date(2000, 1, 1), 5) == []
