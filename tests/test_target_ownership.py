"""The target schema is arflow's: it writes only into tables it created, with the columns it created.

Each case alters a published warehouse (or prepares a schema) by hand, runs
the job, and asserts exit 3, one line naming the difference, and a target whose
contents are unchanged (every table of the schema and the user's own tables).
"""

from __future__ import annotations

import hashlib
import io
from collections.abc import Callable
from pathlib import Path

import duckdb
import pytest

from arflow.cli import main
from arflow.sample.panels import default_job, job_toml, mixed_panel, warehouse_state, write_table


def digest(db: Path) -> str:
    """A digest of every row of every table and view in the schemas a run could touch."""
    state = {s: warehouse_state(db, s) for s in ("arflow", "main", "Arflow")}
    return hashlib.sha256(repr(state).encode()).hexdigest()


def _run(path: Path, *extra: str) -> tuple[int, str]:
    out, err = io.StringIO(), io.StringIO()
    code = main(["run", str(path), *extra], out=out, err=err)
    return code, err.getvalue()


def _sql(db: Path, *statements: str) -> None:
    con = duckdb.connect(str(db))
    try:
        for s in statements:
            con.execute(s)
    finally:
        con.close()


@pytest.fixture
def fresh(tmp_path: Path) -> Path:
    write_table(tmp_path / "warehouse.duckdb", mixed_panel())
    path = tmp_path / "job.toml"
    path.write_text(job_toml(default_job()), encoding="utf-8")
    return path


@pytest.fixture
def published(fresh: Path) -> Path:
    code, err = _run(fresh, "--as-of", "2026-10")
    assert code == 0, err
    return fresh


def _db(job: Path) -> Path:
    return job.parent / "warehouse.duckdb"


def test_marker_records_every_table(published: Path) -> None:
    con = duckdb.connect(str(_db(published)), read_only=True)
    try:
        rows = con.execute("SELECT table_name, key_columns, period_type FROM arflow.arflow_tables ORDER BY 1").fetchall()
    finally:
        con.close()
    assert [r[0] for r in rows] == sorted(
        ["runs", "vintages", "series_status", "models", "gates", "residual_acf", "forecasts", "backtests", "accuracy",
         "job_policy", "vintage_removals"])
    assert all(r[1] == ["site"] and r[2] == "DATE" for r in rows)
    code, err = _run(published)  # a second run into its own schema is fine
    assert code == 0, err


ALTERATIONS: list[tuple[str, str, str]] = [
    ("dropped column", "ALTER TABLE arflow.forecasts DROP COLUMN upper_95", "column forecasts.upper_95 was dropped"),
    ("retyped column", "ALTER TABLE arflow.models ALTER sigma TYPE FLOAT", "column models.sigma is FLOAT, arflow writes DOUBLE"),
    ("retyped coverage column", "ALTER TABLE arflow.forecasts ALTER lower_80 TYPE INTEGER",
     "column forecasts.lower_80 is INTEGER, arflow writes DOUBLE"),
    ("added column", "ALTER TABLE arflow.gates ADD COLUMN note VARCHAR", "table gates has a column note that arflow did not create"),
    ("dropped table", "DROP TABLE arflow.backtests", "arflow's table backtests was dropped"),
    ("replaced table", "DROP TABLE arflow.residual_acf; CREATE TABLE arflow.residual_acf (x INTEGER)",
     "column residual_acf.run_id was dropped"),
]


@pytest.mark.parametrize("statement, message", [a[1:] for a in ALTERATIONS], ids=[a[0] for a in ALTERATIONS])
def test_altered_schema_is_refused(published: Path, statement: str, message: str) -> None:
    db = _db(published)
    _sql(db, *statement.split("; "))
    before = digest(db)
    code, err = _run(published)
    assert code == 3, err
    assert err.startswith("arflow: error: ") and err.count("\n") == 1 and message in err, err
    assert digest(db) == before
    # validate and dry runs report it too
    out, verr = io.StringIO(), io.StringIO()
    assert main(["validate", str(published)], out=out, err=verr) == 3 and message in verr.getvalue()
    assert digest(db) == before


def test_users_own_forecasts_table_is_left_alone(fresh: Path) -> None:
    db = _db(fresh)
    _sql(db, "CREATE SCHEMA arflow", "CREATE TABLE arflow.forecasts (site VARCHAR, period DATE, step INTEGER, forecast DOUBLE)",
         "INSERT INTO arflow.forecasts VALUES ('mine', DATE '2030-01-01', 1, 42.0)")
    before = digest(db)
    code, err = _run(fresh)
    assert code == 3 and err.count("\n") == 1
    assert "has a table forecasts that arflow did not create" in err, err
    assert digest(db) == before


def test_unmarked_table_in_marked_schema_is_refused(published: Path) -> None:
    db = _db(published)
    _sql(db, "DELETE FROM arflow.arflow_tables WHERE table_name = 'gates'")
    before = digest(db)
    code, err = _run(published)
    assert code == 3 and "has a table gates that arflow did not create" in err, err
    assert digest(db) == before


def test_schema_written_before_the_marker_is_adopted(published: Path) -> None:
    db = _db(published)
    _sql(db, "DROP TABLE arflow.arflow_tables")  # as an earlier arflow version left it
    code, err = _run(published)
    assert code == 0, err
    con = duckdb.connect(str(db), read_only=True)
    try:
        assert con.execute("SELECT count(*) FROM arflow.arflow_tables").fetchone() == (11,)
    finally:
        con.close()


def test_schema_name_differing_in_case_is_checked(published: Path) -> None:
    db = _db(published)
    job = default_job()
    job["publish"]["schema"] = "ARFLOW"
    job["source"]["keys"] = ["site", "month_label"]
    job["source"].pop("table")
    job["source"]["query"] = "SELECT site, strftime(month, '%m') AS month_label, month, reading FROM readings"
    path = published.parent / "other.toml"
    path.write_text(job_toml(job), encoding="utf-8")
    before = digest(db)
    code, err = _run(path)
    assert code == 3 and err.count("\n") == 1, err
    assert "holds results keyed by (site)" in err, err
    assert digest(db) == before


def test_coverage_levels_are_limited(published: Path) -> None:
    db = _db(published)
    before = digest(db)
    job = default_job()
    job["forecast"]["coverage"] = [0.5, 0.6, 0.7, 0.8, 0.9, 0.95, 0.99]
    path = published.parent / "many.toml"
    path.write_text(job_toml(job), encoding="utf-8")
    code, err = _run(path)
    assert code == 2 and err.count("\n") == 1 and "at most 6 levels" in err, err
    assert digest(db) == before
    # six levels per job, but a schema gathering more than six across jobs is refused too
    job["forecast"]["coverage"] = [0.5, 0.6, 0.7, 0.9, 0.99]
    path.write_text(job_toml(job), encoding="utf-8")
    code, err = _run(path)
    assert code == 3 and "at most 6 are allowed" in err, err
    assert digest(db) == before


def test_column_new_in_a_later_version_is_added(published: Path) -> None:
    # as if models.r_squared had been added to the DDL after this schema was made
    db = _db(published)
    _sql(db, "ALTER TABLE arflow.models DROP COLUMN r_squared",
         "UPDATE arflow.arflow_tables SET columns = list_filter(columns, lambda c: c <> 'r_squared') WHERE table_name = 'models'")
    code, err = _run(published)
    assert code == 0, err
    con = duckdb.connect(str(db), read_only=True)
    try:
        assert con.execute("SELECT count(r_squared) > 0 FROM arflow.models").fetchone() == (True,)
        (cols,) = con.execute("SELECT columns FROM arflow.arflow_tables WHERE table_name = 'models'").fetchone()
        assert "r_squared" in cols
    finally:
        con.close()
