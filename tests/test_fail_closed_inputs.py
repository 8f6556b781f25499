"""User mistakes from a hostile-input trial: each is one line with exit 2 or 3, found before fitting,
and the target is left exactly as it was; odd calendars and duplicates are flagged, not binned.

Every case starts from a warehouse where the job ``meters`` has published,
runs the altered job in-process, and compares a digest of the target's rows
before and after.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import io
import json
import os
import subprocess
import sys
from collections.abc import Callable
from pathlib import Path

import duckdb
import polars as pl
import pytest

from arflow.cli import main
from arflow.sample.panels import ar_panel, default_job, job_toml, mixed_panel, warehouse_state, write_table
from arflow.warehouse.duckdb_target import output_column_prefixes, output_columns


def digest(db: Path) -> str:
    state = {s: warehouse_state(db, s) for s in ("arflow", "main", "steps")}
    return hashlib.sha256(repr(state).encode()).hexdigest()


def _run(path: Path, *extra: str, command: str = "run") -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    code = main([command, str(path), *extra], out=out, err=err)
    return code, out.getvalue(), err.getvalue()


@pytest.fixture
def published(tmp_path: Path) -> Path:
    """A warehouse where the job ``meters`` has published; returns the database."""
    db = tmp_path / "warehouse.duckdb"
    write_table(db, mixed_panel())
    (tmp_path / "good.toml").write_text(job_toml(default_job()), encoding="utf-8")
    code, _, err = _run(tmp_path / "good.toml")
    assert code == 0, err
    return db


def _write_job(db: Path, job: dict, text: str | bytes | None = None) -> Path:
    path = db.parent / "bad.toml"
    body = text if text is not None else job_toml(job)
    path.write_bytes(body if isinstance(body, bytes) else body.encode("utf-8"))
    return path


def _refused(db: Path, path: Path, code: int, text: str, *extra: str, command: str = "run") -> None:
    before = digest(db)
    got, _, err = _run(path, *extra, command=command)
    assert got == code, err
    assert err.startswith("arflow: error: ") and err.count("\n") == 1 and "Traceback" not in err, err
    assert text in err, err
    assert digest(db) == before


def _with_table(db: Path, frame: pl.DataFrame, **source: object) -> dict:
    write_table(db, frame, "bad_readings")
    job = default_job()
    job["job"]["name"] = "meters_bad"
    job["source"].update(table="bad_readings", **source)
    return job


# ----------------------------------------------------------------- one-line errors


def test_all_null_value_column(published: Path) -> None:
    job = _with_table(published, mixed_panel().with_columns(reading=pl.lit(None, pl.Float64)))
    _refused(published, _write_job(published, job), 3, "the value column reading is NULL in all")


@pytest.mark.parametrize("name", sorted(output_columns()))
def test_key_named_like_any_output_column(published: Path, name: str) -> None:
    # every column of every result table and view, read off the DDL; matched ignoring case
    col = name.upper() if len(name) % 2 else name
    job = _with_table(published, mixed_panel().rename({"site": col}), keys=[col])
    _refused(published, _write_job(published, job), 2, f"column name '{col}' is used by arflow's output tables")


@pytest.mark.parametrize("prefix", output_column_prefixes())
def test_key_named_like_a_coverage_column(published: Path, prefix: str) -> None:
    col = prefix + "80"
    job = _with_table(published, mixed_panel().rename({"site": col}), keys=[col])
    _refused(published, _write_job(published, job), 2, "is used by arflow's output tables")


def test_output_column_list_covers_the_published_tables(published: Path) -> None:
    con = duckdb.connect(str(published), read_only=True)
    try:
        cols = {r[0].lower() for r in con.execute(
            "SELECT column_name FROM information_schema.columns WHERE table_schema = 'arflow' "
            "AND table_name <> 'arflow_tables'").fetchall()}
    finally:
        con.close()
    prefixes = output_column_prefixes()
    assert {c for c in cols if c != "site" and c not in output_columns() and not c.startswith(prefixes)} == set()


def _steps(db: Path, offset: int = 0) -> dict:
    frame = mixed_panel().with_columns(month=pl.col("month").rank("dense").cast(pl.Int64) + offset)
    job = _with_table(db, frame, frequency="step")
    job["publish"]["schema"] = "steps"  # integer periods need their own schema
    return job


def test_step_as_of_out_of_range(published: Path) -> None:
    _refused(published, _write_job(published, _steps(published)), 2, "as-of period 99999999999999999999 is out of range",
             "--as-of", "99999999999999999999")


def test_step_periods_near_the_int64_limit(published: Path) -> None:
    _refused(published, _write_job(published, _steps(published, 2**63 - 200)), 3, "is out of range for integer periods")


def test_deeply_nested_toml(published: Path) -> None:
    path = _write_job(published, {}, "[job]\nname = \"x\"\nbad = " + "[" * 500 + "]" * 500 + "\n")
    _refused(published, path, 2, "nests arrays or tables too deeply")


def test_full_temporary_folder(published: Path, monkeypatch) -> None:
    # what polars raised when the stage's temporary folder was a full 200 kB tmpfs (measured here)
    import polars.exceptions

    from arflow.warehouse import stage

    def full(*args: object, **kwargs: object) -> None:
        raise polars.exceptions.ComputeError(
            "parquet: File out of specification: underlying IO error: No space left on device (os error 28)")

    monkeypatch.setattr(stage.StagedRun, "write_to", staticmethod(full))
    job = default_job()
    _refused(published, _write_job(published, job), 3, "No space left on device")


@pytest.mark.parametrize("query, what", [
    ("SELECT site, month, reading + random() AS reading FROM readings", "random()"),
    ("SELECT site, month, reading FROM readings WHERE random() < 2", "random()"),
    ("SELECT site, month, reading FROM readings USING SAMPLE 90%", "USING SAMPLE"),
    ("SELECT site || gen_random_uuid()::VARCHAR AS site, month, reading FROM readings", "gen_random_uuid()"),
])
def test_non_deterministic_query_is_refused(published: Path, query: str, what: str) -> None:
    job = default_job()
    job["source"].pop("table")
    job["source"]["query"] = query
    _refused(published, _write_job(published, job), 2, f"source.query uses {what}")


def test_random_in_a_string_or_comment_is_fine(published: Path) -> None:
    job = default_job()
    job["source"].pop("table")
    job["source"]["query"] = "SELECT site, month, reading, 'random()' AS note FROM readings -- random()"
    code, _, err = _run(_write_job(published, job), "--dry-run")
    assert code == 0, err


def test_target_held_by_another_process_fails_before_compute(published: Path) -> None:
    holder = subprocess.Popen(
        [sys.executable, "-c", "import duckdb, sys, time; c = duckdb.connect(sys.argv[1]); print('held', flush=True); time.sleep(60)",
         str(published)],
        stdout=subprocess.PIPE, text=True,
    )
    try:
        assert holder.stdout is not None and holder.stdout.readline() == "held\n"
        out, err = io.StringIO(), io.StringIO()
        path = published.parent / "good.toml"
        code = main(["run", str(path), "--log-format", "json"], out=out, err=err)
        assert code == 3
        message = err.getvalue()
        assert message.count("\n") == 1 and "is in use by another process" in message
        assert f"(PID {holder.pid})" in message and "nothing was computed" in message
        events = [json.loads(line)["event"] for line in out.getvalue().splitlines()]
        assert events == ["error"]  # no start, no chunk: refused before reading or fitting
    finally:
        holder.kill()
        holder.wait()
    assert _run(published.parent / "good.toml")[0] == 0


@pytest.mark.parametrize("command, extra", [("validate", ()), ("run", ("--dry-run",)), ("run", ())])
def test_non_writable_target_is_reported(published: Path, command: str, extra: tuple[str, ...]) -> None:
    job = default_job()
    job["publish"]["database"] = "/proc/arflow-cannot-write-here.duckdb"  # not writable, even for root
    _refused(published, _write_job(published, job), 3, "of publish.database is not writable", *extra, command=command)


@pytest.mark.skipif(os.geteuid() == 0, reason="root writes into read-only folders")
def test_read_only_folder_is_reported(published: Path, tmp_path: Path) -> None:
    folder = tmp_path / "ro"
    folder.mkdir()
    folder.chmod(0o555)
    try:
        job = default_job()
        job["publish"]["database"] = str(folder / "out.duckdb")
        _refused(published, _write_job(published, job), 3, "is not writable", command="validate")
    finally:
        folder.chmod(0o755)


def test_byte_order_mark_is_accepted(published: Path) -> None:
    path = _write_job(published, {}, b"\xef\xbb\xbf" + job_toml(default_job()).encode("utf-8"))
    code, _, err = _run(path, "--dry-run")
    assert code == 0, err


@pytest.mark.parametrize("lag", [122, 200, 400])
def test_long_seasonal_lags_work(tmp_path: Path, lag: int) -> None:
    db = tmp_path / "warehouse.duckdb"
    write_table(db, ar_panel(3, 150, seed=3))
    job = default_job()
    job["model"]["seasonal_lag"] = lag
    path = _write_job(db, job)
    code, _, err = _run(path)
    assert code == 0, err


# ------------------------------------------------------------ duplicates and calendar


def _decisions(db: Path, job: str) -> dict[str, tuple[str, list[str]]]:
    con = duckdb.connect(str(db), read_only=True)
    try:
        return {r[0]: (r[1], r[2]) for r in con.execute(
            "SELECT site, decision, reasons FROM arflow.models WHERE job_run(run_id) = ?".replace(
                "job_run(run_id)", "split_part(run_id, '@', 1)"), [job]).fetchall()}
    finally:
        con.close()


def _forecasts(db: Path, job: str) -> list[tuple]:
    con = duckdb.connect(str(db), read_only=True)
    try:
        return con.execute(
            "SELECT site, period, forecast, lower_80, upper_95 FROM arflow.forecasts "
            "WHERE split_part(run_id, '@', 1) = ? ORDER BY ALL", [job]).fetchall()
    finally:
        con.close()


def test_allowed_duplicates_do_not_depend_on_row_order(published: Path) -> None:
    frame = mixed_panel()
    extra = frame.filter(pl.col("site").is_in(["s01", "s03"]) & (pl.col("month") < dt.date(2020, 1, 1)))
    # s01's repeats are exact copies; s03's repeats disagree with the originals
    extra = extra.with_columns(reading=pl.when(pl.col("site") == "s03").then(pl.col("reading") + 1.0).otherwise(pl.col("reading")))
    results = []
    for seed in (1, 2, 3):
        shuffled = pl.concat([frame, extra]).sample(fraction=1.0, shuffle=True, seed=seed)
        job = _with_table(published, shuffled)
        job["gates"]["allow_duplicates"] = True
        job["job"]["name"] = f"dups{seed}"
        code, _, err = _run(_write_job(published, job))
        assert code == 0, err
        decisions = _decisions(published, f"dups{seed}")
        assert decisions["s01"] == ("published", [])
        assert decisions["s03"][0] == "quarantined" and "conflicting_duplicates" in decisions["s03"][1]
        results.append(_forecasts(published, f"dups{seed}"))
    assert results[0] == results[1] == results[2] and results[0]


def test_duplicates_not_allowed_are_flagged(published: Path) -> None:
    frame = mixed_panel()
    job = _with_table(published, pl.concat([frame, frame.filter(pl.col("site") == "s02").head(1)]))
    code, _, err = _run(_write_job(published, job))
    assert code == 0, err
    assert "duplicate_periods" in _decisions(published, "meters_bad")["s02"][1]


def test_mid_month_date_is_flagged_not_binned(published: Path) -> None:
    frame = mixed_panel().with_columns(
        month=pl.when((pl.col("site") == "s02") & (pl.col("month") == dt.date(2022, 3, 1)))
        .then(pl.lit(dt.date(2022, 3, 15))).otherwise(pl.col("month")))
    job = _with_table(published, frame)
    code, _, err = _run(_write_job(published, job))
    assert code == 0, err
    decisions = _decisions(published, "meters_bad")
    assert decisions["s02"][0] == "quarantined" and "off_calendar_periods" in decisions["s02"][1]
    assert decisions["s01"] == ("published", [])


def test_wednesday_among_monday_weeks_is_flagged(tmp_path: Path) -> None:
    import arflow

    mondays = [dt.date(2021, 1, 4) + dt.timedelta(weeks=i) for i in range(80)]
    frame = ar_panel(2, 80, seed=4).with_columns(month=pl.Series(mondays * 2))
    frame = frame.with_columns(month=pl.when((pl.col("site") == "s02") & (pl.col("month") == mondays[40]))
                               .then(pl.lit(mondays[40] + dt.timedelta(days=2))).otherwise(pl.col("month")))
    run = arflow.forecast(frame, keys="site", period="month", value="reading",
                          settings=arflow.Settings(frequency="week", gates=arflow.GateSettings(alpha=1e-6)))
    reasons = dict(zip(run.models["site"], run.models["reasons"].to_list()))
    assert "off_calendar_periods" in reasons["s02"] and reasons["s01"] == []


def test_duplicate_resolution_ignores_row_order() -> None:
    from hypothesis import given, settings
    from hypothesis import strategies as st

    from arflow.core.panel import CONFLICTING_DUPLICATES, DUPLICATE_PERIODS
    from arflow.frames import to_panel_inputs

    rows = st.lists(st.tuples(st.sampled_from(["a", "b", "c"]), st.integers(0, 6),
                              st.one_of(st.none(), st.sampled_from([1.0, 2.0, -0.0, 0.0, float("nan")]))),
                    min_size=1, max_size=40)

    @settings(max_examples=200, deadline=None, derandomize=True)
    @given(rows=rows, seed=st.integers(0, 2**32 - 1))
    def check(rows: list, seed: int) -> None:
        frame = pl.DataFrame(rows, schema={"k": pl.String, "p": pl.Int64, "v": pl.Float64}, orient="row")
        shuffled = frame.sample(fraction=1.0, shuffle=True, seed=seed)
        results = []
        for f in (frame, shuffled):
            inp = to_panel_inputs(f, ["k"], "p", "v", "step")
            keys = inp.keys["k"].to_list()
            cells = sorted((keys[c], int(o), repr(float(v))) for c, o, v in zip(inp.codes, inp.ordinals, inp.values))
            flags = {keys[g]: int(inp.flags[g]) for g in range(len(keys))}
            results.append((cells, flags))
        assert results[0] == results[1]
        cells, flags = results[0]
        assert len({(k, o) for k, o, _ in cells}) == len(cells)  # one row per (series, period)
        for k, bits in flags.items():
            values = {}
            for kk, p, v in rows:
                if kk == k:
                    values.setdefault(p, set()).add("nan" if v is None or v != v else float(v))
            repeated = any(sum(1 for kk, pp, _ in rows if kk == k and pp == p) > 1 for p in values)
            assert bool(bits & DUPLICATE_PERIODS) == repeated
            assert bool(bits & CONFLICTING_DUPLICATES) == any(len(s) > 1 for s in values.values())

    check()
