"""Workers default to the CPUs the process may use, and never change a number.

The CPU count respects the affinity mask and container quotas (cgroup v2
``cpu.max``, cgroup v1 ``cpu.cfs_quota_us``; the file formats are the Linux
kernel's, Documentation/admin-guide/cgroup-v2.rst and cgroup-v1/cpu*.rst).
"""

from __future__ import annotations

import datetime as dt
import os
from pathlib import Path

import numpy as np
import polars as pl
import pytest

import arflow
from arflow import machine
from arflow.cli import main
from arflow.run import MIN_SERIES_FOR_WORKERS
from arflow.errors import SettingsError
from arflow.job_file import load_job
from arflow.sample.panels import default_job, job_toml, warehouse_state, write_table
from arflow.sample.simulate import mixed_monthly


def _cgroup(tmp_path: Path, rel: str, files: dict[str, str]) -> Path:
    d = tmp_path / rel
    d.mkdir(parents=True, exist_ok=True)
    for name, text in files.items():
        (d / name).write_text(text + "\n")
    return tmp_path


def test_cgroup_v2_quota_is_read_from_the_process_cgroup_and_its_ancestors(tmp_path: Path) -> None:
    root = _cgroup(tmp_path, "job/step", {"cpu.max": "max 100000"})
    _cgroup(tmp_path, "job", {"cpu.max": "150000 100000"})
    assert machine.cgroup_cpu_limit("0::/job/step", root) == pytest.approx(1.5)
    _cgroup(tmp_path, "job", {"cpu.max": "max 100000"})
    assert machine.cgroup_cpu_limit("0::/job/step", root) is None
    _cgroup(tmp_path, "", {"cpu.max": "300000 100000"})
    assert machine.cgroup_cpu_limit("0::/", root) == pytest.approx(3.0)


def test_cgroup_v1_quota(tmp_path: Path) -> None:
    root = _cgroup(tmp_path, "cpu,cpuacct/box", {"cpu.cfs_quota_us": "50000", "cpu.cfs_period_us": "100000"})
    text = "4:memory:/box\n2:cpu,cpuacct:/box\n"
    assert machine.cgroup_cpu_limit(text, root) == pytest.approx(0.5)
    _cgroup(tmp_path, "cpu,cpuacct/box", {"cpu.cfs_quota_us": "-1"})
    assert machine.cgroup_cpu_limit(text, root) is None


def test_available_cpus_respects_affinity_and_quota(monkeypatch: pytest.MonkeyPatch) -> None:
    n = machine.available_cpus()
    assert 1 <= n <= len(os.sched_getaffinity(0))
    monkeypatch.setattr(machine, "cgroup_cpu_limit", lambda: 1.5)
    assert machine.available_cpus() == min(2, len(os.sched_getaffinity(0)))
    monkeypatch.setattr(machine, "cgroup_cpu_limit", lambda: 0.2)
    assert machine.available_cpus() == 1
    monkeypatch.setattr(machine, "_affinity", lambda: 3)
    monkeypatch.setattr(machine, "cgroup_cpu_limit", lambda: None)
    assert machine.available_cpus() == 3
    assert machine.resolve_workers(None) == 3 and machine.resolve_workers(5) == 5


def _job(sections_edit: dict | None = None) -> dict:
    sections = default_job("warehouse.duckdb")
    for section, body in (sections_edit or {}).items():
        sections.setdefault(section, {}).update(body)
    return sections


def test_job_file_workers_default_to_the_machine_and_can_be_limited(tmp_path: Path) -> None:
    def parse(sections: dict):
        path = tmp_path / "job.toml"
        path.write_text(job_toml(sections))
        return load_job(path)

    assert parse(_job()).run.workers is None
    assert parse(_job({"run": {"workers": "auto"}})).run.workers is None
    assert parse(_job({"run": {"workers": 1}})).run.workers == 1
    for bad in (0, 257, "many", 1.5):
        with pytest.raises(SettingsError, match="run.workers"):
            parse(_job({"run": {"workers": bad}}))


def _frame(G: int, T: int) -> pl.DataFrame:
    Y = mixed_monthly(G, T, seed=5)
    months = pl.date_range(dt.date(2016, 1, 1), dt.date(2016, 1, 1) + dt.timedelta(days=31 * (T - 1)), "1mo",
                           eager=True)[:T]
    return pl.DataFrame({
        "site": np.repeat([f"s{i:05d}" for i in range(G)], T),
        "month": pl.concat([months] * G),
        "reading": Y.ravel(),
    })


def test_forecast_numbers_do_not_depend_on_the_number_of_workers() -> None:
    frame = _frame(MIN_SERIES_FOR_WORKERS + 300, 48)  # five blocks: the default starts workers
    runs = [arflow.forecast(frame, keys="site", period="month", value="reading", workers=w) for w in (1, 2, None)]
    for name in ("models", "forecasts", "gates", "residual_acf", "backtests"):
        base = getattr(runs[0], name)
        for other in runs[1:]:
            assert getattr(other, name).equals(base), name  # bit-identical, NaN included


def test_job_numbers_do_not_depend_on_the_number_of_workers(tmp_path: Path, capsys) -> None:
    states = []
    for workers in (1, 2, "auto"):
        d = tmp_path / str(workers)
        d.mkdir()
        write_table(d / "warehouse.duckdb", _frame(900, 48))
        (d / "job.toml").write_text(job_toml(_job({"run": {"workers": workers, "chunk_series": 250}})))
        assert main(["run", str(d / "job.toml")]) == 0, capsys.readouterr()
        capsys.readouterr()
        state = warehouse_state(d / "warehouse.duckdb")
        # the run's own bookkeeping (times, durations) differs; every number does not
        states.append({k: v for k, v in state.items() if k not in ("runs", "vintages", "arflow_tables")})
    assert states[0] == states[1] == states[2]
