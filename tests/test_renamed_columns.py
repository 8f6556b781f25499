"""A schema written by the previous release (old column names, no status columns) is upgraded by the next run."""

from __future__ import annotations

import json
from pathlib import Path

import duckdb

from arflow.cli import main
from arflow.sample.panels import default_job, job_toml, mixed_panel, write_table


def _cols(con: duckdb.DuckDBPyConnection, table: str) -> list[str]:
    return [r[0] for r in con.execute(
        "SELECT column_name FROM information_schema.columns WHERE table_schema = 'arflow' AND table_name = ? "
        "ORDER BY ordinal_position", [table]).fetchall()]


def test_previous_release_schema_is_upgraded_in_place(tmp_path: Path, capsys) -> None:
    db = tmp_path / "warehouse.duckdb"
    write_table(db, mixed_panel())
    job = tmp_path / "job.toml"
    job.write_text(job_toml(default_job()), encoding="utf-8")
    assert main(["run", str(job), "--as-of", "2026-06"]) == 0
    # make it look like the previous release wrote it: old backtests names, no per-series status columns
    con = duckdb.connect(str(db))
    try:
        con.execute("ALTER TABLE arflow.backtests RENAME COLUMN step TO horizon")
        con.execute("ALTER TABLE arflow.accuracy RENAME COLUMN forecast_run_id TO run_id")
        for lab in ("80", "95"):
            con.execute(f"ALTER TABLE arflow.backtests RENAME COLUMN hit_rate_{lab} TO coverage_{lab}")
        con.execute("DROP VIEW arflow.latest_series_status")
        for col in ("reasons", "failed_gates", "warnings"):
            con.execute(f"ALTER TABLE arflow.series_status DROP COLUMN {col}")
        con.execute("UPDATE arflow.arflow_tables SET columns = list_filter(list_transform(columns, lambda c: "
                    "CASE c WHEN 'step' THEN 'horizon' WHEN 'forecast_run_id' THEN 'run_id' ELSE c END), "
                    "lambda c: c NOT IN ('reasons', 'failed_gates', 'warnings'))"
                    " WHERE table_name IN ('backtests', 'series_status', 'accuracy')")
        old_rows = con.execute("SELECT count(*) FROM arflow.backtests").fetchone()[0]
    finally:
        con.close()
    capsys.readouterr()
    # the readers take the old names too
    assert main(["explain", str(job), "site=s01", "--log-format", "json"]) == 0
    explained = json.loads(capsys.readouterr().out)
    assert explained["backtest"] and explained["backtest"][0]["step"] == 1 and "hit_rate_80" in explained["backtest"][0]
    assert main(["report", str(job), "-o", str(tmp_path / "old.html")]) == 0
    # validate and a dry run read the old schema without complaint
    assert main(["validate", str(job)]) == 0
    assert main(["run", str(job), "--dry-run"]) == 0
    assert main(["run", str(job)]) == 0, capsys.readouterr().err
    con = duckdb.connect(str(db), read_only=True)
    try:
        cols = _cols(con, "backtests")
        assert "step" in cols and "horizon" not in cols and {"hit_rate_80", "hit_rate_95"} <= set(cols)
        assert not [c for c in cols if c.startswith("coverage_")]
        # the old vintage's rows kept their values under the new names
        assert con.execute("SELECT count(*) FROM arflow.backtests WHERE run_id = 'meters@2026-06-01' "
                           "AND step IS NOT NULL").fetchone()[0] == old_rows
        assert {"reasons", "failed_gates", "warnings"} <= set(_cols(con, "series_status"))
        acc = _cols(con, "accuracy")
        assert "forecast_run_id" in acc and "run_id" not in acc
        # the second run scored the first vintage's forecasts under the new name
        assert con.execute("SELECT count(DISTINCT forecast_run_id) FROM arflow.accuracy").fetchone() == (1,)
        # the old vintage's status rows have NULL there; the new one's are filled
        nulls = con.execute("SELECT as_of, count(*) FILTER (reasons IS NULL), count(*) FROM arflow.series_status "
                            "GROUP BY as_of ORDER BY as_of").fetchall()
        assert nulls[0][1] == nulls[0][2] and nulls[1][1] == 0
        assert con.execute("SELECT count(*) FROM arflow.latest_series_status").fetchone()[0] == nulls[1][2]
        marker = con.execute("SELECT columns FROM arflow.arflow_tables WHERE table_name = 'backtests'").fetchone()[0]
        assert "step" in marker and "horizon" not in marker
    finally:
        con.close()


def test_old_job_file_key_is_still_read(tmp_path: Path) -> None:
    from arflow.errors import SettingsError
    from arflow.job_file import parse_job

    sections = default_job()
    sections["gates"]["max_stale_periods"] = 3
    spec = parse_job(sections, base_dir=tmp_path)
    assert spec.settings.gates.max_periods_behind == 3
    sections["gates"]["max_periods_behind"] = 2
    try:
        parse_job(sections, base_dir=tmp_path)
    except SettingsError as exc:
        assert "old name of gates.max_periods_behind" in str(exc)
    else:
        raise AssertionError("both names were accepted")
