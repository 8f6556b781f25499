"""Bad inputs: each gives one clear line and an exit code, or a per-series quarantine
reason when only some series are bad; published rows from before are never touched."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import duckdb
import polars as pl
import pytest

from arflow.cli import main
from arflow.sample.panels import default_job, job_toml, mixed_panel, warehouse_state, write_table

Setup = Callable[[Path, dict], list[str]]


def _source(**changes: object) -> Setup:
    def setup(db: Path, job: dict) -> list[str]:
        job["source"].update(changes)
        return []
    return setup


def _table(make: Callable[[pl.DataFrame], pl.DataFrame], **changes: object) -> Setup:
    """Write a derived table ``bad_readings`` and point the job at it."""
    def setup(db: Path, job: dict) -> list[str]:
        write_table(db, make(mixed_panel()), "bad_readings")
        job["source"].update(table="bad_readings", **changes)
        return []
    return setup


def _set(section: str, key: str, value: object) -> Setup:
    def setup(db: Path, job: dict) -> list[str]:
        job[section][key] = value
        return []
    return setup


def _args(*extra: str) -> Setup:
    return lambda db, job: list(extra)


def _with_null_key(f: pl.DataFrame) -> pl.DataFrame:
    return f.with_columns(site=pl.when(pl.int_range(pl.len()) == 5).then(None).otherwise(pl.col("site")))


def _with_duplicate(f: pl.DataFrame) -> pl.DataFrame:
    return pl.concat([f, f.filter((pl.col("site") == "s02") & (pl.col("month") == pl.col("month").max()))])


def _with_nulls(f: pl.DataFrame) -> pl.DataFrame:
    hole = (pl.col("site") == "s02") & (pl.col("month") == pl.col("month").max())
    return f.with_columns(reading=pl.when(hole).then(None).otherwise(pl.col("reading")))


# (id, setup, exit code, text in the one-line error or the quarantine reason of s02)
CASES: list[tuple[str, Setup, int, str]] = [
    ("missing database", _source(database="missing.duckdb"), 3, "missing.duckdb does not exist"),
    ("missing table", _source(table="nope"), 3, "source table nope not found"),
    ("missing column", _source(value="volume"), 3, "source has no column 'volume'"),
    ("text in value column", _table(lambda f: f.with_columns(pl.col("reading").cast(pl.String))), 3,
     "value column 'reading' has type VARCHAR; expected a numeric column"),
    ("text in period column", _table(lambda f: f.with_columns(pl.col("month").cast(pl.String))), 3,
     "period column 'month' has type VARCHAR"),
    ("NULL keys", _table(_with_null_key), 3, "1 row(s) with a NULL key (site)"),
    ("empty source", _table(lambda f: f.head(0)), 3, "the source has no rows"),
    ("integer periods need step", _table(lambda f: f.with_columns(pl.col("month").rank("dense").cast(pl.Int32))), 3,
     'set source.frequency = "step"'),
    ("typo in job file", _set("forecast", "horizn", 6), 2, "unknown forecast.horizn in job file; did you mean horizon?"),
    ("SQL in table name", _source(table="x; DROP TABLE readings"), 2, "source.table = 'x; DROP TABLE readings' is not allowed"),
    ("SQL in key name", _source(keys=['site"; DROP TABLE readings; --']), 2, "is not a plain identifier"),
    ("SQL in schema name", _set("publish", "schema", "arflow; DROP TABLE readings"), 2, "publish.schema"),
    ("two statements in query", _source(table=None, query="SELECT * FROM readings; DROP TABLE readings"), 2,
     "exactly one SELECT statement"),
    ("write in query", _source(table=None, query="DELETE FROM readings"), 2, "exactly one SELECT statement"),
    ("horizon of 0", _set("forecast", "horizon", 0), 2, "forecast.horizon = 0 is not allowed"),
    ("coverage of 1.5", _set("forecast", "coverage", [0.8, 1.5]), 2, "forecast.coverage = 1.5 is not allowed"),
    ("as-of not a date", _args("--as-of", "last-tuesday"), 2, "--as-of 'last-tuesday' is not a date"),
    ("as-of before the data", _args("--as-of", "1990-01"), 3, "no rows at or before --as-of 1990-01"),
    ("duplicate periods", _table(_with_duplicate), 0, "duplicate_periods"),
    ("NULL values", _table(_with_nulls), 0, "non_finite_values"),
]


@pytest.fixture
def published(tmp_path: Path, capsys) -> Path:
    """A warehouse where the job ``meters`` has already published."""
    db = tmp_path / "warehouse.duckdb"
    write_table(db, mixed_panel())
    (tmp_path / "good.toml").write_text(job_toml(default_job()), encoding="utf-8")
    assert main(["run", str(tmp_path / "good.toml")]) == 0
    capsys.readouterr()
    return db


@pytest.mark.parametrize("setup, code, text", [c[1:] for c in CASES], ids=[c[0] for c in CASES])
def test_bad_input(published: Path, capsys, setup: Setup, code: int, text: str) -> None:
    db = published
    before = warehouse_state(db)
    job = default_job()
    extra = setup(db, job)
    job["source"] = {k: v for k, v in job["source"].items() if v is not None}
    if code == 0:
        job["job"]["name"] = "meters_bad"  # another job in the same schema
    path = db.parent / "bad.toml"
    path.write_text(job_toml(job), encoding="utf-8")
    result = main(["run", str(path), *extra])
    out, err = capsys.readouterr()
    assert result == code, err
    con = duckdb.connect(str(db), read_only=True)
    try:
        assert con.execute("SELECT count(*) FROM readings").fetchone() == (len(mixed_panel()),)
        if code:
            assert err.startswith("arflow: error: ") and err.count("\n") == 1 and "Traceback" not in err
            assert text in err
            assert warehouse_state(db) == before
            return
        # only some series are bad: they are quarantined with the reason, the rest published
        (decision, reasons), = con.execute(
            "SELECT decision, reasons FROM arflow.models WHERE run_id LIKE 'meters_bad@%' AND site = 's02'"
        ).fetchall()
        assert decision == "quarantined" and text in reasons
        bad_view = {r[0] for r in con.execute("SELECT DISTINCT site FROM arflow.published_forecasts WHERE job = 'meters_bad'").fetchall()}
        assert "s02" not in bad_view and "s01" in bad_view
        good_view = con.execute("SELECT * FROM arflow.published_forecasts WHERE job = 'meters' ORDER BY ALL").fetchall()
        assert good_view == [r for r in before["published_forecasts"] if r[1] == "meters"]
        for table in ("models", "forecasts", "gates"):
            rows = con.execute(f"SELECT * FROM arflow.{table} WHERE run_id NOT LIKE 'meters_bad@%' ORDER BY ALL").fetchall()
            assert rows == before[table], table
    finally:
        con.close()


def test_usage_errors_exit_2_with_one_line(capsys) -> None:
    for argv in (["run"], ["frobnicate"], ["run", "job.toml", "--as-off", "2024-01"], []):
        assert main(argv) == 2
        err = capsys.readouterr().err
        assert err.startswith("arflow: error: ") and err.count("\n") == 1, err
