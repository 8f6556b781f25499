"""Vintages you can list and remove; re-runs that never lose what was vetted; expiry of kept forecasts."""

from __future__ import annotations

import datetime as dt
import getpass
import hashlib
import json
from pathlib import Path

import duckdb
import polars as pl
import pytest

from arflow.cli import main
from arflow.sample.panels import default_job, job_toml, mixed_panel, warehouse_state, write_table
from arflow.warehouse import delta_target as lakehouse
from helpers import query_rows as sql
from helpers import write_job

#: columns that hold wall-clock times (and runs.source, the source path): two targets that ran the same vintages
#: from two folders differ only there
TIME_COLUMNS = {"started_at", "finished_at", "duration_seconds", "published_at", "seconds", "source", "created_at"}


def make_job(folder: Path, frame: pl.DataFrame | None = None, **publish: object) -> Path:
    sections = default_job()
    sections["publish"].update(publish)
    return write_job(folder, sections, frame)


def run(job: Path, *args: str) -> int:
    return main(["run", str(job), *args])


def digests(database: Path, schema: str = "arflow", skip: tuple[str, ...] = ("vintage_removals",)) -> dict[str, str]:
    """sha256 of every table and view (rows sorted, wall-clock columns left out)."""
    con = duckdb.connect(str(database), read_only=True)
    try:
        names = [r[0] for r in con.execute(
            "SELECT table_name FROM information_schema.tables WHERE table_schema = ? ORDER BY 1", [schema]).fetchall()]
        out = {}
        for name in names:
            if name in skip:
                continue
            cols = [r[0] for r in con.execute(
                "SELECT column_name FROM information_schema.columns WHERE table_schema = ? AND table_name = ? "
                "ORDER BY ordinal_position", [schema, name]).fetchall() if r[0] not in TIME_COLUMNS]
            rows = con.execute(f'SELECT {", ".join(chr(34) + c + chr(34) for c in cols)} FROM "{schema}"."{name}" ORDER BY ALL').fetchall()
            out[name] = hashlib.sha256(repr(rows).encode()).hexdigest()
        return out
    finally:
        con.close()


def view(database: Path) -> list[tuple]:
    return sql(database, "SELECT * FROM arflow.published_forecasts ORDER BY ALL")


# ------------------------------------------------------------------------------------ retract

def test_retracting_the_latest_vintage_is_as_if_it_never_ran(tmp_path: Path, capsys) -> None:
    a = make_job(tmp_path / "a")
    b = make_job(tmp_path / "b")
    for as_of in ("2026-10", "2026-11", "2026-12"):
        assert run(a, "--as-of", as_of) == 0
    for as_of in ("2026-10", "2026-11"):
        assert run(b, "--as-of", as_of) == 0
    capsys.readouterr()
    db_a = a.parent / "warehouse.duckdb"
    before = warehouse_state(db_a)
    assert main(["retract", str(a), "--as-of", "2026-12-01", "--dry-run"]) == 0
    out = capsys.readouterr().out
    assert "would remove vintage 2026-12-01" in out and "nothing was changed" in out
    assert warehouse_state(db_a) == before
    assert main(["retract", str(a), "--as-of", "2026-12-01", "--yes"]) == 0
    assert "removed vintage 2026-12-01" in capsys.readouterr().out
    assert digests(db_a) == digests(b.parent / "warehouse.duckdb")
    # the view shows the previous vintage again
    assert sql(db_a, "SELECT DISTINCT as_of FROM arflow.published_forecasts WHERE NOT stale") == [(dt.date(2026, 11, 1),)]
    (who, job, as_of, run_id, attempts, rows), = sql(
        db_a, "SELECT removed_by, job, as_of, run_id, attempts, rows_removed FROM arflow.vintage_removals")
    assert (who, job, as_of, run_id, attempts) == (getpass.getuser(), "meters", dt.date(2026, 12, 1), "meters@2026-12-01", 1)
    assert json.loads(rows)["forecasts"] > 0


def test_retract_needs_a_confirmation_in_scripts_and_names_unknown_vintages(tmp_path: Path, capsys) -> None:
    job = make_job(tmp_path)
    assert run(job, "--as-of", "2026-11") == 0
    capsys.readouterr()
    db = tmp_path / "warehouse.duckdb"
    before = warehouse_state(db)
    assert main(["retract", str(job), "--as-of", "2026-11"]) == 2  # stdin is not a terminal under pytest
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "--yes" in err
    assert main(["retract", str(job), "--as-of", "2025-01", "--yes"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "no vintage 2025-01-01" in err and "2026-11-01" in err
    assert warehouse_state(db) == before


def test_vintages_lists_attempts_status_and_counts(tmp_path: Path, capsys) -> None:
    job = make_job(tmp_path)
    assert run(job, "--as-of", "2026-11") == 0
    assert run(job, "--as-of", "2026-12") == 0
    assert run(job, "--as-of", "2026-12") == 0
    capsys.readouterr()
    assert main(["vintages", str(job), "--log-format", "json"]) == 0
    rows = [json.loads(line) for line in capsys.readouterr().out.splitlines()]
    assert [(r["as_of"], r["attempts"], r["status"], r["current"]) for r in rows] == [
        ("2026-11-01", 1, "ok", False), ("2026-12-01", 2, "ok", True)]
    last = rows[-1]
    assert last["series_total"] == last["series_published"] + last["series_quarantined"]
    assert last["visible"] == last["series_published"] and last["published_at"]
    assert main(["vintages", str(job)]) == 0
    text = capsys.readouterr().out
    assert "2026-12-01 *" in text and "attempts" in text


def test_retract_removes_the_lakehouse_run_too(tmp_path: Path, capsys) -> None:
    job = make_job(tmp_path, lakehouse="lake")
    assert run(job, "--as-of", "2026-11") == 0
    assert run(job, "--as-of", "2026-12") == 0
    capsys.readouterr()
    assert main(["retract", str(job), "--as-of", "2026-12", "--yes"]) == 0
    assert "lakehouse rows" in capsys.readouterr().out
    lake = tmp_path / "lake"
    assert lakehouse.committed_runs(lake)["as_of"].to_list() == [dt.date(2026, 11, 1)]
    for table in ("series_status", "models", "gates", "forecasts", "backtests", "vintages"):
        assert "meters@2026-12-01" not in lakehouse.read_table(lake, table)["run_id"].to_list(), table
    assert lakehouse.read_table(lake, "vintage_removals")["run_id"].to_list() == ["meters@2026-12-01"]
    lake_view = lakehouse.published_forecasts(lake)
    assert lake_view.height == len(view(tmp_path / "warehouse.duckdb"))
    assert set(lake_view["as_of"].to_list()) <= {dt.date(2026, 11, 1)}


# ------------------------------------------------------------------------------------ re-runs

def broken(frame: pl.DataFrame, last: dt.date) -> pl.DataFrame:
    """An upstream double-load: every row of the month ``last`` twice, the second copy with other values."""
    return pl.concat([frame, frame.filter(pl.col("month") == last).with_columns(pl.col("reading") * 1.5)])


def test_rerun_on_a_double_loaded_source_leaves_the_view_as_it_was(tmp_path: Path, capsys) -> None:
    job = make_job(tmp_path)
    db = tmp_path / "warehouse.duckdb"
    assert run(job, "--as-of", "2026-12") == 0
    capsys.readouterr()
    published = view(db)
    assert published
    write_table(db, broken(mixed_panel(), dt.date(2026, 12, 1)))
    assert run(job, "--as-of", "2026-12", "--log-format", "json") == 4
    captured = capsys.readouterr()
    finish = [json.loads(line) for line in captured.out.splitlines() if '"finish"' in line][0]
    assert finish["held"] is True and finish["alarm"] is True
    assert "left as it was" in captured.err
    assert view(db) == published
    assert sql(db, "SELECT status, attempt FROM arflow.runs") == [("held", 2)]
    # the records of the held attempt were written
    assert sql(db, "SELECT count(*) FILTER (WHERE decision = 'quarantined') = count(*) FROM arflow.models") == [(True,)]
    # text summary says so too
    assert run(job, "--as-of", "2026-12") == 4
    assert "held:" in capsys.readouterr().out


def test_without_hold_a_rerun_keeps_the_earlier_attempts_forecasts_as_stale(tmp_path: Path, capsys) -> None:
    job = make_job(tmp_path, hold_on_alarm=False)
    db = tmp_path / "warehouse.duckdb"
    assert run(job, "--as-of", "2026-12") == 0
    published = view(db)
    write_table(db, broken(mixed_panel(), dt.date(2026, 12, 1)))
    assert run(job, "--as-of", "2026-12") == 4
    capsys.readouterr()
    after = sql(db, "SELECT * EXCLUDE (stale) FROM arflow.published_forecasts ORDER BY ALL")
    assert after == [r[:3] + r[4:] for r in published]  # the same forecasts, from the same vintage
    assert sql(db, "SELECT bool_and(stale) FROM arflow.published_forecasts") == [(True,)]


def test_rerun_quarantining_one_series_keeps_its_forecast_from_the_earlier_attempt(tmp_path: Path, capsys) -> None:
    job = make_job(tmp_path)
    db = tmp_path / "warehouse.duckdb"
    assert run(job, "--as-of", "2026-12") == 0
    before = sql(db, "SELECT period, forecast FROM arflow.published_forecasts WHERE site = 's01' ORDER BY period")
    assert before
    frame = mixed_panel().with_columns(
        reading=pl.when(pl.col("site") == "s01").then(pl.lit(50.0)).otherwise(pl.col("reading")))
    write_table(db, frame)
    assert run(job, "--as-of", "2026-12") == 0
    capsys.readouterr()
    assert sql(db, "SELECT decision FROM arflow.series_status WHERE site = 's01'") == [("quarantined",)]
    assert sql(db, "SELECT period, forecast FROM arflow.published_forecasts WHERE site = 's01' ORDER BY period") == before
    assert sql(db, "SELECT DISTINCT stale, as_of FROM arflow.published_forecasts WHERE site = 's01'") == [(True, dt.date(2026, 12, 1))]
    assert sql(db, "SELECT DISTINCT stale FROM arflow.published_forecasts WHERE site = 's02'") == [(False,)]


def test_a_held_new_vintage_does_not_become_current(tmp_path: Path, capsys) -> None:
    job = make_job(tmp_path)
    db = tmp_path / "warehouse.duckdb"
    assert run(job, "--as-of", "2026-11") == 0
    published = view(db)
    write_table(db, broken(mixed_panel(), dt.date(2026, 12, 1)))
    assert run(job) == 4
    capsys.readouterr()
    assert view(db) == published
    assert main(["vintages", str(job), "--log-format", "json"]) == 0
    rows = {r["as_of"]: r for r in map(json.loads, capsys.readouterr().out.splitlines())}
    assert rows["2026-12-01"]["status"] == "held" and rows["2026-12-01"]["published_at"] is None
    assert rows["2026-11-01"]["current"] is True


# ------------------------------------------------------------------------------------ expiry

@pytest.mark.parametrize("limit", [None, 2])
def test_kept_forecasts_expire(tmp_path: Path, capsys, limit: int | None) -> None:
    job = make_job(tmp_path, **({} if limit is None else {"stale_after_periods": limit}))
    db = tmp_path / "warehouse.duckdb"
    assert run(job, "--as-of", "2026-06") == 0  # s01 published, horizon 6: 2026-07 .. 2026-12
    frame = mixed_panel().with_columns(
        reading=pl.when(pl.col("site") == "s01").then(pl.lit(50.0)).otherwise(pl.col("reading")))
    write_table(db, frame)
    shown = {}
    for as_of in ("2026-07", "2026-08", "2026-09", "2026-12"):
        assert run(job, "--as-of", as_of) == 0
        shown[as_of] = sql(db, "SELECT count(*), bool_and(stale) FROM arflow.published_forecasts WHERE site = 's01'")[0]
    capsys.readouterr()
    assert shown["2026-07"] == (6, True) and shown["2026-08"] == (6, True)
    # periods 2026-07 .. 2026-12 are all past at the vintage 2026-12; with a limit of 2, gone after 2 periods
    assert shown["2026-12"] == (0, None)
    assert shown["2026-09"] == ((6, True) if limit is None else (0, None))


def test_lakehouse_view_matches_duckdb_with_kept_and_held_runs(tmp_path: Path, capsys) -> None:
    job = make_job(tmp_path, lakehouse="lake")
    db = tmp_path / "warehouse.duckdb"
    assert run(job, "--as-of", "2026-12") == 0
    frame = mixed_panel().with_columns(
        reading=pl.when(pl.col("site") == "s01").then(pl.lit(50.0)).otherwise(pl.col("reading")))
    write_table(db, frame)
    assert run(job, "--as-of", "2026-12") == 0  # s01 kept from attempt 1
    write_table(db, broken(frame, dt.date(2026, 12, 1)))
    assert run(job, "--as-of", "2026-12") == 4  # held
    capsys.readouterr()
    lake = lakehouse.published_forecasts(tmp_path / "lake")
    duck = pl.from_arrow(duckdb.connect(str(db), read_only=True).sql(
        "SELECT * FROM arflow.published_forecasts ORDER BY job, site, step").to_arrow_table())
    assert lake.select(duck.columns).equals(duck)
    assert lake.filter(pl.col("site") == "s01")["stale"].to_list() == [True] * 6


def test_retracting_an_older_vintage_keeps_the_current_one(tmp_path: Path, capsys) -> None:
    job = make_job(tmp_path)
    db = tmp_path / "warehouse.duckdb"
    for as_of in ("2026-10", "2026-11", "2026-12"):
        assert run(job, "--as-of", as_of) == 0
    published = view(db)
    capsys.readouterr()
    assert main(["retract", str(job), "--as-of", "2026-11", "--yes", "--log-format", "json"]) == 0
    (event,) = [json.loads(line) for line in capsys.readouterr().out.splitlines()]
    assert event["event"] == "retract" and event["run_id"] == "meters@2026-11-01" and event["rows"]["runs"] == 1
    assert view(db) == published
    assert sql(db, "SELECT run_id FROM arflow.runs ORDER BY 1") == [("meters@2026-10-01",), ("meters@2026-12-01",)]
    for table in ("series_status", "models", "gates", "forecasts", "backtests", "vintages"):
        assert sql(db, f"SELECT count(*) FROM arflow.{table} WHERE run_id = 'meters@2026-11-01'") == [(0,)]
    assert sql(db, "SELECT count(*) FROM arflow.accuracy WHERE forecast_run_id = 'meters@2026-11-01' OR recorded_by = 'meters@2026-11-01'") == [(0,)]


def test_lakehouse_only_job_lists_and_retracts(tmp_path: Path, capsys) -> None:
    mixed_panel().write_parquet(tmp_path / "src.parquet")
    sections = default_job()
    sections["source"] = {"parquet": "src.parquet", "keys": ["site"], "period": "month", "value": "reading", "frequency": "month"}
    sections["publish"] = {"lakehouse": "lake"}  # no DuckDB target at all
    path = tmp_path / "job.toml"
    path.write_text(job_toml(sections), encoding="utf-8")
    assert run(path, "--as-of", "2026-11") == 0
    assert run(path, "--as-of", "2026-12") == 0
    capsys.readouterr()
    assert main(["vintages", str(path), "--log-format", "json"]) == 0
    rows = [json.loads(line) for line in capsys.readouterr().out.splitlines()]
    assert [(r["as_of"], r["current"]) for r in rows] == [("2026-11-01", False), ("2026-12-01", True)]
    assert main(["retract", str(path), "--as-of", "2026-12", "--yes"]) == 0
    capsys.readouterr()
    assert lakehouse.committed_runs(tmp_path / "lake")["as_of"].to_list() == [dt.date(2026, 11, 1)]
    assert lakehouse.read_table(tmp_path / "lake", "vintage_removals").height == 1


def test_retract_on_a_terminal_asks_for_the_as_of(tmp_path: Path, capsys) -> None:
    import os
    import pty
    import subprocess
    import sys

    job = make_job(tmp_path)
    for as_of in ("2026-11", "2026-12"):
        assert run(job, "--as-of", as_of) == 0
    capsys.readouterr()
    db = tmp_path / "warehouse.duckdb"
    for answer, code, left in (("no\n", 2, 2), ("2026-12\n", 0, 1)):
        leader, follower = pty.openpty()
        proc = subprocess.Popen([sys.executable, "-m", "arflow", "retract", str(job), "--as-of", "2026-12"],
                                stdin=follower, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        os.close(follower)
        os.write(leader, answer.encode())
        out, err = proc.communicate(timeout=120)
        os.close(leader)
        assert proc.returncode == code, err
        assert "type the as-of to confirm" in err
        assert sql(db, "SELECT count(*) FROM arflow.runs") == [(left,)]
