"""`arflow run` with the job file's defaults against the SQL AR(1) shortcut, side by side in one run.

    python bench/job_speed.py                         # 100,000 monthly series x 120, 3 repeats
    python bench/job_speed.py --series 20000 --repeat 2 --weekly 10000 --million 0   # quick look
    python bench/job_speed.py --million 1000000       # adds the 1,000,000-series run (defaults)

Data (seeded): a third each AR(1), seasonal AR at the seasonal lag and random
walks, one VARCHAR key, built into a DuckDB warehouse in a temporary folder.
Each timed task runs in a fresh subprocess; peak memory is the largest summed
resident memory of that subprocess and all its workers (sampled every 0.1 s).
Tasks, interleaved per repeat so machine noise hits all of them alike:

* ``sql``: the hand-written shortcut a warehouse user might write instead
  (AR(1) per series with ``lag()`` and ``regr_slope``/``regr_intercept``,
  one-step forecast, written to a table);
* ``defaults``: ``arflow run`` on a job file with only ``[job]``, ``[source]``
  and ``[publish]``: every other setting is the default (backtest on, workers =
  the CPUs available), publishing into a fresh DuckDB file;
* ``no-backtest``: the same with ``[backtest] enabled = false``.

Then, once each: weekly data (seasonal lag 52, 255 weeks) against the monthly
run, as cost per row (series x periods); and, with ``--million``, the defaults
on that many series for peak memory and time per series against the first size.
Prints the median and the spread (min-max) of each ratio across repeats, and
arflow's own phase profile of the median defaults run.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
from bench_warehouse import build_warehouse, run_shortcut  # noqa: E402  (shared with the other benchmarks)

JOB = """\
[job]
name = "speed_bench"

[source]
database = "{db}"
table = "readings"
keys = ["site"]
period = "period"
value = "value"
frequency = "{frequency}"

[publish]
database = "{out}"
{extra}"""


def task(kind: str, db: str, workdir: str, frequency: str) -> dict:
    """One timed task (runs in its own subprocess)."""
    t0 = time.perf_counter()
    extra: dict = {}
    if kind == "profile":
        return profile(db, workdir, frequency)
    if kind == "sql":
        extra = {"rows": run_shortcut(db)}
    else:
        from arflow.job import run_job
        from arflow.job_file import load_job

        out = Path(workdir) / f"published_{kind}.duckdb"
        out.unlink(missing_ok=True)  # a fresh target every time
        job = Path(workdir) / f"job_{kind}.toml"
        more = "\n[backtest]\nenabled = false\n" if kind == "no-backtest" else ""
        job.write_text(JOB.format(db=db, out=out, frequency=frequency, extra=more))
        outcome = run_job(load_job(job))
        extra = {"published": outcome.series_published, "series": outcome.series_total,
                 "phases": dict(getattr(outcome, "phase_seconds", {}) or {})}
    return {"seconds": time.perf_counter() - t0, "cpu": _cpu_seconds(), **extra}


def _cpu_seconds() -> float:
    """User + system CPU seconds of this process and its reaped children (the workers)."""
    import resource

    own, kids = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    return own.ru_utime + own.ru_stime + kids.ru_utime + kids.ru_stime


#: (phase, module, attribute) wrapped by the profile; a missing one is skipped
PROFILE_POINTS = [
    ("read", "arflow.warehouse.duckdb_source", "DuckDBSource.chunks"),
    ("panel", "arflow.frames", "to_panel_inputs"),
    ("panel", "arflow.core.panel", "build_panel"),
    ("fit", "arflow.core.autoreg", "fit_ar"),
    ("roots", "arflow.core.autoreg", "max_root_modulus"),
    ("unit roots", "arflow.core.pipeline", "unit_root_decision"),
    ("unit roots", "arflow.core.unitroot", "kpss"),
    ("outliers", "arflow.core.outliers", "detect_and_treat"),
    ("diagnostics", "arflow.core.diagnostics", "residual_acf"),
    ("diagnostics", "arflow.core.pipeline", "residual_test"),
    ("forecast", "arflow.core.pipeline", "forecast_ar"),
    ("forecast", "arflow.core.pipeline", "_interval_terms"),
    ("model-choice intervals", "arflow.core.intervals", "candidate_interval"),
    ("backtest", "arflow.core.backtest", "rolling_origin"),
    ("gates", "arflow.core.gates", "decide"),
    ("result frames", "arflow.frames", "result_frames"),
    ("stage", "arflow.warehouse.stage", "RunStage.write_to"),  # before the seams refactor
    ("stage", "arflow.warehouse.stage", "StagedRun.write_to"),
    ("publish", "arflow.warehouse.duckdb_store", "DuckDBStore.publish"),  # before the seams refactor
    ("publish", "arflow.warehouse.duckdb_target", "DuckDBTarget.prepare"),
    ("publish", "arflow.warehouse.duckdb_target", "DuckDBPending.commit"),
]


def profile(db: str, workdir: str, frequency: str) -> dict:
    """Exclusive wall time per phase of one in-process run with one worker (a nested phase pauses its caller)."""
    import functools
    import importlib
    import inspect

    seconds: dict[str, float] = {}
    stack: list[list] = []  # [phase, started]

    def enter(phase: str) -> None:
        now = time.perf_counter()
        if stack:
            seconds[stack[-1][0]] = seconds.get(stack[-1][0], 0.0) + now - stack[-1][1]
        stack.append([phase, now])

    def leave() -> None:
        now = time.perf_counter()
        phase, t0 = stack.pop()
        seconds[phase] = seconds.get(phase, 0.0) + now - t0
        if stack:
            stack[-1][1] = now

    def wrap(phase: str, fn):
        if inspect.isgeneratorfunction(fn):
            @functools.wraps(fn)
            def gen(*a, **k):
                it = fn(*a, **k)
                while True:
                    enter(phase)
                    try:
                        item = next(it)
                    except StopIteration:
                        leave()
                        return
                    leave()
                    yield item
            return gen

        @functools.wraps(fn)
        def timed(*a, **k):
            enter(phase)
            try:
                return fn(*a, **k)
            finally:
                leave()
        return timed

    for phase, mod_name, attr in PROFILE_POINTS:
        try:
            owner = importlib.import_module(mod_name)
        except ImportError:
            continue
        *path, name = attr.split(".")
        for part in path:
            owner = getattr(owner, part, None)
        if owner is None or not hasattr(owner, name):
            continue
        wrapped = wrap(phase, getattr(owner, name))
        if isinstance(inspect.getattr_static(owner, name), staticmethod):
            wrapped = staticmethod(wrapped)
        setattr(owner, name, wrapped)
    from arflow.job import run_job
    from arflow.job_file import load_job

    out = Path(workdir) / "published_profile.duckdb"
    out.unlink(missing_ok=True)
    job = Path(workdir) / "job_profile.toml"
    job.write_text(JOB.format(db=db, out=out, frequency=frequency, extra="\n[run]\nworkers = 1\n"))
    t0 = time.perf_counter()
    run_job(load_job(job))
    total = time.perf_counter() - t0
    seconds["other (imports, checks, frames, glue)"] = total - sum(seconds.values())
    return {"seconds": total, "phases": seconds}


def _tree_rss(pid: int) -> int:
    import psutil

    try:
        p = psutil.Process(pid)
        procs = [p] + p.children(recursive=True)
    except psutil.NoSuchProcess:
        return 0
    total = 0
    for q in procs:
        try:
            total += q.memory_info().rss
        except psutil.NoSuchProcess:
            pass
    return total


def run_task(kind: str, db: Path, workdir: Path, frequency: str = "month") -> dict:
    cmd = [sys.executable, __file__, "--task", kind, "--db", str(db), "--workdir", str(workdir),
           "--frequency", frequency]
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=os.environ.copy())
    peak = 0
    done = threading.Event()

    def sample() -> None:
        nonlocal peak
        while not done.is_set():
            peak = max(peak, _tree_rss(proc.pid))
            done.wait(0.1)

    th = threading.Thread(target=sample, daemon=True)
    th.start()
    out, err = proc.communicate()
    done.set()
    th.join()
    if proc.returncode != 0:
        raise SystemExit(f"task {kind} failed:\n{err[-3000:]}")
    res = json.loads(out.strip().splitlines()[-1])
    res["peak_gib"] = peak / 2**30
    return res


def spread(values: list[float]) -> str:
    return f"{statistics.median(values):.2f} ({min(values):.2f}-{max(values):.2f})"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--series", type=int, default=100_000)
    ap.add_argument("--periods", type=int, default=120)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--weekly", type=int, default=30_000, help="weekly series (255 weeks); 0 skips")
    ap.add_argument("--million", type=int, default=0, help="series of the large defaults run; 0 skips")
    ap.add_argument("--profile", type=int, default=20_000,
                    help="series of a one-worker run timed phase by phase (the first ones of the warehouse); 0 skips")
    ap.add_argument("--task")
    ap.add_argument("--db")
    ap.add_argument("--workdir")
    ap.add_argument("--frequency", default="month")
    a = ap.parse_args()
    if a.task:
        print(json.dumps(task(a.task, a.db, a.workdir, a.frequency), default=str))
        return
    from arflow.machine import available_cpus

    G = a.series
    print(f"CPUs available to arflow: {available_cpus()}; load average before: {os.getloadavg()[0]:.1f}")
    with tempfile.TemporaryDirectory(prefix="arflow-job-speed-") as tmp:
        tmp = Path(tmp)
        db = tmp / "monthly.duckdb"
        t0 = time.perf_counter()
        build_warehouse(db, G, a.periods, 12)
        print(f"{G:,} monthly series x {a.periods} built in {time.perf_counter() - t0:.1f}s")
        runs: dict[str, list[dict]] = {"sql": [], "defaults": [], "no-backtest": []}
        for r in range(a.repeat):
            for kind in runs:
                runs[kind].append(run_task(kind, db, tmp))
            line = ", ".join(f"{k} {v[-1]['seconds']:.2f}s (cpu {v[-1]['cpu']:.1f}s)" for k, v in runs.items())
            print(f"  repeat {r + 1}: {line}")
        sec = {k: [x["seconds"] for x in v] for k, v in runs.items()}
        r_def = [d / s for d, s in zip(sec["defaults"], sec["sql"])]
        r_off = [d / s for d, s in zip(sec["no-backtest"], sec["sql"])]
        share = [(d - o) / d for d, o in zip(sec["defaults"], sec["no-backtest"])]
        print()
        print(f"| task | seconds, median (min-max) | / SQL shortcut, same repeat | peak memory | per series |")
        print(f"| --- | --- | --- | --- | --- |")
        print(f"| SQL AR(1) shortcut | {spread(sec['sql'])} | 1 | "
              f"{max(x['peak_gib'] for x in runs['sql']):.2f} GiB | {statistics.median(sec['sql']) / G * 1e6:.0f} us |")
        for kind, rat in (("defaults", r_def), ("no-backtest", r_off)):
            name = "arflow run, defaults (backtest on)" if kind == "defaults" else "arflow run, backtest off"
            print(f"| {name} | {spread(sec[kind])} | {spread(rat)}x | "
                  f"{max(x['peak_gib'] for x in runs[kind]):.2f} GiB | {statistics.median(sec[kind]) / G * 1e6:.0f} us |")
        cpu = {k: [x["cpu"] for x in v] for k, v in runs.items()}
        print(f"\nCPU seconds (all processes; less sensitive to other load than wall time): SQL {spread(cpu['sql'])}, "
              f"defaults {spread(cpu['defaults'])} = {spread([d / s for d, s in zip(cpu['defaults'], cpu['sql'])])}x, "
              f"backtest off {spread(cpu['no-backtest'])} = "
              f"{spread([d / s for d, s in zip(cpu['no-backtest'], cpu['sql'])])}x; backtest share of CPU "
              f"{spread([100 * (d - o) / d for d, o in zip(cpu['defaults'], cpu['no-backtest'])])} %")
        print(f"\nbacktest share of the defaults run (defaults - off) / defaults: {spread([100 * s for s in share])} %")
        med = sorted(runs["defaults"], key=lambda x: x["seconds"])[len(runs["defaults"]) // 2]
        if med.get("phases"):
            print("phases of the median defaults run: " + ", ".join(f"{k} {v:.2f}s" for k, v in med["phases"].items()))
        if a.profile:
            pdb = tmp / "profile.duckdb"
            build_warehouse(pdb, min(a.profile, G), a.periods, 12)
            prof = run_task("profile", pdb, tmp)
            n = min(a.profile, G)
            print(f"\nper-phase profile, {n:,} series on one worker (defaults otherwise): {prof['seconds']:.2f}s")
            print("| phase | seconds | share | us per series |")
            print("| --- | --- | --- | --- |")
            for k, v in sorted(prof["phases"].items(), key=lambda kv: -kv[1]):
                print(f"| {k} | {v:.2f} | {v / prof['seconds']:.0%} | {v / n * 1e6:.0f} |")
            pdb.unlink()
        if a.weekly:
            wdb = tmp / "weekly.duckdb"
            build_warehouse(wdb, a.weekly, 255, 52)
            wk = run_task("defaults", wdb, tmp, "week")
            mo = run_task("defaults", db, tmp)  # the monthly run again, next to it
            mrow = min(mo["seconds"], statistics.median(sec["defaults"])) / (G * a.periods)
            wrow = wk["seconds"] / (a.weekly * 255)
            wcpu, mcpu = wk["cpu"] / (a.weekly * 255), mo["cpu"] / (G * a.periods)
            print(f"\nweekly/monthly CPU per row: {wcpu / mcpu:.2f}x ({wcpu * 1e9:.0f} vs {mcpu * 1e9:.0f} ns)")
            print(f"weekly (lag 52): {a.weekly:,} x 255 in {wk['seconds']:.2f}s, {wrow * 1e9:.0f} ns per row; "
                  f"monthly {mrow * 1e9:.0f} ns per row (this run {mo['seconds']:.2f}s); weekly/monthly "
                  f"{wrow / mrow:.2f}x (also {wrow / (mo['seconds'] / (G * a.periods)):.2f}x against the run beside it)")
            if wk.get("phases"):
                print("  weekly phases: " + ", ".join(f"{k} {v:.2f}s" for k, v in wk["phases"].items()))
            wdb.unlink()
        if a.million:
            big = tmp / "big.duckdb"
            for f in tmp.glob("published_*.duckdb"):
                f.unlink()
            db.unlink()
            t0 = time.perf_counter()
            build_warehouse(big, a.million, a.periods, 12)
            print(f"\n{a.million:,} series built in {time.perf_counter() - t0:.1f}s")
            m = run_task("defaults", big, tmp)
            per = m["seconds"] / a.million
            base = statistics.median(sec["defaults"]) / G
            print(f"{a.million:,} x {a.periods}, defaults: {m['seconds']:.1f}s, peak {m['peak_gib']:.2f} GiB, "
                  f"{per * 1e6:.0f} us per series = {per / base:.2f}x the {G:,}-series figure")
            if m.get("phases"):
                print("  phases: " + ", ".join(f"{k} {v:.2f}s" for k, v in m["phases"].items()))
        print(f"\nload average after: {os.getloadavg()[0]:.1f} (2-core machine shared with other work: "
              f"only same-repeat ratios mean much)")


if __name__ == "__main__":
    main()
