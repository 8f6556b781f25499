"""PostgreSQL as source and target, end to end through ``arflow run`` against a real server.

The DuckDB path is the reference: the same job published to DuckDB and to
PostgreSQL must give the same decisions and numbers (relative 1e-9), and the
same sequence of runs must leave the same tables and views. Faults, kills and
concurrent runs must leave the published state exactly as it was.
"""

from __future__ import annotations

import datetime as dt
import json
import math
import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path
from typing import Any

import polars as pl
import pyarrow as pa
import pytest

import pg_server
from arflow.cli import main
from arflow.sample.panels import default_job, job_toml, mixed_panel, warehouse_state, write_table

ARFLOW = [sys.executable, "-m", "arflow"]
#: tables and views whose rows do not depend on the clock (runs/vintages/arflow_tables carry timestamps)
COMPARED = ("models", "gates", "residual_acf", "forecasts", "backtests", "series_status", "accuracy", "job_policy",
            "published_forecasts", "accuracy_by_horizon", "latest_series_status")


# -- helpers ------------------------------------------------------------------------------

def cli(capsys, *args: str) -> tuple[int, str, str]:
    code = main(list(args))
    out, err = capsys.readouterr()
    return code, out, err


def load_frame(pg: pg_server.ScratchDatabase, frame: pl.DataFrame, table: str = "readings") -> None:
    """(Re)create ``public.<table>`` from a frame, as the job role (it owns the test database)."""
    types = {pl.String: "text", pl.Date: "date", pl.Float64: "double precision", pl.Int64: "bigint", pl.Int32: "integer"}
    cols = ", ".join(f'"{n}" {types[t]}' for n, t in frame.schema.items())
    with pg.connect_as(autocommit=False) as con:
        pg_server.execute(con, f'DROP TABLE IF EXISTS public."{table}"')
        pg_server.execute(con, f'CREATE TABLE public."{table}" ({cols})')
        cur = con.cursor()
        cur.adbc_ingest(table, frame.to_arrow().cast(pa.schema([pa.field(n, _arrow(t)) for n, t in frame.schema.items()])),
                        mode="append", db_schema_name="public")
        cur.close()
        con.commit()


def _arrow(t: Any) -> pa.DataType:
    return {pl.String: pa.string(), pl.Date: pa.date32(), pl.Float64: pa.float64(), pl.Int64: pa.int64(),
            pl.Int32: pa.int32()}[t]


class Job:
    """A job file over ``mixed_panel``-like data, with the source and the target in DuckDB or PostgreSQL."""

    def __init__(self, tmp: Path, pg: pg_server.ScratchDatabase, frame: pl.DataFrame | None = None, *,
                 source: str = "pg", target: str = "pg", publish: dict[str, Any] | None = None, name: str = "meters") -> None:
        self.tmp, self.pg, self.source_kind, self.target_kind = tmp, pg, source, target
        self.frame = mixed_panel() if frame is None else frame
        self.sections = default_job(name=name)
        self.sections["publish"].update(publish or {})
        self.path = tmp / f"{name}-{source}-{target}.toml"
        self.target_url: str | None = None  # another URL for [publish] postgres (default: the test database)
        self.load(self.frame)

    def load(self, frame: pl.DataFrame) -> None:
        if self.source_kind == "pg":
            load_frame(self.pg, frame)
        else:
            write_table(self.tmp / "warehouse.duckdb", frame)
        self.write()

    def write(self) -> None:
        src = self.sections["source"]
        pub = self.sections["publish"]
        if self.source_kind == "pg":
            src.pop("database", None)
            src.update(postgres=self.pg.url(), table="public.readings")
        else:
            src.pop("postgres", None)
            src.update(database="warehouse.duckdb", table="readings")
        if self.target_kind == "pg":
            pub.pop("database", None)
            pub["postgres"] = self.target_url or self.pg.url()
        else:
            pub.pop("postgres", None)
            pub["database"] = "out.duckdb"
        self.path.write_text(job_toml(self.sections), encoding="utf-8")

    def state(self, schema: str = "arflow") -> dict[str, list[tuple[Any, ...]]]:
        if self.target_kind == "pg":
            return pg_state(self.pg, schema)
        return {k: _sorted(v) for k, v in warehouse_state(self.tmp / "out.duckdb", schema).items()}


def _sort_key(row: tuple[Any, ...]) -> tuple[str, str]:
    return (repr(tuple(v for v in row if not isinstance(v, float))), repr(row))


def _sorted(rows: list[tuple[Any, ...]]) -> list[tuple[Any, ...]]:
    return sorted((tuple(r) for r in rows), key=_sort_key)


def pg_state(pg: pg_server.ScratchDatabase, schema: str = "arflow") -> dict[str, list[tuple[Any, ...]]]:
    """Every row of every table and view of ``schema`` (sorted), read by a second session."""
    with pg.admin() as con:
        names = [r[0] for r in pg_server.fetch(
            con, "SELECT table_name FROM information_schema.tables WHERE table_schema = $1 ORDER BY 1", (schema,))]
        return {n: _sorted(_fetch_decoded(con, f'SELECT * FROM "{schema}"."{n}"')) for n in names}


def _fetch_decoded(con: Any, sql: str) -> list[tuple[Any, ...]]:
    """Rows as pg_server.fetch gives them, with jsonb columns (series_status.failed_gates) parsed as DuckDB lists them."""
    cur = con.cursor()
    try:
        cur.execute(sql)
        table = cur.fetch_arrow_table()
    finally:
        cur.close()
    cols = []
    for field, column in zip(table.schema, table.columns):
        values = column.to_pylist()
        if (field.metadata or {}).get(b"POSTGRESQL:type") == b"jsonb":
            values = [None if v is None else json.loads(v) for v in values]
        cols.append(values)
    return list(zip(*cols)) if cols else []


def assert_close(a: Any, b: Any, where: str = "") -> None:
    """Equal, with floats to 1e-9 relative (NaN equals NaN); lists and rows element by element."""
    if isinstance(a, float) or isinstance(b, float):
        assert isinstance(a, (int, float)) and isinstance(b, (int, float)), (where, a, b)
        if math.isnan(a) or math.isnan(b):
            assert math.isnan(a) and math.isnan(b), (where, a, b)
        else:
            assert math.isclose(a, b, rel_tol=1e-9, abs_tol=1e-300), (where, a, b)
    elif isinstance(a, (list, tuple)) and isinstance(b, (list, tuple)):
        assert len(a) == len(b), (where, len(a), len(b))
        for i, (x, y) in enumerate(zip(a, b)):
            assert_close(x, y, f"{where}[{i}]")
    else:
        assert a == b, (where, a, b)


def assert_same_results(pg_like: dict[str, list], duck: dict[str, list]) -> None:
    for table in COMPARED:
        assert table in pg_like and table in duck, table
        assert len(pg_like[table]) == len(duck[table]), table
        assert_close(pg_like[table], duck[table], table)


def start_paused(job: Job, after: str, tmp: Path, *args: str, env: dict[str, str] | None = None) -> subprocess.Popen[str]:
    """``arflow run`` in a subprocess that stops at the fault hook ``after`` (inside its transaction)."""
    environ = dict(os.environ, ARFLOW_TEST_PAUSE_AFTER=after, ARFLOW_TEST_RESUME_FILE=str(tmp / f"resume-{after}"))
    environ.update(env or {})
    proc = subprocess.Popen([*ARFLOW, "run", str(job.path), *args], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True, env=environ)
    assert proc.stderr is not None
    line = proc.stderr.readline()
    assert line == f"arflow-test: paused after {after}\n", line + proc.stderr.read()
    return proc


def resume(tmp: Path, after: str) -> None:
    (tmp / f"resume-{after}").write_text("go", encoding="ascii")


def run_cli(job: Job, *args: str, env: dict[str, str] | None = None, timeout: float = 180) -> subprocess.CompletedProcess[str]:
    return subprocess.run([*ARFLOW, "run", str(job.path), *args], capture_output=True, text=True,
                          env=dict(os.environ, **(env or {})), timeout=timeout)


# -- the sample warehouse: PostgreSQL gives the DuckDB path's numbers ------------------------------

def test_sample_warehouse_in_postgres_matches_the_duckdb_path(pg, tmp_path, capsys):
    from arflow.demo import prepare_demo
    from arflow.sample.postgres import load_sample_into_postgres, postgres_job_text
    from arflow.warehouse.postgres_connection import check_url

    duck_job = prepare_demo(tmp_path / "duck")
    assert cli(capsys, "run", str(duck_job))[0] == 0
    duck = {k: _sorted(v) for k, v in warehouse_state(tmp_path / "duck" / "vellmar_water.duckdb").items()}

    load_sample_into_postgres(check_url(pg.url(), "x"))
    pg_job = tmp_path / "pg.toml"
    pg_job.write_text(postgres_job_text(pg.url()), encoding="utf-8")
    code, out, err = cli(capsys, "run", str(pg_job))
    assert code == 0, err
    both = pg_state(pg)
    assert_same_results(both, duck)
    assert [r[7:12] for r in both["runs"]] == [r[7:12] for r in duck["runs"]]  # status, counts, share
    decisions = pg.fetch("SELECT decision, count(*) FROM arflow.models GROUP BY 1 ORDER BY 1")
    assert sum(n for _, n in decisions) == 303 and len(decisions) == 2

    # mixed kinds: DuckDB in -> PostgreSQL out (another schema), and PostgreSQL in -> DuckDB out
    mixed = (tmp_path / "duck" / "demo_job.toml").read_text(encoding="utf-8").replace(
        'schema = "arflow"', f'postgres = "{pg.url()}"\nschema = "from_duckdb"')
    (tmp_path / "duck" / "mixed.toml").write_text(mixed, encoding="utf-8")
    code, _, err = cli(capsys, "run", str(tmp_path / "duck" / "mixed.toml"))
    assert code == 0, err
    assert_same_results(pg_state(pg, "from_duckdb"), duck)

    back = postgres_job_text(pg.url()).replace(f'postgres = "{pg.url()}"\nschema', 'database = "out.duckdb"\nschema')
    (tmp_path / "back.toml").write_text(back, encoding="utf-8")
    code, _, err = cli(capsys, "run", str(tmp_path / "back.toml"))
    assert code == 0, err
    out_state = {k: _sorted(v) for k, v in warehouse_state(tmp_path / "out.duckdb").items()}
    assert_same_results(out_state, duck)


def test_reruns_are_idempotent_and_count_attempts(pg, tmp_path, capsys):
    job = Job(tmp_path, pg)
    assert cli(capsys, "run", str(job.path))[0] == 0
    first = job.state()
    code, out, err = cli(capsys, "run", str(job.path))
    assert code == 0, err
    second = job.state()
    for table in COMPARED:
        assert second[table] == first[table], table
    assert pg.fetch("SELECT run_id, attempt FROM arflow.runs") == [("meters@2026-12-01", 2)]
    assert pg.fetch("SELECT count(*) FROM arflow.vintages") == [(1,)]


@pytest.mark.parametrize("policy", ["keep-previous", "withdraw"])
def test_failure_policies_and_accuracy_match_duckdb(pg, tmp_path, capsys, policy):
    """The same sequence of runs on both targets: vintages, a quarantined series, a fix, accuracy tracking."""
    frame = mixed_panel()
    last = frame["month"].max()
    extra = frame.filter((pl.col("site") == "s01") & (pl.col("month") == last))
    broken = pl.concat([frame, extra])  # s01 has a duplicated last month: quarantined as of that month
    states = {}
    for kind in ("pg", "duckdb"):
        (tmp_path / kind).mkdir()
        job = Job(tmp_path / kind, pg, broken, source="duckdb", target=kind, publish={"on_failure": policy})
        assert cli(capsys, "run", str(job.path), "--as-of", "2026-06")[0] == 0
        assert cli(capsys, "run", str(job.path), "--as-of", "2026-11")[0] == 0
        assert cli(capsys, "run", str(job.path))[0] == 0
        states[kind] = job.state()
        if kind == "pg":
            s01 = pg.fetch("SELECT DISTINCT run_id, as_of, stale FROM arflow.published_forecasts WHERE site = 's01'")
            if policy == "keep-previous":
                assert s01 == [("meters@2026-11-01", dt.date(2026, 11, 1), True)]
            else:
                assert s01 == []
            assert pg.fetch("SELECT count(*) > 0, count(DISTINCT forecast_run_id) FROM arflow.accuracy") == [(True, 2)]
            # the fixed data re-run: s01 is current again
            job.load(frame)
            assert cli(capsys, "run", str(job.path))[0] == 0
            assert pg.fetch("SELECT DISTINCT run_id, stale FROM arflow.published_forecasts WHERE site = 's01'") == [
                ("meters@2026-12-01", False)]
            states["pg-fixed"] = job.state()
        else:
            job.load(frame)
            assert cli(capsys, "run", str(job.path))[0] == 0
            states["duckdb-fixed"] = job.state()
    assert_same_results(states["pg"], states["duckdb"])
    assert_same_results(states["pg-fixed"], states["duckdb-fixed"])


def test_hold_on_alarm_keeps_the_view(pg, tmp_path, capsys):
    job = Job(tmp_path, pg)
    assert cli(capsys, "run", str(job.path), "--as-of", "2026-11")[0] == 0
    view = pg_state(pg)["published_forecasts"]
    job.sections["gates"]["max_quarantine_share"] = 0.01
    job.write()
    code, out, err = cli(capsys, "run", str(job.path))
    assert code == 4, err
    assert pg_state(pg)["published_forecasts"] == view
    assert pg.fetch("SELECT status FROM arflow.runs WHERE as_of = '2026-12-01'") == [("held",)]


# -- concurrency --------------------------------------------------------------------------------------

def test_a_reader_sees_only_complete_runs(pg, tmp_path, capsys):
    job = Job(tmp_path, pg)
    assert cli(capsys, "run", str(job.path), "--as-of", "2026-10")[0] == 0
    old = pg_state(pg)["published_forecasts"]
    seen: list[list[tuple[Any, ...]]] = []
    stop = threading.Event()

    def read_loop() -> None:
        with pg.connect_as(pg_server.READER_ROLE) as con:
            while not stop.is_set():
                seen.append(_sorted(pg_server.fetch(con, "SELECT * FROM arflow.published_forecasts")))

    with pg.admin() as con:  # the dashboard role: read-only, on the views only (README: grants)
        for sql in (f"GRANT USAGE ON SCHEMA arflow TO {pg_server.READER_ROLE}",
                    f"GRANT SELECT ON arflow.published_forecasts, arflow.accuracy_by_horizon TO {pg_server.READER_ROLE}"):
            pg_server.execute(con, sql)
    proc = start_paused(job, "forecasts", tmp_path)
    reader = threading.Thread(target=read_loop)
    reader.start()
    try:
        deadline = time.monotonic() + 60
        while len(seen) < 3 and time.monotonic() < deadline:  # a few reads while the run holds its transaction open
            time.sleep(0.1)
        assert seen and all(s == old for s in seen)  # mid-transaction: the previous state
        resume(tmp_path, "forecasts")
        _, err = proc.communicate(timeout=120)
        assert proc.returncode == 0, err
        time.sleep(0.5)
    finally:
        stop.set()
        reader.join(timeout=30)
    new = pg_state(pg)["published_forecasts"]
    assert new != old
    assert all(s in (old, new) for s in seen)
    assert seen[-1] == new
    # the reader role cannot touch the tables
    with pg.connect_as(pg_server.READER_ROLE) as con, pytest.raises(Exception, match="permission denied"):
        pg_server.fetch(con, "SELECT * FROM arflow.forecasts")


def test_two_runs_at_once_do_not_interleave(pg, tmp_path, capsys):
    job = Job(tmp_path, pg)
    assert cli(capsys, "run", str(job.path))[0] == 0
    before = pg_state(pg)
    first = start_paused(job, "forecasts", tmp_path)  # holds the schema's advisory lock
    try:
        # a second run that may not wait fails at once, with the lock named
        job.sections["publish"]["lock_wait_seconds"] = 0
        job.write()
        quick = run_cli(job)
        assert quick.returncode == 3, quick.stderr
        assert "another arflow run is publishing to schema arflow" in quick.stderr
        assert quick.stderr.count("\n") == 1
        # a run that may wait does so, then publishes after the first one committed
        job.sections["publish"]["lock_wait_seconds"] = 60
        job.write()
        waiting = subprocess.Popen([*ARFLOW, "run", str(job.path)], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        time.sleep(2.0)
        assert waiting.poll() is None
        assert pg_state(pg) == before
        resume(tmp_path, "forecasts")
        _, err = first.communicate(timeout=120)
        assert first.returncode == 0, err
        _, err = waiting.communicate(timeout=120)
        assert waiting.returncode == 0, err
    finally:
        for p in (first,):
            if p.poll() is None:
                p.kill()
    after = pg_state(pg)
    assert pg.fetch("SELECT attempt FROM arflow.runs") == [(3,)]
    for table in COMPARED:
        assert after[table] == before[table], table


# -- kills and faults ---------------------------------------------------------------------------------

@pytest.mark.parametrize("after", ["models", "forecasts", "runs", "vintages"])
def test_sigkill_mid_publish_leaves_the_target_unchanged(pg, tmp_path, capsys, after):
    job = Job(tmp_path, pg)
    assert cli(capsys, "run", str(job.path), "--as-of", "2026-11")[0] == 0
    before = pg_state(pg)
    proc = start_paused(job, after, tmp_path)
    proc.send_signal(signal.SIGKILL)
    proc.communicate(timeout=30)
    assert proc.returncode == -signal.SIGKILL
    deadline = time.monotonic() + 30  # the server notices the dead client and rolls back
    while pg.fetch(f"SELECT count(*) FROM pg_stat_activity WHERE datname = '{pg.name}' AND application_name = 'arflow'") != [(0,)]:
        assert time.monotonic() < deadline
        time.sleep(0.1)
    assert pg_state(pg) == before
    assert cli(capsys, "run", str(job.path))[0] == 0  # and the target is healthy


def test_sigterm_mid_publish_rolls_back_and_exits_130(pg, tmp_path, capsys):
    job = Job(tmp_path, pg)
    assert cli(capsys, "run", str(job.path), "--as-of", "2026-11")[0] == 0
    before = pg_state(pg)
    proc = start_paused(job, "residual_acf", tmp_path)
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 130, err
    assert err.strip().endswith("interrupted; nothing was published by this run")
    assert pg_state(pg) == before


def test_terminated_backend_mid_publish_is_a_one_line_error(pg, tmp_path, capsys):
    job = Job(tmp_path, pg)
    assert cli(capsys, "run", str(job.path), "--as-of", "2026-11")[0] == 0
    before = pg_state(pg)
    proc = start_paused(job, "forecasts", tmp_path)
    killed = pg.fetch(f"SELECT pg_terminate_backend(pid) FROM pg_stat_activity WHERE datname = '{pg.name}' "
                      "AND application_name = 'arflow' AND state LIKE 'idle in transaction%'")
    assert killed == [(True,)]
    resume(tmp_path, "forecasts")
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 3, err
    assert err.count("\n") == 1 and "connection to" in err and "was lost while publishing" in err
    assert pg_state(pg) == before


def test_statement_timeout_while_publishing(pg, tmp_path, capsys):
    job = Job(tmp_path, pg, publish={"statement_timeout_seconds": 0.5})
    assert cli(capsys, "run", str(job.path), "--as-of", "2026-11")[0] == 0
    before = pg_state(pg)
    with pg.admin() as holder:  # another session holds a lock the publish needs
        pg_server.execute(holder, "BEGIN")
        pg_server.execute(holder, "LOCK TABLE arflow.models IN ACCESS EXCLUSIVE MODE")
        code, _, err = cli(capsys, "run", str(job.path))
        pg_server.execute(holder, "ROLLBACK")
    assert code == 3, err
    assert "publish.statement_timeout_seconds = 0.5" in err and err.count("\n") == 1
    assert pg_state(pg) == before


def test_permission_denied_on_the_schema(pg, tmp_path, capsys):
    job = Job(tmp_path, pg)
    with pg.admin() as con:
        pg_server.execute(con, "CREATE SCHEMA arflow")  # owned by the administrator; the job role may not write it
    code, out, err = cli(capsys, "run", str(job.path))
    assert code == 3, err
    assert f"role {pg_server.JOB_ROLE} may not write schema arflow" in err and err.count("\n") == 1
    assert "nothing was computed" in err
    assert pg_state(pg) == {}


def test_a_role_that_may_not_create_the_schema(pg, tmp_path, capsys):
    job = Job(tmp_path, pg)
    with pg.admin() as con:
        pg_server.execute(con, f"GRANT CONNECT ON DATABASE {pg.name} TO {pg_server.OTHER_ROLE}")
        pg_server.execute(con, f"GRANT USAGE ON SCHEMA public TO {pg_server.OTHER_ROLE}")
        pg_server.execute(con, f"GRANT SELECT ON public.readings TO {pg_server.OTHER_ROLE}")
    job.target_url = pg.url(pg_server.OTHER_ROLE)
    job.write()
    code, _, err = cli(capsys, "run", str(job.path))
    assert code == 3, err
    assert f"role {pg_server.OTHER_ROLE} may not create schema arflow" in err


def test_schema_with_another_jobs_layout(pg, tmp_path, capsys):
    job = Job(tmp_path, pg)
    assert cli(capsys, "run", str(job.path))[0] == 0
    before = pg_state(pg)
    other = Job(tmp_path, pg, mixed_panel().rename({"site": "zone"}), name="zones")
    other.sections["source"]["keys"] = ["zone"]
    other.write()
    code, _, err = cli(capsys, "run", str(other.path))
    assert code == 3, err
    assert "holds results keyed by (site), this job's keys are (zone)" in err
    load_frame(pg, mixed_panel())
    assert pg_state(pg) == before


def test_a_schema_arflow_did_not_make_is_refused(pg, tmp_path, capsys):
    job = Job(tmp_path, pg)
    with pg.connect_as() as con:
        pg_server.execute(con, "CREATE SCHEMA arflow")
        pg_server.execute(con, "CREATE TABLE arflow.forecasts (id int)")
    code, _, err = cli(capsys, "run", str(job.path))
    assert code == 3, err
    assert "has a table forecasts that arflow did not create" in err


@pytest.mark.parametrize("what", ["unreachable", "credentials", "database"])
def test_connection_faults_before_any_work(pg, tmp_path, capsys, monkeypatch, what):
    job = Job(tmp_path, pg, source="duckdb")
    if what == "unreachable":
        job.target_url = f"postgresql://{pg_server.JOB_ROLE}@127.0.0.1:1/{pg.name}"
        text = "cannot reach the PostgreSQL server"
    elif what == "credentials":
        bad = tmp_path / "badpass"
        bad.write_text(f"*:*:*:{pg_server.JOB_ROLE}:not-the-password\n")
        bad.chmod(0o600)
        monkeypatch.setenv("PGPASSFILE", str(bad))
        text = "refused the login"
    else:
        job.target_url = pg.url(database="missing_db")
        text = "database missing_db does not exist"
    job.write()
    code, out, err = cli(capsys, "run", str(job.path))
    assert code == 3, err
    assert text in err and err.count("\n") == 1
    assert "not-the-password" not in err + out


def test_passwords_never_reach_messages_events_or_the_runs_table(pg, tmp_path, capsys, monkeypatch):
    job = Job(tmp_path, pg)
    monkeypatch.delenv("PGPASSFILE")
    secret = pg_server.ROLE_PASSWORD[pg_server.JOB_ROLE]
    monkeypatch.setenv("PGPASSWORD", secret)
    code, out, err = cli(capsys, "run", str(job.path), "--log-format", "json")
    assert code == 0, err
    assert secret not in out + err
    events = [json.loads(line) for line in out.splitlines()]
    assert events[0]["target"].startswith(f"postgresql://{pg_server.JOB_ROLE}@127.0.0.1:")
    rows = pg.fetch("SELECT source FROM arflow.runs")
    assert rows and secret not in repr(rows)
    # a password in the job file is refused, without echoing it
    job.path.write_text(job.path.read_text().replace(f"{pg_server.JOB_ROLE}@", f"{pg_server.JOB_ROLE}:{secret}@"))
    code, out, err = cli(capsys, "run", str(job.path))
    assert code == 2
    assert "contains a password" in err and secret not in err + out


def test_postgres_demo_command(pg, tmp_path, capsys):
    code, out, err = cli(capsys, "demo", "--dir", str(tmp_path), "--postgres", pg.url())
    assert code == 0, err
    assert pg.fetch("SELECT count(*) FROM water.monthly_demand") == [(35262,)]
    assert pg.fetch("SELECT count(DISTINCT zone) > 200 FROM arflow.published_forecasts") == [(True,)]
    assert (tmp_path / "demo_job_postgres.toml").is_file()
    # the HTML report reads DuckDB targets: the PostgreSQL demo says so instead of reporting on another file
    assert "not written: arflow report reads a DuckDB target" in out and not (tmp_path / "vellmar_report.html").exists()
    assert pg.fetch("SELECT count(*) FROM arflow.latest_series_status") == [(303,)]
    code, out, err = cli(capsys, "explain", str(tmp_path / "demo_job_postgres.toml"), "zone=any")
    assert code == 2 and len(err.strip().splitlines()) == 1 and "publishes to PostgreSQL" in err, err


def test_old_column_names_are_renamed_in_place(pg, tmp_path, capsys):
    """A schema written with the earlier names (backtests.horizon / coverage_NN, accuracy.run_id) is upgraded."""
    job = Job(tmp_path, pg)
    assert cli(capsys, "run", str(job.path), "--as-of", "2026-11")[0] == 0
    assert cli(capsys, "run", str(job.path))[0] == 0
    current = pg_state(pg)
    with pg.connect_as() as con:
        hit = [r[0] for r in pg_server.fetch(con, "SELECT column_name FROM information_schema.columns WHERE "
                                             "table_schema = 'arflow' AND table_name = 'backtests' AND column_name LIKE 'hit_rate_%'")]
        assert hit
        renames = [("backtests", "step", "horizon"), ("accuracy", "forecast_run_id", "run_id"),
                   *(("backtests", c, "coverage_" + c[len("hit_rate_"):]) for c in hit)]
        for table, new, old in renames:
            pg_server.execute(con, f'ALTER TABLE arflow.{table} RENAME COLUMN "{new}" TO "{old}"')
            pg_server.execute(con, f"UPDATE arflow.arflow_tables SET columns = array_replace(columns, '{new}', '{old}') "
                                   f"WHERE table_name = '{table}'")
    code, _, err = cli(capsys, "run", str(job.path))
    assert code == 0, err
    after = pg_state(pg)
    for table in COMPARED:
        assert after[table] == current[table], table
    marked = dict(pg.fetch("SELECT table_name, array_to_string(columns, ',') FROM arflow.arflow_tables"))
    assert "forecast_run_id" in marked["accuracy"].split(",") and "step" in marked["backtests"].split(",")


def test_vintages_and_retract_on_postgres(pg, tmp_path, capsys):
    job = Job(tmp_path, pg)
    assert cli(capsys, "run", str(job.path), "--as-of", "2026-11")[0] == 0
    before = pg_state(pg)
    assert cli(capsys, "run", str(job.path))[0] == 0
    code, out, err = cli(capsys, "vintages", str(job.path))
    assert code == 0, err
    assert "2026-11-01" in out and "2026-12-01" in out
    code, out, err = cli(capsys, "retract", str(job.path), "--as-of", "2026-12", "--yes")
    assert code == 0, err
    after = pg_state(pg)
    for table in ("models", "gates", "forecasts", "series_status", "published_forecasts", "runs", "vintages"):
        assert after[table] == before[table], table
    (removal,) = pg.fetch("SELECT job, as_of, run_id, rows_removed FROM arflow.vintage_removals")
    assert removal[:3] == ("meters", dt.date(2026, 12, 1), "meters@2026-12-01")
    assert json.loads(removal[3])["forecasts"] > 0
    code, _, err = cli(capsys, "retract", str(job.path), "--as-of", "2020-01", "--yes")
    assert code == 2 and "has no vintage 2020-01-01" in err


def test_validate_and_dry_run_write_nothing(pg, tmp_path, capsys):
    job = Job(tmp_path, pg)
    code, out, err = cli(capsys, "validate", str(job.path))
    assert code == 0, err
    assert "tables will be created" in out
    code, out, err = cli(capsys, "run", str(job.path), "--dry-run")
    assert code == 0, err
    assert pg.fetch("SELECT count(*) FROM pg_namespace WHERE nspname = 'arflow'") == [(0,)]
    assert cli(capsys, "run", str(job.path))[0] == 0
    before = pg_state(pg)
    code, out, err = cli(capsys, "validate", str(job.path))
    assert code == 0 and "tables exist" in out, err
    assert cli(capsys, "run", str(job.path), "--dry-run", "--as-of", "2026-01")[0] == 0
    assert pg_state(pg) == before


def test_missing_driver_is_one_line_naming_the_extra(tmp_path, capsys, monkeypatch):
    monkeypatch.setitem(sys.modules, "adbc_driver_postgresql.dbapi", None)
    monkeypatch.setitem(sys.modules, "adbc_driver_postgresql", None)
    job = tmp_path / "job.toml"
    sections = default_job()
    sections["source"].pop("database")
    sections["source"].update(postgres="postgresql://forecaster@127.0.0.1:1/warehouse", table="public.readings")
    job.write_text(job_toml(sections), encoding="utf-8")
    code, out, err = cli(capsys, "run", str(job))
    assert code == 2
    assert err.count("\n") == 1 and "arflow-gated[postgres]" in err
