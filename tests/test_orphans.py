"""No orphans, no litter: workers die with the run, stage folders never outlive it.

The runs here are real ``python -m arflow run`` processes with two workers on a
warehouse large enough to be stopped mid-run. Each gets a private temp folder
(``TMPDIR``) so the stage folders it leaves, or not, are its own.
"""

from __future__ import annotations

import datetime as dt
import json
import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import polars as pl
import psutil
import pytest

from arflow.sample.panels import default_job, job_toml, mixed_panel, warehouse_state, write_table
from arflow.warehouse import stage as stage_module
from arflow.warehouse.stage import STAGE_PREFIX, StagedRun, sweep_stale


def _big_panel(n_series: int = 4_000, n_periods: int = 120, seed: int = 7) -> pl.DataFrame:
    """Stationary AR(1) series (phi 0.6), generated as one array."""
    rng = np.random.default_rng(seed)
    x = np.zeros((n_series, n_periods + 50))
    e = rng.normal(size=x.shape)
    for t in range(1, x.shape[1]):
        x[:, t] = 0.6 * x[:, t - 1] + e[:, t]
    months = [dt.date(2015 + m // 12, m % 12 + 1, 1) for m in range(n_periods)]
    return pl.DataFrame({
        "site": np.repeat([f"m{i:05d}" for i in range(n_series)], n_periods),
        "month": months * n_series,
        "reading": (100.0 + 5.0 * x[:, 50:]).ravel(),
    })


@pytest.fixture(scope="module")
def big_job(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("orphans")
    write_table(folder / "warehouse.duckdb", _big_panel())
    sections = default_job()
    sections["run"] = {"workers": 2, "chunk_series": 50}
    path = folder / "job.toml"
    path.write_text(job_toml(sections), encoding="utf-8")
    return path


def _env(tmp: Path) -> dict[str, str]:
    tmp.mkdir(parents=True, exist_ok=True)
    return dict(os.environ, TMPDIR=str(tmp))


def _start_until_chunks(job: Path, tmp: Path, chunks: int = 1, **popen) -> subprocess.Popen[str]:
    """Start a run and return once its workers have finished ``chunks`` chunks (the run is mid-way)."""
    proc = subprocess.Popen(
        [sys.executable, "-m", "arflow", "run", str(job), "--log-format", "json"],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=_env(tmp), **popen,
    )
    assert proc.stdout is not None
    seen = 0
    for line in proc.stdout:
        event = json.loads(line)
        if event["event"] == "chunk":
            seen += 1
            if seen >= chunks:
                assert event["chunk"] < event["chunks"], "the run finished before it could be stopped"
                return proc
    proc.kill()
    raise AssertionError("run ended before a chunk: " + proc.stderr.read())


def _read_to_end(stream, timeout: float) -> bool:
    """True when ``stream`` reaches end of file within ``timeout`` s (every writer closed it)."""
    done = threading.Event()

    def read() -> None:
        stream.read()
        done.set()

    threading.Thread(target=read, daemon=True).start()
    return done.wait(timeout)


@pytest.mark.slow
def test_kill_9_of_the_parent_leaves_no_process_and_no_stage_after_the_next_run(big_job: Path, tmp_path: Path) -> None:
    tmp = tmp_path / "tmp"
    proc = _start_until_chunks(big_job, tmp)
    children = psutil.Process(proc.pid).children(recursive=True)
    assert len(children) >= 2  # two workers (and multiprocessing's resource tracker)
    assert len(list(tmp.glob(STAGE_PREFIX + "*"))) == 1
    if sys.platform.startswith("linux"):  # workers write nothing to the job's output streams
        workers = [c for c in children if "spawn_main" in " ".join(c.cmdline())]
        assert len(workers) == 2
        # one worker has finished a chunk; the other may still be importing (the first chunks are
        # ready soon after the key listing): each holds the job's streams only until it is set up
        deadline = time.monotonic() + 30
        for worker in workers:
            while True:
                streams = [os.readlink(f"/proc/{worker.pid}/fd/{fd}") for fd in (1, 2)]
                if streams == [os.devnull] * 2 or time.monotonic() > deadline:
                    break
                time.sleep(0.05)
            assert streams == [os.devnull] * 2

    proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=10)
    _, alive = psutil.wait_procs(children, timeout=5)
    assert alive == [], [p.cmdline() for p in alive]
    # nothing holds the job's output open: a scheduler reading it to the end is not kept waiting
    assert _read_to_end(proc.stdout, 5) and _read_to_end(proc.stderr, 5)

    # kill -9 cannot clean up; the next run (any job, same temp folder) removes the dead run's folder
    assert len(list(tmp.glob(STAGE_PREFIX + "*"))) == 1
    small = tmp_path / "small"
    small.mkdir()
    write_table(small / "warehouse.duckdb", mixed_panel())
    (small / "job.toml").write_text(job_toml(default_job()), encoding="utf-8")
    done = subprocess.run([sys.executable, "-m", "arflow", "run", str(small / "job.toml")],
                          capture_output=True, text=True, env=_env(tmp), timeout=120)
    assert done.returncode == 0, done.stderr
    assert list(tmp.glob(STAGE_PREFIX + "*")) == []


@pytest.mark.slow
@pytest.mark.parametrize("how", ["SIGTERM", "Ctrl-C"])
def test_stopped_run_exits_130_and_leaves_nothing(big_job: Path, tmp_path: Path, how: str) -> None:
    tmp = tmp_path / "tmp"
    before = warehouse_state(big_job.parent / "warehouse.duckdb")
    proc = _start_until_chunks(big_job, tmp, start_new_session=True)
    children = psutil.Process(proc.pid).children(recursive=True)
    started = time.monotonic()
    if how == "SIGTERM":
        proc.send_signal(signal.SIGTERM)
    else:  # a terminal sends Ctrl-C to the whole foreground process group
        os.killpg(proc.pid, signal.SIGINT)
    _, err = proc.communicate(timeout=30)
    assert time.monotonic() - started < 15
    assert proc.returncode == 130, err
    assert err == "arflow: error: interrupted; nothing was published by this run\n"
    _, alive = psutil.wait_procs(children, timeout=5)
    assert alive == []
    assert list(tmp.glob(STAGE_PREFIX + "*")) == []
    assert warehouse_state(big_job.parent / "warehouse.duckdb") == before


def test_failed_run_leaves_no_stage(tmp_path: Path, monkeypatch, capsys) -> None:
    from arflow.cli import main

    monkeypatch.setenv("TMPDIR", str(tmp_path / "tmp"))
    (tmp_path / "tmp").mkdir()
    monkeypatch.setattr("tempfile.tempdir", None)  # re-read TMPDIR
    write_table(tmp_path / "warehouse.duckdb", mixed_panel())
    job = tmp_path / "job.toml"
    job.write_text(job_toml(default_job()), encoding="utf-8")
    monkeypatch.setenv("ARFLOW_TEST_FAIL_AFTER", "forecasts")
    assert main(["run", str(job)]) == 1
    monkeypatch.delenv("ARFLOW_TEST_FAIL_AFTER")
    assert main(["run", str(job)]) == 0
    capsys.readouterr()
    assert list((tmp_path / "tmp").glob(STAGE_PREFIX + "*")) == []


# -- the sweep removes only folders whose owner is certainly gone -------------

def _folder(root: Path, name: str, owner: str | None) -> Path:
    folder = root / (STAGE_PREFIX + name)
    (folder / "models").mkdir(parents=True)
    (folder / "models" / "000000.parquet").write_bytes(b"x")
    if owner is not None:
        (folder / "owner").write_text(owner, encoding="ascii")
    return folder


def test_sweep_keeps_live_and_unknown_owners_and_removes_dead_ones(tmp_path: Path) -> None:
    sleeper = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    try:
        gone = subprocess.Popen([sys.executable, "-c", "pass"])
        gone.wait()
        live_start = stage_module.process_start_time(sleeper.pid) or "-"
        live = _folder(tmp_path, "live", f"{sleeper.pid} {live_start}\n")
        mine = _folder(tmp_path, "mine", stage_module._owner_record())
        dead = _folder(tmp_path, "dead", f"{gone.pid} 123\n")
        unknown = _folder(tmp_path, "unknown", None)
        garbled = _folder(tmp_path, "garbled", "not a pid\n")
        other = tmp_path / "someone-elses-folder"
        other.mkdir()
        (other / "owner").write_text(f"{gone.pid} 1\n")
        foreign = _folder(tmp_path, "foreign", f"{gone.pid} 123 pid:[1]\n")  # another container's run
        reused = None
        if sys.platform.startswith("linux"):  # same pid, another process (start time differs): the owner is gone
            reused = _folder(tmp_path, "reused", f"{sleeper.pid} 1\n")
        removed = sweep_stale(tmp_path)
        assert live.is_dir() and mine.is_dir() and unknown.is_dir() and garbled.is_dir() and other.is_dir()
        assert foreign.is_dir() or stage_module._pid_namespace() == "pid:[1]"
        assert not dead.exists()
        assert set(removed) == {dead} | ({reused} if reused else set())
    finally:
        sleeper.kill()
        sleeper.wait()


def test_stage_records_its_owner_and_cleans_up(tmp_path: Path) -> None:
    stage = StagedRun(tmp_path)
    owner = (stage.dir / "owner").read_text(encoding="ascii").split()
    assert int(owner[0]) == os.getpid()
    assert sweep_stale(tmp_path) == [] and stage.dir.is_dir()  # a live run's folder is never touched
    stage.cleanup()
    assert not stage.dir.exists()


def _sigint_state() -> tuple[bool, bool]:
    """(SIGINT blocked, SIGINT ignored) in the calling process."""
    blocked = signal.SIGINT in signal.pthread_sigmask(signal.SIG_BLOCK, [])
    return blocked, signal.getsignal(signal.SIGINT) is signal.SIG_IGN


def test_workers_start_with_ctrl_c_held_until_they_ignore_it() -> None:
    """A Ctrl-C to the process group while a worker is still starting must not print its traceback:
    workers are launched with SIGINT blocked, and once bound to the parent they ignore it, unblocked.
    The launching thread's own mask is put back, so the parent still gets its Ctrl-C."""
    from concurrent.futures import ProcessPoolExecutor

    from arflow.runtime import bind_to_parent, worker_context

    before = signal.pthread_sigmask(signal.SIG_BLOCK, [])
    with ProcessPoolExecutor(max_workers=1, mp_context=worker_context()) as pool:
        assert pool.submit(_sigint_state).result(timeout=60) == (True, False)  # launched: held, not yet ignored
    assert signal.pthread_sigmask(signal.SIG_BLOCK, []) == before
    with ProcessPoolExecutor(max_workers=1, mp_context=worker_context(), initializer=bind_to_parent,
                             initargs=(os.getpid(),)) as pool:
        assert pool.submit(_sigint_state).result(timeout=60) == (False, True)  # bound: ignored, unblocked
