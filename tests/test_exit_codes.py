"""Exit codes tell the truth about stop signals.

A stop signal while DuckDB executes a statement is an interruption (130, one
line, nothing published), not an internal error; a stop signal after the
publish committed does not hide the run's real status (0, or 4 for the alarm).
Signals are placed with the test hooks: the run pauses at a named point, the
test sends the signal, then lets it go on.
"""

from __future__ import annotations

import os
import signal
import time
from pathlib import Path

import pytest

from arflow.cli import main
from arflow.sample.panels import default_job, job_toml, warehouse_state
from helpers import published_job, query_job, start_paused, warehouse_of

#: a source query whose first full scan runs for minutes (a sum over 10^11 hashes), so a signal lands inside it
SLOW_QUERY = (
    "SELECT site, month, reading FROM readings "
    "WHERE (SELECT sum(hash(i)) FROM range(100000000000) AS t(i)) IS NOT NULL"
)


@pytest.fixture
def job(tmp_path: Path) -> Path:
    """A job that has published the vintage 2026-11; returns the job file."""
    return published_job(tmp_path)


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGINT], ids=["SIGTERM", "Ctrl-C"])
def test_signal_inside_a_database_statement_exits_130(job: Path, sig: signal.Signals) -> None:
    before = warehouse_state(warehouse_of(job))
    proc = start_paused(query_job(job, SLOW_QUERY, "slow_job.toml"), "source-open")
    (job.parent / "resume").touch()
    time.sleep(1.5)  # the run is now inside the source scan, which takes minutes
    assert proc.poll() is None
    sent = time.monotonic()
    proc.send_signal(sig)
    try:
        out, err = proc.communicate(timeout=30)
    finally:
        proc.kill()
    assert time.monotonic() - sent < 10  # DuckDB stops the statement, it does not run to its end
    assert proc.returncode == 130, err
    assert err == "arflow: error: interrupted; nothing was published by this run\n"
    assert warehouse_state(warehouse_of(job)) == before


@pytest.mark.parametrize("alarm", [False, True], ids=["ok", "alarm"])
@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGINT], ids=["SIGTERM", "Ctrl-C"])
def test_signal_after_commit_keeps_the_runs_status(job: Path, sig: signal.Signals, alarm: bool) -> None:
    if alarm:  # quarantining any series raises the alarm (exit 4)
        sections = default_job()
        sections["gates"]["max_quarantine_share"] = 0.0
        sections["publish"]["hold_on_alarm"] = False  # the publish path (a held run writes no view rows)
        job.write_text(job_toml(sections), encoding="utf-8")
    before = warehouse_state(warehouse_of(job))
    proc = start_paused(job, "commit")
    proc.send_signal(sig)
    time.sleep(0.3)
    (job.parent / "resume").touch()
    out, err = proc.communicate(timeout=60)
    assert proc.returncode == (4 if alarm else 0), err
    assert "published" in out  # the summary is printed as usual
    assert f"{sig.name} arrived after the run committed; exiting with the run's status {proc.returncode}" in err
    after = warehouse_state(warehouse_of(job))
    assert after != before
    assert [r[2] for r in after["vintages"]] == ["meters@2026-11-01", "meters@2026-12-01"]


def test_signal_before_commit_still_rolls_back(job: Path) -> None:
    before = warehouse_state(warehouse_of(job))
    proc = start_paused(job, "vintages")
    proc.send_signal(signal.SIGTERM)
    (job.parent / "resume").touch()
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 130
    assert err == "arflow: error: interrupted; nothing was published by this run\n"
    assert warehouse_state(warehouse_of(job)) == before


def test_interrupted_error_in_process_maps_to_130(job: Path, capsys, monkeypatch) -> None:
    """An interruption that surfaces as another error (DuckDB's RuntimeError) is still reported as one."""
    import arflow.job as job_module

    real = job_module.run_job

    def interrupted_run(*args, **kwargs):
        os.kill(os.getpid(), signal.SIGTERM)  # handled by arflow: raises KeyboardInterrupt here
        return real(*args, **kwargs)

    monkeypatch.setattr(job_module, "run_job", interrupted_run)
    assert main(["run", str(job)]) == 130
    assert capsys.readouterr().err == "arflow: error: interrupted; nothing was published by this run\n"
    # the handlers are restored and the state is reset for the next call
    monkeypatch.setattr(job_module, "run_job", real)
    assert main(["run", str(job)]) == 0
