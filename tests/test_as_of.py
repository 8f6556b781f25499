"""As-of guards: calendar placement, one run id per vintage, no vintage beyond the data or far ahead."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import numpy as np
import polars as pl
import pytest

from arflow.cli import main
from arflow.job_file import SourceSpec
from arflow.sample.panels import default_job, job_toml, mixed_panel, warehouse_state, write_table
from arflow.warehouse.duckdb_source import DuckDBSource, SourceCalendar
from arflow.warehouse.contract import run_id_for
from helpers import query_rows as sql
from helpers import write_job

D = dt.date


def weekly_frame(n_sites: int = 4, n_weeks: int = 120, last: dt.date = D(2025, 12, 22), seed: int = 3) -> pl.DataFrame:
    """AR(1) series labelled by Monday (``last`` must be a Monday)."""
    rng = np.random.default_rng(seed)
    weeks = [last - dt.timedelta(weeks=n_weeks - 1 - i) for i in range(n_weeks)]
    rows = []
    for s in range(n_sites):
        x = 0.0
        for w in weeks:
            x = 0.5 * x + rng.normal()
            rows.append((f"s{s + 1:02d}", w, 100.0 + x))
    return pl.DataFrame(rows, schema={"site": pl.String, "week": pl.Date, "reading": pl.Float64}, orient="row")


def periodic_frame(starts: list[dt.date]) -> pl.DataFrame:
    return pl.DataFrame({"site": ["a"] * len(starts), "p": starts, "reading": np.arange(len(starts), dtype=float)})


def source_over(tmp_path: Path, frame: pl.DataFrame, period: str, frequency: str) -> DuckDBSource:
    tmp_path.mkdir(parents=True, exist_ok=True)
    write_table(tmp_path / "src.duckdb", frame)
    spec = SourceSpec(keys=("site",), period=period, value="reading", database=tmp_path / "src.duckdb", table=("readings",))
    return DuckDBSource(spec, frequency)


def weekly_job(tmp_path: Path, frame: pl.DataFrame | None = None) -> Path:
    sections = default_job()
    sections["source"].update(period="week", frequency="week")
    return write_job(tmp_path, sections, weekly_frame() if frame is None else frame)


def monthly_job(tmp_path: Path) -> Path:
    return write_job(tmp_path)


# ------------------------------------------------------------------------------------ calendar

@pytest.mark.parametrize(("frequency", "weekday", "anchor", "given", "whole_month", "want"), [
    # weekly, Monday labels: any day goes to the Monday of its week (2025-12-22 is a Monday)
    ("week", 0, "start", D(2025, 12, 23), False, D(2025, 12, 22)),
    ("week", 0, "start", D(2025, 12, 22), False, D(2025, 12, 22)),
    ("week", 0, "start", D(2025, 12, 28), False, D(2025, 12, 22)),  # Sunday
    ("week", 0, "start", D(2025, 8, 1), True, D(2025, 7, 28)),     # --as-of 2025-08 (a Friday)
    ("week", 6, "start", D(2025, 12, 23), False, D(2025, 12, 21)),  # Sunday labels
    ("month", None, "start", D(2026, 6, 15), False, D(2026, 6, 1)),
    ("month", None, "end", D(2026, 6, 1), True, D(2026, 6, 30)),    # --as-of 2026-06 means June
    ("month", None, "end", D(2026, 6, 15), False, D(2026, 5, 31)),  # mid-June: June is not complete
    ("month", None, "end", D(2026, 6, 30), False, D(2026, 6, 30)),
    ("quarter", None, "start", D(2026, 5, 20), False, D(2026, 4, 1)),
    ("quarter", None, "end", D(2026, 5, 20), False, D(2026, 3, 31)),
    ("quarter", None, "end", D(2026, 6, 30), False, D(2026, 6, 30)),
    ("quarter", None, "end", D(2026, 6, 1), True, D(2026, 6, 30)),   # --as-of 2026-06: June ends Q2
    ("quarter", None, "end", D(2026, 5, 1), True, D(2026, 3, 31)),   # --as-of 2026-05: Q2 not complete
    ("quarter", None, "start", D(2026, 5, 1), True, D(2026, 4, 1)),
    ("year", None, "start", D(2026, 5, 20), False, D(2026, 1, 1)),
    ("day", None, "start", D(2026, 5, 20), False, D(2026, 5, 20)),
])
def test_calendar_places_an_as_of_on_the_label(frequency, weekday, anchor, given, whole_month, want) -> None:
    cal = SourceCalendar(frequency, "DATE", None, weekday, anchor)
    assert cal.place(given, whole_month) == want


def test_weekly_source_labels(tmp_path: Path) -> None:
    with source_over(tmp_path, weekly_frame().rename({"week": "p"}), "p", "week") as src:
        assert src.place_as_of("2025-12-23")[0] == D(2025, 12, 22)
        assert src.place_as_of("2025-08")[0] == D(2025, 7, 28)
        assert src.place_as_of("2025-12-22T00:00Z")[0] == D(2025, 12, 22)


def test_monthly_and_quarterly_source_labels(tmp_path: Path) -> None:
    month_ends = [D(2026, m, 1) + dt.timedelta(days=31) for m in range(1, 12)]
    month_ends = [d.replace(day=1) - dt.timedelta(days=1) for d in month_ends]  # 2026-01-31 .. 2026-11-30
    with source_over(tmp_path / "m", periodic_frame(month_ends), "p", "month") as src:
        assert src.calendar().anchor == "end"
        assert src.place_as_of("2026-06")[0] == D(2026, 6, 30)
        assert src.place_as_of("2026-06-15")[0] == D(2026, 5, 31)
    with source_over(tmp_path / "q", periodic_frame([D(2025, m, 1) for m in (1, 4, 7, 10)]), "p", "quarter") as src:
        assert src.calendar().anchor == "start"
        assert src.place_as_of("2025-08-20")[0] == D(2025, 7, 1)
        assert src.place_as_of("2025-11")[0] == D(2025, 10, 1)
    q_ends = [D(2025, 3, 31), D(2025, 6, 30), D(2025, 9, 30), D(2025, 12, 31)]
    with source_over(tmp_path / "qe", periodic_frame(q_ends), "p", "quarter") as src:
        assert src.calendar().anchor == "end"
        assert src.place_as_of("2025-08-20")[0] == D(2025, 6, 30)


def test_time_zones_give_one_vintage(tmp_path: Path) -> None:
    frame = periodic_frame([D(2026, m, 1) for m in range(1, 12)]).with_columns(pl.col("p").cast(pl.Datetime("us")))
    with source_over(tmp_path, frame, "p", "month") as src:
        assert src.layout().period_type == "TIMESTAMP"
        values = {src.place_as_of(t)[0] for t in (
            "2026-11-01T00:00", "2026-11-01T00:00Z", "2026-11-01T00:00:00+00:00", "2026-11-01T01:00+01:00", "2026-11-01")}
        assert values == {dt.datetime(2026, 11, 1)}
        assert len({run_id_for("j", v) for v in values}) == 1


# ------------------------------------------------------------------------------------ end to end

def test_weekly_run_lands_on_the_source_label_and_says_so(tmp_path: Path, capsys) -> None:
    job = weekly_job(tmp_path)
    assert main(["run", str(job), "--as-of", "2025-12-23"]) == 0
    out = capsys.readouterr().out
    assert "run id meters@2025-12-22" in out and "moved to 2025-12-22" in out
    assert main(["run", str(job), "--as-of", "2025-12-22T00:00Z"]) == 0
    assert "meters@2025-12-22, attempt 2" in capsys.readouterr().out
    assert sql(tmp_path / "warehouse.duckdb", "SELECT run_id, attempt FROM arflow.runs") == [("meters@2025-12-22", 2)]


def test_t00_and_t00z_are_one_run_id(tmp_path: Path, capsys) -> None:
    job = monthly_job(tmp_path)
    assert main(["run", str(job), "--as-of", "2026-11-01T00:00"]) == 0
    assert main(["run", str(job), "--as-of", "2026-11-01T00:00Z"]) == 0
    capsys.readouterr()
    assert sql(tmp_path / "warehouse.duckdb", "SELECT run_id, attempt FROM arflow.runs") == [("meters@2026-11-01", 2)]


def test_as_of_after_the_data_is_refused(tmp_path: Path, capsys) -> None:
    job = monthly_job(tmp_path)
    assert main(["run", str(job), "--as-of", "2026-11"]) == 0
    capsys.readouterr()
    db = tmp_path / "warehouse.duckdb"
    before = warehouse_state(db)
    assert main(["run", str(job), "--as-of", "2030-01-01"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "latest period in the source, 2026-12-01" in err and "--allow-beyond-data" in err
    assert warehouse_state(db) == before
    # deliberately: allowed (every series is stale, so the run is held and the view stays)
    assert main(["run", str(job), "--as-of", "2027-01", "--allow-beyond-data"]) in (0, 4)
    capsys.readouterr()
    assert ("meters@2027-01-01",) in sql(db, "SELECT run_id FROM arflow.runs")


def test_a_stray_far_future_row_is_refused_and_publishes_nothing(tmp_path: Path, capsys) -> None:
    job = monthly_job(tmp_path)
    db = tmp_path / "warehouse.duckdb"
    assert main(["run", str(job), "--as-of", "2026-12"]) == 0
    capsys.readouterr()
    stray = pl.DataFrame({"site": ["s03"], "month": [D(2031, 1, 1)], "reading": [1.0]})
    write_table(db, pl.concat([mixed_panel(), stray]))
    before = warehouse_state(db)
    for command in ("run", "validate"):
        assert main([command, str(job)]) == 3
        err = capsys.readouterr().err
        assert err.count("\n") == 1, err
        assert "2031-01-01" in err and "49 month period(s) after this job's latest vintage 2026-12-01" in err
        assert "site=s03 at 2031-01-01" in err and "--allow-jump" in err
    assert warehouse_state(db) == before
    # an explicit as-of far ahead is a command-line mistake (exit 2)
    assert main(["run", str(job), "--as-of", "2031-01", "--allow-beyond-data"]) == 2
    capsys.readouterr()
    assert main(["run", str(job), "--allow-jump", "--dry-run"]) in (0, 4)
    capsys.readouterr()


# ------------------------------------------------------------------------------------ validate

def test_validate_fails_where_run_would_on_a_misaligned_week(tmp_path: Path, capsys) -> None:
    frame = weekly_frame()
    frame = frame.with_columns(
        week=pl.when((pl.col("site") == "s02") & (pl.col("week") == D(2025, 8, 4))).then(pl.lit(D(2025, 8, 6)))
        .otherwise(pl.col("week")))
    job = weekly_job(tmp_path, frame)
    messages = []
    for command in ("validate", "run"):
        assert main([command, str(job)]) == 3
        err = capsys.readouterr().err
        assert err.count("\n") == 1
        messages.append(err)
    assert messages[0] == messages[1]
    assert "1 row(s) are not on a Monday" in messages[0] and "site=s02 at 2025-08-06" in messages[0]
    assert "arflow" not in {r[0] for r in sql(tmp_path / "warehouse.duckdb", "SELECT schema_name FROM duckdb_schemas()")}


def test_null_periods_are_named_with_examples(tmp_path: Path, capsys) -> None:
    frame = mixed_panel().with_columns(
        month=pl.when((pl.col("site") == "s04") & (pl.col("month") >= D(2026, 11, 1))).then(None).otherwise(pl.col("month")))
    job = tmp_path / "job.toml"
    write_table(tmp_path / "warehouse.duckdb", frame)
    job.write_text(job_toml(default_job()), encoding="utf-8")
    assert main(["validate", str(job)]) == 3
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "2 row(s) with a NULL period" in err and "site=s04 at None" in err


def test_day_timestamps_go_to_midnight_and_huge_steps_are_refused(tmp_path: Path) -> None:
    cal = SourceCalendar("day", "TIMESTAMP", None)
    assert cal.place(dt.datetime(2026, 5, 20, 13, 30)) == dt.datetime(2026, 5, 20)
    frame = pl.DataFrame({"site": ["a"] * 5, "t": list(range(1, 6)), "reading": [1.0, 2.0, 3.0, 2.0, 1.0]})
    with source_over(tmp_path, frame, "t", "step") as src:
        assert src.place_as_of("4")[0] == 4
        with pytest.raises(Exception) as info:
            src.place_as_of("99999999999999999999")
        assert getattr(info.value, "exit_code", None) == 2 and "out of range" in str(info.value)


def test_the_far_ahead_guard_holds_inside_the_transaction_too(tmp_path: Path, capsys, monkeypatch) -> None:
    # as if the target had been locked while the job looked (the early check then skips); the publish checks again
    job = monthly_job(tmp_path)
    db = tmp_path / "warehouse.duckdb"
    assert main(["run", str(job), "--as-of", "2026-12"]) == 0
    stray = pl.DataFrame({"site": ["s03"], "month": [D(2031, 1, 1)], "reading": [1.0]})
    write_table(db, pl.concat([mixed_panel(), stray]))
    before = warehouse_state(db)
    import arflow.job

    monkeypatch.setattr(arflow.job, "_previous_vintage", lambda spec, strict: None)
    capsys.readouterr()
    assert main(["run", str(job), "--allow-beyond-data"]) == 3
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "more than publish.max_periods_ahead = 12" in err and "nothing was published" in err
    assert warehouse_state(db) == before
