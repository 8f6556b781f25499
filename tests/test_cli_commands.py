"""``arflow validate``, ``arflow demo``, ``python -m arflow``, progress and version."""

from __future__ import annotations

import io
import json
import subprocess
import sys
from pathlib import Path

import duckdb

from arflow.cli import main
from arflow.sample.panels import default_job, job_toml, mixed_panel, warehouse_state, write_table
from helpers import write_job


def _job(tmp_path: Path, **source: object) -> Path:
    sections = default_job()
    sections["source"].update(source)
    return write_job(tmp_path, sections)


def test_validate_good(tmp_path: Path, capsys) -> None:
    job = _job(tmp_path)
    assert main(["validate", str(job)]) == 0
    out = capsys.readouterr().out
    assert "job meters is valid" in out and "10 series" in out and "2019-01-01 to 2026-12-01" in out
    assert "site VARCHAR, month DATE, reading DOUBLE" in out and "tables will be created" in out
    assert warehouse_state(tmp_path / "warehouse.duckdb") == {}  # nothing created
    assert main(["validate", str(job), "--log-format", "json"]) == 0
    event = json.loads(capsys.readouterr().out)
    assert event["event"] == "valid" and event["series"] == 10 and event["latest_period"] == "2026-12-01"


def test_validate_bad(tmp_path: Path, capsys) -> None:
    job = _job(tmp_path, value="volume")
    assert main(["validate", str(job)]) == 3
    assert "no column 'volume'" in capsys.readouterr().err
    job.write_text(job.read_text().replace("horizon", "horizn"), encoding="utf-8")
    assert main(["validate", str(job)]) == 2
    assert "did you mean horizon" in capsys.readouterr().err


def test_validate_sees_incompatible_target(tmp_path: Path, capsys) -> None:
    job = _job(tmp_path)
    assert main(["run", str(job)]) == 0
    other = mixed_panel().rename({"site": "meter"})
    write_table(tmp_path / "warehouse.duckdb", other, "other")
    sections = default_job(table="other")
    sections["source"]["keys"] = ["meter"]
    job.write_text(job_toml(sections), encoding="utf-8")
    capsys.readouterr()
    assert main(["validate", str(job)]) == 3
    assert "keyed by (site)" in capsys.readouterr().err


def test_demo_in_a_fresh_folder(tmp_path: Path, capsys) -> None:
    folder = tmp_path / "demo"
    assert main(["demo", "--dir", str(folder)]) == 0
    out = capsys.readouterr().out
    assert "vellmar_demand" in out and "demo_job.toml" in out
    con = duckdb.connect(str(folder / "vellmar_water.duckdb"), read_only=True)
    try:
        total, published, quarantined, reasons = con.execute(
            "SELECT series_total, series_published, series_quarantined, reason_counts FROM arflow.runs"
        ).fetchone()
        assert total > 250 and published > total // 2 and quarantined > 0
        assert {"too_short", "duplicate_periods", "constant_series", "non_finite_values", "ends_before_as_of"} <= set(json.loads(reasons))
        assert con.execute("SELECT count(DISTINCT zone) FROM arflow.published_forecasts").fetchone() == (published,)
    finally:
        con.close()
    # a second demo in the same folder rebuilds the same source and re-runs the same vintage
    first = warehouse_state(folder / "vellmar_water.duckdb")["published_forecasts"]
    assert main(["demo", "--dir", str(folder)]) == 0
    assert warehouse_state(folder / "vellmar_water.duckdb")["published_forecasts"] == first


def test_progress_on_a_terminal(tmp_path: Path) -> None:
    class Tty(io.StringIO):
        def isatty(self) -> bool:
            return True

    job = _job(tmp_path)
    out, err = io.StringIO(), Tty()
    assert main(["run", str(job)], out=out, err=err) == 0
    assert "chunk 1/1" in err.getvalue() and "publishing" in err.getvalue()
    assert "series read" in out.getvalue()


def test_python_dash_m_and_exit_codes(tmp_path: Path) -> None:
    job = _job(tmp_path)
    job.write_text(job.read_text().replace("horizon", "horizn"), encoding="utf-8")
    proc = subprocess.run([sys.executable, "-m", "arflow", "run", str(job)], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2
    assert proc.stderr.startswith("arflow: error: unknown forecast.horizn") and proc.stderr.count("\n") == 1
    proc = subprocess.run([sys.executable, "-m", "arflow", "--help"], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0 and "exit codes:" in proc.stdout and "run" in proc.stdout
