"""A closed stdout (a pipe to head) ends a run cleanly; the demo keeps an edited job file; install hints."""

from __future__ import annotations

import re
import subprocess
import sys
import tomllib
from pathlib import Path

import duckdb

import arflow
from arflow.cli import main
from arflow.version import DISTRIBUTION
from arflow.sample.panels import default_job, job_toml, mixed_panel, write_table

ROOT = Path(__file__).resolve().parents[1]
ARFLOW = [sys.executable, "-m", "arflow"]


def runs(database: Path) -> list[tuple]:
    con = duckdb.connect(str(database), read_only=True)
    try:
        return con.execute("SELECT run_id, attempt, status FROM arflow.runs ORDER BY run_id").fetchall()
    finally:
        con.close()


def pipe_to_head(args: list[str], nbytes: int, cwd: Path) -> tuple[int, str]:
    """``arflow ARGS | head -c NBYTES`` through a real shell pipe; (arflow's exit code, its stderr)."""
    line = " ".join(f"'{a}'" for a in [*ARFLOW, *args])
    proc = subprocess.run(
        ["bash", "-c", f"{line} 2>arflow-err.txt | head -c {nbytes} >/dev/null; exit ${{PIPESTATUS[0]}}"],
        cwd=cwd, capture_output=True, text=True, timeout=300,
    )
    return proc.returncode, (cwd / "arflow-err.txt").read_text()


def test_demo_json_piped_to_head_completes_the_run(tmp_path: Path) -> None:
    code, err = pipe_to_head(["demo", "--dir", str(tmp_path), "--log-format", "json"], 600, tmp_path)
    assert code == 0, err
    assert "Traceback" not in err and "BrokenPipe" not in err and "Exception ignored" not in err
    assert runs(tmp_path / "vellmar_water.duckdb") == [("vellmar_demand@2025-12-01", 1, "ok")]


def test_run_piped_to_head_and_a_reader_that_is_gone(tmp_path: Path) -> None:
    write_table(tmp_path / "warehouse.duckdb", mixed_panel())
    job = tmp_path / "job.toml"
    job.write_text(job_toml(default_job()), encoding="utf-8")
    code, err = pipe_to_head(["run", str(job)], 100, tmp_path)
    assert code == 0 and "Traceback" not in err, err
    assert runs(tmp_path / "warehouse.duckdb") == [("meters@2026-12-01", 1, "ok")]
    # a reader that closed the pipe before anything was written: every write fails, the run still commits
    for fmt in ("text", "json"):
        proc = subprocess.Popen([*ARFLOW, "run", str(job), "--log-format", fmt], stdout=subprocess.PIPE,
                                stderr=subprocess.PIPE, text=True)
        assert proc.stdout is not None
        proc.stdout.close()
        _, err = proc.communicate(timeout=300)
        assert proc.returncode == 0 and "Traceback" not in err and "Exception ignored" not in err, err
    assert runs(tmp_path / "warehouse.duckdb") == [("meters@2026-12-01", 3, "ok")]


def test_an_error_with_a_closed_stdout_keeps_its_exit_code(tmp_path: Path) -> None:
    code, err = pipe_to_head(["run", str(tmp_path / "missing.toml"), "--log-format", "json"], 1, tmp_path)
    assert code == 2 and err.count("\n") == 1 and "Traceback" not in err, err


# ------------------------------------------------------------------------------------ demo job file

def test_demo_keeps_an_edited_job_file(tmp_path: Path, capsys) -> None:
    assert main(["demo", "--dir", str(tmp_path)]) == 0
    job = tmp_path / "demo_job.toml"
    edited = job.read_text(encoding="utf-8").replace("horizon = 12", "horizon = 6") + "# my edit\n"
    job.write_text(edited, encoding="utf-8")
    capsys.readouterr()
    assert main(["demo", "--dir", str(tmp_path)]) == 0
    out = capsys.readouterr().out
    assert job.read_text(encoding="utf-8") == edited
    assert "kept your edited job file" in out
    con = duckdb.connect(str(tmp_path / "vellmar_water.duckdb"), read_only=True)
    try:
        assert con.execute("SELECT horizon, attempt FROM arflow.runs").fetchall() == [(6, 2)]
    finally:
        con.close()


def test_demo_writes_the_shipped_job_file_when_there_is_none_or_it_is_unchanged(tmp_path: Path, capsys) -> None:
    from arflow.demo import prepare_demo
    from arflow.sample import generate

    path = prepare_demo(tmp_path)
    assert path.read_text(encoding="utf-8") == generate.demo_job_text()
    prepare_demo(tmp_path)
    assert path.read_text(encoding="utf-8") == generate.demo_job_text()


# ------------------------------------------------------------------------------------ install hints

def test_every_install_hint_names_the_projects_own_distribution() -> None:
    # the name on the package index is ours: "arflow" there belongs to an unrelated project
    project = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))["project"]
    assert project["name"] == DISTRIBUTION == "arflow-gated"
    package = Path(arflow.__file__).parent
    sources = [*package.rglob("*.py"), *(ROOT / "sample_warehouse").rglob("*.py"), ROOT / "README.md", ROOT / "DEVELOPERS.md"]
    hints = []
    for path in sources:
        text = path.read_text(encoding="utf-8")
        for match in re.finditer(r"pip install((?:\s+-[-\w]+)*)\s+\\?['\"]?([^\s'\"\\]+)", text):
            hints.append((path.name, match.group(2)))
    assert any(req.startswith("arflow-gated[") for _, req in hints)
    for where, req in hints:
        name = re.split(r"[\[<>=]", req)[0]
        assert name != "arflow", f"{where}: pip install {req} would install someone else's package"
        if "[spark]" in req or "[test" in req:
            assert name in (DISTRIBUTION, "."), f"{where}: pip install {req}"
