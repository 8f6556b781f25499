"""The typed run call ``arflow.run_job_file``: the same numbers as the command line, one exception per exit code,
and nothing left behind in a long-lived process."""

from __future__ import annotations

import json
import os
import re
import signal
import subprocess
import sys
import textwrap
import threading
from pathlib import Path

import duckdb
import psutil
import pytest

import arflow
from arflow.cli import main
from arflow.job_file import load_job
from sample_jobs import LATEST, sample_jobs

README = Path(__file__).resolve().parents[1] / "README.md"


@pytest.fixture(scope="module")
def jobs(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    return sample_jobs(tmp_path_factory.mktemp("sample"))


def _cli(capsys: pytest.CaptureFixture[str], *args: str) -> tuple[int, str, str]:
    code = main(list(args))
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def _without_time(text: str) -> str:
    return "\n".join(line for line in text.splitlines() if "time taken" not in line)


def test_summary_has_the_numbers_of_the_text_summary_and_the_finish_event(jobs, capsys) -> None:
    events: list[dict] = []
    summary = arflow.run_job_file(jobs["ok"], as_of="2025-06", dry_run=True, on_event=events.append)
    assert isinstance(summary, arflow.RunSummary)
    assert [e["event"] for e in events][0] == "start" and events[-1]["event"] == "finish"
    # the summary is the finish event (plus the alarm level and the exit code), in JSON types only
    finish = {k: v for k, v in events[-1].items() if k != "event"}
    as_dict = summary.to_dict()
    assert json.loads(json.dumps(finish, default=str)) == {k: as_dict[k] for k in finish}
    assert as_dict["max_quarantine_share"] == 0.5 and as_dict["exit_code"] == 0
    assert json.loads(summary.to_json()) == as_dict
    # ... and the command line prints the same numbers for the same run
    code, out, _ = _cli(capsys, "run", str(jobs["ok"]), "--as-of", "2025-06", "--dry-run")
    assert code == 0
    assert _without_time(summary.text()) == _without_time(out)
    code, out, _ = _cli(capsys, "run", str(jobs["ok"]), "--as-of", "2025-06", "--dry-run", "--log-format", "json")
    cli_finish = [json.loads(line) for line in out.splitlines() if json.loads(line)["event"] == "finish"][0]
    volatile = {"seconds", "phase_seconds", "time", "event"}
    assert {k: v for k, v in cli_finish.items() if k not in volatile} == {
        k: v for k, v in as_dict.items() if k in cli_finish and k not in volatile
    }
    # the numbers themselves (21 zones in the small sample, 8 of them with a known problem)
    assert summary.series_total == 21 and summary.series_published + summary.series_quarantined == 21
    assert summary.as_of.isoformat() == "2025-06-01" and summary.dry_run and summary.attempt is None


def test_publishing_run_returns_a_frozen_summary_and_writes_the_vintage(jobs) -> None:
    spec = load_job(jobs["ok"])
    summary = arflow.run_job_file(spec, as_of="2025-11")  # a loaded job spec works as well as a path
    assert summary.attempt == 1 and not summary.alarm and not summary.held and summary.exit_code == 0
    with pytest.raises(AttributeError):
        summary.series_total = 0  # type: ignore[misc]
    with pytest.raises(TypeError):
        summary.reason_counts["too_short"] = 0  # type: ignore[index]
    con = duckdb.connect(str(jobs["ok"].parent / "vellmar_water.duckdb"), read_only=True)
    try:
        published = con.execute(
            "SELECT count(DISTINCT (district, zone)) FROM arflow.forecasts WHERE run_id = ?", [summary.run_id]
        ).fetchone()[0]
    finally:
        con.close()
    assert published == summary.series_published


def test_alarm_raises_with_the_summary_and_can_return_it_instead(jobs, capsys) -> None:
    with pytest.raises(arflow.QuarantineAlarm) as raised:
        arflow.run_job_file(jobs["alarm"], as_of="2025-10")
    alarm = raised.value
    assert alarm.exit_code == 4 and isinstance(alarm, arflow.ArflowError)
    assert alarm.summary.alarm and alarm.summary.held and alarm.summary.exit_code == 4
    assert alarm.summary.quarantine_share > alarm.summary.max_quarantine_share == 0.1
    assert "over gates.max_quarantine_share = 0.1" in str(alarm)
    summary = arflow.run_job_file(jobs["alarm"], as_of="2025-10", raise_on_alarm=False)
    assert summary.alarm and summary.exit_code == 4 and summary.attempt == 2
    assert _cli(capsys, "run", str(jobs["alarm"]), "--as-of", "2025-10")[0] == 4


@pytest.mark.parametrize(
    ("case", "args", "wanted"),
    [
        ("broken", (), arflow.SettingsError),
        ("no_file", (), arflow.SettingsError),
        ("ok", ("--as-of", "2031-01"), arflow.SettingsError),  # after the latest period in the source
        ("missing_table", (), arflow.DataError),
    ],
)
def test_each_error_is_the_one_class_of_its_exit_code(jobs, capsys, case, args, wanted) -> None:
    path = jobs.get(case, jobs["ok"].parent / "no_such_job.toml")
    kwargs = {"as_of": args[1]} if args else {}
    with pytest.raises(wanted) as raised:
        arflow.run_job_file(path, **kwargs)
    code, _, err = _cli(capsys, "run", str(path), *args)
    assert raised.value.exit_code == code == {arflow.SettingsError: 2, arflow.DataError: 3}[wanted]
    assert f"arflow: error: {raised.value}" == err.strip()  # the same one line as the command line


def test_locked_target_is_a_data_error(jobs) -> None:
    con = duckdb.connect(str(jobs["ok"].parent / "vellmar_water.duckdb"))  # holds the file's write lock
    try:
        with pytest.raises(arflow.DataError) as raised:
            arflow.run_job_file(jobs["ok"])
    finally:
        con.close()
    assert isinstance(raised.value, arflow.PublishError) and raised.value.exit_code == 3


def test_internal_error_is_chained_and_maps_to_exit_1(jobs, capsys, monkeypatch) -> None:
    monkeypatch.setenv("ARFLOW_TEST_FAIL_AFTER", "forecasts")  # the fault hook raises a RuntimeError mid-publish
    with pytest.raises(arflow.InternalError) as raised:
        arflow.run_job_file(jobs["ok"])
    assert raised.value.exit_code == 1 and isinstance(raised.value.__cause__, RuntimeError)
    assert not isinstance(raised.value, arflow.ArflowError)  # a bug is not a user error
    assert _cli(capsys, "run", str(jobs["ok"]))[0] == 1


def test_callback_error_stops_the_run_unchanged_and_publishes_nothing(jobs) -> None:
    class Stop(Exception):
        pass

    def on_event(event: dict) -> None:
        if event["event"] == "publish":
            raise Stop("dashboard refresh failed")

    with pytest.raises(Stop):
        arflow.run_job_file(jobs["ok"], as_of="2025-03", on_event=on_event)
    con = duckdb.connect(str(jobs["ok"].parent / "vellmar_water.duckdb"), read_only=True)
    try:
        assert con.execute("SELECT count(*) FROM arflow.runs WHERE as_of = DATE '2025-03-01'").fetchone()[0] == 0
    finally:
        con.close()


def _process_state() -> dict:
    me = psutil.Process()
    return {
        "handlers": {s: signal.getsignal(s) for s in (signal.SIGINT, signal.SIGTERM)},
        "threads": sorted(t.name for t in threading.enumerate()),
        # multiprocessing's resource tracker is one helper per interpreter, started once and kept for reuse
        "children": [c for c in me.children(recursive=True) if "resource_tracker" not in " ".join(c.cmdline())],
        "main": sys.modules["__main__"],
        "fds": me.num_fds(),
    }


def test_nothing_is_left_behind_in_the_calling_process(tmp_path: Path) -> None:
    jobs = sample_jobs(tmp_path, workers=2)
    before = _process_state()
    wakeup = signal.set_wakeup_fd(-1)
    signal.set_wakeup_fd(wakeup)
    for as_of in ("2025-10", "2025-11", LATEST):
        summary = arflow.run_job_file(jobs["ok"], as_of=as_of)
        assert summary.chunks == 5  # five chunks of five zones over two worker processes
    with pytest.raises(arflow.DataError):
        arflow.run_job_file(jobs["missing_table"])
    after = _process_state()
    assert after["handlers"] == before["handlers"]
    assert signal.set_wakeup_fd(wakeup) == wakeup  # the wake-up descriptor was not changed either
    assert after["threads"] == before["threads"]
    assert after["children"] == [], after["children"]  # the worker processes were ended
    assert after["main"] is before["main"]
    assert after["fds"] <= before["fds"] + 2  # no descriptor leaked per run (DuckDB may keep one)


SCRIPT = """\
import os, sys
import arflow
import arflow.allocator

summary = arflow.run_job_file(sys.argv[1], as_of="2025-09")
print("RUN", os.getpid(), summary.series_published, summary.chunks, flush=True)
print("TUNED", arflow.allocator._tuned, flush=True)
"""


def test_a_plain_script_needs_no_main_guard_with_worker_processes(tmp_path: Path) -> None:
    """Workers are spawned; they must not re-run the calling script (which has no __main__ guard)."""
    jobs = sample_jobs(tmp_path, workers=2)
    script = tmp_path / "nightly.py"
    script.write_text(SCRIPT, encoding="utf-8")
    done = subprocess.run([sys.executable, str(script), str(jobs["ok"])], capture_output=True, text=True,
                          timeout=600, cwd=tmp_path)
    assert done.returncode == 0, done.stderr[-3000:]
    runs = [line.split() for line in done.stdout.splitlines() if line.startswith("RUN ")]
    assert len(runs) == 1, done.stdout  # printed once: the workers did not run the script again
    assert runs[0][3] == "5"
    assert "TUNED False" in done.stdout  # the caller's allocator was left alone


def test_readme_example_runs_as_written(tmp_path: Path) -> None:
    text = README.read_text(encoding="utf-8")
    section = text.split("## Running from Python and from schedulers", 1)[1]
    block = re.search(r"```python\n(.*?)```", section, re.S)
    assert block is not None
    sample_jobs(tmp_path)
    (tmp_path / "demo_job.toml").write_text((tmp_path / "ok_job.toml").read_text(encoding="utf-8"), encoding="utf-8")
    done = subprocess.run([sys.executable, "-c", textwrap.dedent(block.group(1))], capture_output=True, text=True,
                          timeout=600, cwd=tmp_path, env={**os.environ, "PYTHONUNBUFFERED": "1"})
    assert done.returncode == 0, done.stderr[-3000:]
    assert "published" in done.stdout
