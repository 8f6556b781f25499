"""Lakehouse output as Delta tables: equal to the DuckDB target, atomic re-runs, kills, readers, object stores, migration."""

from __future__ import annotations

import datetime as dt
import json
import os
import signal
import subprocess
import sys
from pathlib import Path
from urllib.parse import quote as url_quote

import duckdb
import polars as pl
import pytest

pytest.importorskip("deltalake")

from deltalake import DeltaTable  # noqa: E402

from arflow.cli import main  # noqa: E402
from arflow.errors import PublishError, SettingsError, SourceError  # noqa: E402
from arflow.demo import prepare_demo  # noqa: E402
from arflow.job import run_job  # noqa: E402
from arflow.job_file import load_job  # noqa: E402
from arflow.sample.panels import ar_panel, default_job, job_toml, mixed_panel, write_table  # noqa: E402
from arflow.warehouse import delta_target as lake  # noqa: E402
from arflow.warehouse import parquet_legacy  # noqa: E402
from helpers import write_job  # noqa: E402

SAMPLE_KEYS = ["district", "zone"]


def order(keys: list[str]) -> dict[str, list[str]]:
    """Sort columns per table (rows are unique under these)."""
    return {
        "runs": ["run_id"], "vintages": ["job", "as_of"], "job_policy": ["job"],
        "series_status": ["run_id", *keys], "models": ["run_id", *keys], "gates": ["run_id", *keys, "gate"],
        "residual_acf": ["run_id", *keys, "lag"], "forecasts": ["run_id", *keys, "step"],
        "backtests": ["run_id", *keys, "model", "step"], "accuracy": ["forecast_run_id", "recorded_by", *keys, "period"],
        "published_forecasts": ["job", *keys, "step"],
    }


def duck_table(db: Path, table: str) -> pl.DataFrame:
    con = duckdb.connect(str(db), read_only=True)
    try:
        return con.sql(f"SELECT * FROM arflow.{table}").pl()
    finally:
        con.close()


def assert_same_rows(want: pl.DataFrame, got: pl.DataFrame, by: list[str], what: str, skip: tuple[str, ...] = ()) -> None:
    """Same rows and values (columns by name; the lakehouse may hold extra all-null coverage columns)."""
    cols = [c for c in want.columns if c not in skip]
    assert set(cols) <= set(got.columns), (what, set(cols) - set(got.columns))
    assert got.height == want.height, (what, got.height, want.height)
    w = want.select(cols).sort(by, maintain_order=True)
    g = got.select(cols).sort(by, maintain_order=True)
    for col in cols:
        assert g[col].cast(w[col].dtype).equals(w[col], null_equal=True), (what, col)


def assert_lake_equals_duckdb(db: Path, root: Path, keys: list[str], skip: tuple[str, ...] = ()) -> None:
    for table, by in order(keys).items():
        want = duck_table(db, table)
        got = lake.read_table(root, table)
        assert_same_rows(want, got, by, table, skip if table in ("runs", "vintages") else ())


# ------------------------------------------------------------------------------------ the sample warehouse


@pytest.fixture(scope="module")
def sample(tmp_path_factory) -> Path:
    """The sample warehouse's job publishing to DuckDB and a lakehouse, two vintages (so accuracy has rows)."""
    d = tmp_path_factory.mktemp("lake_sample")
    job_path = prepare_demo(d)
    text = job_path.read_text(encoding="utf-8").replace("[publish]\n", '[publish]\nlakehouse = "lake"\n')
    job_path.write_text(text, encoding="utf-8")
    assert run_job(load_job(job_path), as_of="2025-06").series_total > 250
    assert run_job(load_job(job_path)).series_total > 250
    return d


def test_sample_warehouse_lakehouse_equals_duckdb_target(sample: Path) -> None:
    db, root = sample / "vellmar_water.duckdb", sample / "lake"
    assert_lake_equals_duckdb(db, root, SAMPLE_KEYS)
    assert lake.read_table(root, "accuracy").height > 0 and lake.read_table(root, "backtests").height > 0
    view = lake.published_forecasts(root)
    assert view.columns == duck_table(db, "published_forecasts").columns
    assert {"lower_80", "upper_95"} <= set(view.columns)
    # every table is a Delta table; run tables are partitioned by the run (accuracy by the run that scored)
    for table in lake.iter_tables():
        meta = DeltaTable(str(root / "arflow" / table)).metadata()
        assert list(meta.partition_columns) == ([lake.PARTITION[table]] if table in lake.PARTITION else []), table
    assert not (root / "arflow" / "_arflow" / "journal.json").exists()


def test_duckdb_and_polars_read_the_tables_with_their_own_readers(sample: Path) -> None:
    """No arflow code: polars' Delta reader and DuckDB over deltalake's Arrow dataset."""
    path = str(sample / "lake" / "arflow" / "published_forecasts")
    want = duck_table(sample / "vellmar_water.duckdb", "published_forecasts")
    by = ["job", *SAMPLE_KEYS, "step"]
    polars_rows = pl.read_delta(path)
    assert_same_rows(want, polars_rows, by, "polars read_delta")
    one = want.filter(pl.col("zone") == want["zone"][0])
    assert_same_rows(one, pl.scan_delta(path).filter(pl.col("zone") == want["zone"][0]).collect(), by, "polars scan_delta filter")
    dataset = DeltaTable(path).to_pyarrow_dataset()  # noqa: F841 - DuckDB finds it by name
    con = duckdb.connect()
    try:
        duck_rows = con.sql("SELECT * FROM dataset").pl()
        scored = con.execute("SELECT count(DISTINCT run_id) FROM dataset WHERE NOT stale").fetchone()[0]
    finally:
        con.close()
    assert_same_rows(want, duck_rows, by, "duckdb over the Delta table's Arrow dataset")
    assert scored >= 1
    # a run table read the same way: only the partitions of committed runs
    models = pl.read_delta(str(sample / "lake" / "arflow" / "models"))
    assert_same_rows(duck_table(sample / "vellmar_water.duckdb", "models"), models, ["run_id", *SAMPLE_KEYS], "models")


# ------------------------------------------------------------------------------------ small jobs


def make_job(tmp_path: Path, **publish: object) -> Path:
    sections = default_job()
    sections["publish"].update({"lakehouse": "lake", **publish})
    return write_job(tmp_path, sections)


@pytest.fixture
def job(tmp_path: Path, capsys) -> Path:
    """A job publishing to DuckDB and a lakehouse, with vintage 2026-11 committed in both."""
    path = make_job(tmp_path)
    assert main(["run", str(path), "--as-of", "2026-11"]) == 0
    capsys.readouterr()
    return path


def versions(root: Path) -> dict[str, int]:
    return {t: DeltaTable(str(root / "arflow" / t)).version() for t in lake.iter_tables()}


def test_rerun_of_a_vintage_replaces_it_in_one_commit_per_table(job: Path, capsys) -> None:
    root, db = job.parent / "lake", job.parent / "warehouse.duckdb"
    assert main(["run", str(job)]) == 0  # vintage 2026-12
    before = versions(root)
    dec = {t: lake.read_table(root, t).filter(pl.col(p) == "meters@2026-12-01") for t, p in lake.RUN_TABLES}
    assert main(["run", str(job), "--as-of", "2026-11"]) == 0  # re-run of the earlier vintage
    capsys.readouterr()
    after = versions(root)
    for table, _ in lake.RUN_TABLES:
        assert after[table] == before[table] + 1, table  # exactly one commit replaced the vintage's partition
        (last,) = DeltaTable(str(root / "arflow" / table)).history(limit=1)
        assert last["operation"] == "WRITE", table
    txns = {DeltaTable(str(root / "arflow" / t)).history(limit=1)[0]["arflow.txn"] for t, _ in lake.RUN_TABLES}
    assert len(txns) == 1  # one publication
    gate = lake.read_table(root, "commits").sort("committed_at")
    assert gate["commit_id"][-1] in txns and json.loads(gate["table_versions"][-1])["models"] == after["models"]
    # the other vintage's rows are untouched; the re-run vintage has attempt 2 and no duplicates
    for table, part in lake.RUN_TABLES:
        now = lake.read_table(root, table).filter(pl.col(part) == "meters@2026-12-01")
        assert now.sort(now.columns[:3]).equals(dec[table].sort(dec[table].columns[:3])), table
    runs = lake.committed_runs(root)
    assert runs.select("run_id", "attempt").rows() == [("meters@2026-11-01", 2), ("meters@2026-12-01", 1)]
    assert_lake_equals_duckdb(db, root, ["site"])


def test_rerun_keeps_vetted_forecasts_and_a_held_run_leaves_the_view(tmp_path: Path, capsys) -> None:
    """keep-previous and hold_on_alarm give the same rows as the DuckDB target."""
    path = make_job(tmp_path)
    db = tmp_path / "warehouse.duckdb"
    assert main(["run", str(path), "--as-of", "2026-12"]) == 0
    frame = mixed_panel().with_columns(
        reading=pl.when(pl.col("site") == "s01").then(pl.lit(50.0)).otherwise(pl.col("reading")))
    write_table(db, frame)
    assert main(["run", str(path), "--as-of", "2026-12"]) == 0  # s01 quarantined: attempt 1's forecast kept
    last = frame.get_column("month").max()
    write_table(db, pl.concat([frame, frame.filter(pl.col("month") == last).with_columns(pl.col("reading") * 1.5)]))
    assert main(["run", str(path), "--as-of", "2026-12"]) == 4  # held
    capsys.readouterr()
    assert_lake_equals_duckdb(db, tmp_path / "lake", ["site"])
    view = lake.published_forecasts(tmp_path / "lake")
    assert view.filter(pl.col("site") == "s01")["stale"].to_list() == [True] * 6
    assert lake.committed_runs(tmp_path / "lake")["status"].to_list() == ["held"]


# ------------------------------------------------------------------------------------ kills

#: (fault point, the run's commits that landed before it: "none", "some" detail tables, or "all")
KILL_POINTS = [
    ("lakehouse-prepare:models", "none"),       # files of some tables written, nothing committed (DuckDB not yet either)
    ("lakehouse:committing", "none"),          # journal says committing, no table committed yet
    ("lakehouse:models", "some"),              # two run tables committed
    ("lakehouse:runs", "some"),                # every run table and runs committed, the view not yet
    ("lakehouse:published_forecasts", "all"),  # everything but the gate row: rolled forward
    ("lakehouse:commits", "all"),              # the gate landed, the journal not yet removed
]


def lake_snapshot(root: Path) -> dict[str, list]:
    """What arflow's readers show of every table (run times and attempts left out)."""
    out = {}
    for table, by in order(["site"]).items():
        frame = lake.read_table(root, table)
        drop = [c for c in ("started_at", "finished_at", "duration_seconds", "published_at", "attempt") if c in frame.columns]
        out[table] = frame.drop(drop).sort(by, maintain_order=True).rows() if frame.height else []
    return out


def own_readers(root: Path) -> dict[str, pl.DataFrame]:
    """Every table read by polars' own Delta reader at its latest version (proves each one is readable)."""
    return {t: pl.read_delta(str(root / "arflow" / t)) for t in lake.iter_tables()}


def run_until_killed(job: Path, point: str) -> None:
    env = {**os.environ, "ARFLOW_TEST_PAUSE_AFTER": point, "ARFLOW_TEST_RESUME_FILE": str(job.parent / "never")}
    proc = subprocess.Popen([sys.executable, "-m", "arflow", "run", str(job)], stdout=subprocess.DEVNULL,
                            stderr=subprocess.PIPE, env=env, text=True)
    try:
        for line in proc.stderr:
            if f"paused after {point}" in line:
                break
        else:
            raise AssertionError(f"the run never reached {point} (exit {proc.wait()})")
        proc.send_signal(signal.SIGKILL)
    finally:
        proc.wait(timeout=60)
    assert proc.returncode == -signal.SIGKILL


@pytest.mark.parametrize("point,landed", KILL_POINTS, ids=[p for p, _ in KILL_POINTS])
def test_kill_during_publishing_leaves_every_table_readable_with_complete_runs(job: Path, capsys, point: str, landed: str) -> None:
    root, db = job.parent / "lake", job.parent / "warehouse.duckdb"
    before = lake_snapshot(root)
    view_before = pl.read_delta(str(root / "arflow" / "published_forecasts"))
    run_until_killed(job, point)
    assert (root / "arflow" / "_arflow" / "journal.json").exists()
    # every table is readable by the format's own reader
    tables = own_readers(root)
    runs_ids = set(tables["runs"]["run_id"])
    if landed != "all":
        # the table dashboards read, and the gate, still show the state before the run
        assert_same_rows(view_before, tables["published_forecasts"], ["job", "site", "step"], "published_forecasts")
        assert lake_snapshot(root) == before  # arflow's readers: only complete runs, at the gate's versions
        assert "meters@2026-12-01" not in set(lake.read_table(root, "runs")["run_id"])
    if landed == "none":
        for table, part in lake.RUN_TABLES:  # nothing of the killed run is visible to any reader
            assert "meters@2026-12-01" not in set(tables[table][part]), table
    else:
        # whatever a detail table shows of the killed run is complete: all its rows of one attempt
        models = tables["models"].filter(pl.col("run_id") == "meters@2026-12-01")
        assert models.height in (0, 10)
    if landed == "all":
        assert "meters@2026-12-01" in runs_ids
    # the next run settles the journal (rolls back or forward) and publishes; the result equals the DuckDB target
    assert main(["run", str(job)]) == 0
    capsys.readouterr()
    assert not (root / "arflow" / "_arflow" / "journal.json").exists()
    assert_lake_equals_duckdb(db, root, ["site"], skip=("attempt", "published_at", "started_at", "finished_at",
                                                        "duration_seconds"))
    expected_attempt = 2 if landed == "all" else 1
    assert lake.committed_runs(root).filter(pl.col("run_id") == "meters@2026-12-01")["attempt"].item() == expected_attempt
    # files of a rolled-back run are deleted; no table names a missing file
    for t in lake.iter_tables():
        for uri in DeltaTable(str(root / "arflow" / t)).file_uris():
            assert Path(uri.removeprefix("file://")).exists(), (t, uri)


@pytest.mark.parametrize("point", ["lakehouse-prepare:forecasts", "lakehouse:gates", "lakehouse:job_policy"])
def test_an_error_during_publishing_rolls_the_lakehouse_back_at_once(job: Path, capsys, monkeypatch, point: str) -> None:
    root = job.parent / "lake"
    before = lake_snapshot(root)
    latest = versions(root)
    monkeypatch.setenv("ARFLOW_TEST_FAIL_AFTER", point)
    assert main(["run", str(job)]) == 1
    assert "test fault injected" in capsys.readouterr().err
    assert lake_snapshot(root) == before
    assert not (root / "arflow" / "_arflow" / "journal.json").exists()
    # each table is back at the rows it had (a rolled-back table has a restore commit on top)
    for table, version in latest.items():
        now = DeltaTable(str(root / "arflow" / table))
        assert now.version() >= version
        old = DeltaTable(str(root / "arflow" / table), version=version).to_pyarrow_table()
        assert now.to_pyarrow_table().num_rows == old.num_rows, table


def test_a_live_writer_is_not_disturbed(job: Path, capsys) -> None:
    """A journal whose writer is alive on this host is not settled by another run: that run stops (exit 3)."""
    root = job.parent / "lake"
    env = {**os.environ, "ARFLOW_TEST_PAUSE_AFTER": "lakehouse:models", "ARFLOW_TEST_RESUME_FILE": str(job.parent / "go")}
    proc = subprocess.Popen([sys.executable, "-m", "arflow", "run", str(job)], stdout=subprocess.DEVNULL,
                            stderr=subprocess.PIPE, env=env, text=True)
    try:
        for line in proc.stderr:
            if "paused after lakehouse:models" in line:
                break
        assert main(["run", str(job), "--as-of", "2026-11"]) == 3
        err = capsys.readouterr().err
        assert "another arflow run" in err and "retry when it finishes" in err and len(err.strip().splitlines()) == 1
        (job.parent / "go").touch()
        proc.stderr.read()
        assert proc.wait(timeout=120) == 0
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert sorted(lake.committed_runs(root)["run_id"]) == ["meters@2026-11-01", "meters@2026-12-01"]


# ------------------------------------------------------------------------------------ errors, layout, extra


def test_lakehouse_only_job_and_layout_mismatch(tmp_path: Path, capsys) -> None:
    frame = ar_panel(4, 60, seed=3)
    frame.write_parquet(tmp_path / "readings.parquet")
    sections = default_job()
    del sections["source"]["database"], sections["source"]["table"]
    sections["source"]["parquet"] = "readings.parquet"
    sections["publish"]["lakehouse"] = "lake"
    path = tmp_path / "job.toml"
    path.write_text(job_toml(sections), encoding="utf-8")
    assert load_job(path).publish.database is None
    assert main(["validate", str(path)]) == 0
    assert "tables will be created" in capsys.readouterr().out
    assert main(["run", str(path)]) == 0
    assert "Delta tables" in capsys.readouterr().out
    assert lake.read_table(tmp_path / "lake", "models").height == 4
    assert not list(tmp_path.glob("*.duckdb"))
    renamed = frame.rename({"site": "meter"})
    renamed.write_parquet(tmp_path / "readings.parquet")
    sections["source"]["keys"] = ["meter"]
    path.write_text(job_toml(sections), encoding="utf-8")
    assert main(["run", str(path)]) == 3
    err = capsys.readouterr().err
    assert "keyed by (site)" in err and "[publish] schema" in err and len(err.strip().splitlines()) == 1
    with pytest.raises(PublishError, match=r"keyed by \(site\)"):
        run_job(load_job(path))


def test_missing_extra_is_one_line_naming_it(job: Path, capsys, monkeypatch) -> None:
    monkeypatch.setitem(sys.modules, "deltalake", None)  # as if the package were not installed
    assert main(["run", str(job)]) == 2
    err = capsys.readouterr().err
    assert err.strip() == ("arflow: error: [publish] lakehouse needs the lakehouse extra (the deltalake package), which "
                           "is not installed; install it with: pip install 'arflow-gated[lakehouse]'")


def test_missing_lakehouse_reader_errors(tmp_path: Path) -> None:
    with pytest.raises(SourceError, match=r"lakehouse folder .*nowhere.* does not exist; check the lakehouse path") as err:
        lake.read_table(tmp_path / "nowhere", "models")
    assert err.value.exit_code == 3 and "\n" not in str(err.value)
    (tmp_path / "empty" / "arflow").mkdir(parents=True)
    assert lake.read_table(tmp_path / "empty", "models").height == 0
    assert lake.published_forecasts(tmp_path / "empty").height == 0


def test_bad_lakehouse_options_are_one_line(tmp_path: Path) -> None:
    path = make_job(tmp_path)
    text = path.read_text(encoding="utf-8").replace('lakehouse = "lake"', 'lakehouse = "lake"\nlakehouse_options = 3')
    path.write_text(text, encoding="utf-8")
    with pytest.raises(SettingsError, match="publish.lakehouse_options must be a table of strings"):
        load_job(path)


# ------------------------------------------------------------------------------------ object store


@pytest.fixture(scope="module")
def s3_server():
    """A local S3-compatible server (moto, in its own process) with a bucket ``lake``; yields its endpoint.

    Its own process, not moto's in-process thread: some deltalake calls wait for the server while holding
    Python's interpreter lock, which a server thread in the same process then never gets.
    """
    pytest.importorskip("moto.server")
    import socket
    import time

    import boto3

    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        port = sock.getsockname()[1]
    server = subprocess.Popen([sys.executable, "-m", "moto.server", "-H", "127.0.0.1", "-p", str(port)],
                              stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    endpoint = f"http://127.0.0.1:{port}"
    client = boto3.client("s3", endpoint_url=endpoint, aws_access_key_id="test", aws_secret_access_key="test",
                          region_name="us-east-1")
    try:
        deadline = time.monotonic() + 60
        while True:
            try:
                client.create_bucket(Bucket="lake")
                break
            except Exception:  # noqa: BLE001 - not listening yet
                if time.monotonic() > deadline or server.poll() is not None:
                    raise
                time.sleep(0.2)
        yield endpoint
    finally:
        server.terminate()
        server.wait(timeout=30)


def test_object_store_lakehouse_through_storage_options(tmp_path: Path, s3_server: str, capsys, monkeypatch) -> None:
    # credentials from the environment (as the README recommends), endpoint and plain HTTP from the job file
    monkeypatch.setenv("AWS_ACCESS_KEY_ID", "test")
    monkeypatch.setenv("AWS_SECRET_ACCESS_KEY", "test")
    monkeypatch.setenv("AWS_REGION", "us-east-1")
    path = make_job(tmp_path)
    text = path.read_text(encoding="utf-8").replace(
        'lakehouse = "lake"',
        f'lakehouse = "s3://lake/forecasts"\nlakehouse_options = {{ AWS_ENDPOINT_URL = "{s3_server}", AWS_ALLOW_HTTP = "true" }}')
    path.write_text(text, encoding="utf-8")
    options = {"AWS_ENDPOINT_URL": s3_server, "AWS_ALLOW_HTTP": "true"}
    assert main(["run", str(path), "--as-of", "2026-11"]) == 0
    assert main(["run", str(path)]) == 0
    assert main(["run", str(path)]) == 0  # a re-run of the vintage
    capsys.readouterr()
    uri = "s3://lake/forecasts"
    db = tmp_path / "warehouse.duckdb"
    for table, by in order(["site"]).items():
        skip = ("attempt", "published_at") if table in ("runs", "vintages") else ()
        assert_same_rows(duck_table(db, table), lake.read_table(uri, table, options=options), by, table, skip)
    # polars reads the object store itself with the same options
    view = pl.read_delta(f"{uri}/arflow/published_forecasts", storage_options=options)
    assert_same_rows(duck_table(db, "published_forecasts"), view, ["job", "site", "step"], "polars on s3")
    assert main(["retract", str(path), "--as-of", "2026-12", "--yes"]) == 0
    capsys.readouterr()
    assert lake.committed_runs(uri, options=options)["run_id"].to_list() == ["meters@2026-11-01"]
    assert_same_rows(duck_table(db, "published_forecasts"), lake.published_forecasts(uri, options=options),
                     ["job", "site", "step"], "after retract")


# ------------------------------------------------------------------------------------ migration


def write_old_layout(db: Path, root: Path) -> None:
    """The marker-based layout of arflow 0.1, written from a DuckDB target's tables (what that version wrote)."""
    schema = root / "arflow"
    (schema / "_commits").mkdir(parents=True)
    (schema / "_layout.json").write_text(json.dumps({"keys": ["site"], "key_types": ["VARCHAR"], "period_type": "DATE"}))
    runs = duck_table(db, "runs")
    for run in runs.iter_rows(named=True):
        rid, attempt = run["run_id"], run["attempt"]
        entry = {}
        for table in ("series_status", "models", "gates", "residual_acf", "forecasts", "backtests", "runs"):
            rows = duck_table(db, table).filter(pl.col("run_id") == rid)
            rel = f"{table}/run={url_quote(rid, safe='@-_.')}/attempt={attempt}/part-00000.parquet"
            (schema / rel).parent.mkdir(parents=True)
            rows.write_parquet(schema / rel)
            entry[table] = {"files": [rel], "rows": rows.height}
        marker = {"format": 1, "run_id": rid, "job": run["job"], "as_of": run["as_of"].isoformat(), "attempt": attempt,
                  "committed_at": run["finished_at"].isoformat(), "status": run["status"], "tables": entry,
                  "frequency": run["frequency"], "stale_after_periods": None,
                  "counts": {"series_total": run["series_total"], "series_published": run["series_published"],
                             "series_quarantined": run["series_quarantined"]}}
        (schema / "_commits" / f"{url_quote(rid, safe='@-_.')}.json").write_text(json.dumps(marker))


def test_old_marker_layout_is_read_and_converted(tmp_path: Path, capsys) -> None:
    path = make_job(tmp_path)
    text = path.read_text(encoding="utf-8")
    path.write_text(text.replace('lakehouse = "lake"\n', ""), encoding="utf-8")
    for as_of in ("2026-11", "2026-12"):
        assert main(["run", str(path), "--as-of", as_of]) == 0
    db, root = tmp_path / "warehouse.duckdb", tmp_path / "lake"
    write_old_layout(db, root)
    path.write_text(text, encoding="utf-8")
    # arflow still reads the old layout through its markers
    want = duck_table(db, "published_forecasts")
    assert_same_rows(want, parquet_legacy.published_forecasts(root), ["job", "site", "step"], "legacy view")
    assert parquet_legacy.committed_runs(root)["as_of"].to_list() == ["2026-11-01", "2026-12-01"]
    # publishing refuses it with the conversion command
    assert main(["run", str(path)]) == 3
    err = capsys.readouterr().err
    assert "old Parquet-marker layout" in err and "arflow lakehouse-convert JOB.toml" in err and len(err.strip().splitlines()) == 1
    assert main(["lakehouse-convert", str(path)]) == 0
    out = capsys.readouterr().out
    assert "converted lakehouse" in out and "arflow.parquet-markers" in out
    assert (root / "arflow.parquet-markers" / "_commits").is_dir()
    assert_same_rows(want, lake.published_forecasts(root), ["job", "site", "step"], "converted view")
    for table in ("series_status", "models", "gates", "residual_acf", "forecasts", "backtests"):
        assert_same_rows(duck_table(db, table), lake.read_table(root, table), order(["site"])[table], table)
    assert [v.as_of for v in lake.lake_vintages(root, "arflow", "meters")] == [dt.date(2026, 11, 1), dt.date(2026, 12, 1)]
    # and the converted lakehouse takes the next run
    assert main(["run", str(path), "--as-of", "2026-12"]) == 0
    capsys.readouterr()
    assert_same_rows(duck_table(db, "published_forecasts"), lake.published_forecasts(root), ["job", "site", "step"], "after")
    assert main(["lakehouse-convert", str(path)]) == 3
    assert "does not hold the old Parquet-marker layout" in capsys.readouterr().err


@pytest.mark.parametrize("period", ["step", "timestamp"])
def test_step_and_timestamp_periods_with_integer_keys_equal_duckdb(tmp_path: Path, capsys, period: str) -> None:
    """BIGINT and TIMESTAMP periods, an INTEGER key: Delta types (long, timestamp_ntz, int) carry them exactly."""
    frame = ar_panel(5, 60, seed=7).with_columns(pl.col("site").str.extract(r"(\d+)").cast(pl.Int32).alias("site"))
    if period == "step":
        frame = frame.with_columns(pl.col("month").rank("dense").over("site").cast(pl.Int64).alias("month"))
    else:
        frame = frame.with_columns(pl.col("month").cast(pl.Datetime("us")))
    write_table(tmp_path / "warehouse.duckdb", frame)
    sections = default_job()
    sections["source"]["frequency"] = "step" if period == "step" else "month"
    sections["publish"]["lakehouse"] = "lake"
    path = tmp_path / "job.toml"
    path.write_text(job_toml(sections), encoding="utf-8")
    assert main(["run", str(path)]) == 0
    assert main(["run", str(path)]) == 0  # a re-run
    capsys.readouterr()
    assert_lake_equals_duckdb(tmp_path / "warehouse.duckdb", tmp_path / "lake", ["site"])
    as_of = pl.read_delta(str(tmp_path / "lake" / "arflow" / "runs"))["as_of"]
    assert as_of.dtype == (pl.Int64 if period == "step" else pl.Datetime("us"))


def test_unsigned_key_is_refused_with_the_cast_to_use(tmp_path: Path, capsys) -> None:
    frame = ar_panel(3, 60, seed=5).with_columns(pl.col("site").str.extract(r"(\d+)").cast(pl.UInt32).alias("site"))
    write_table(tmp_path / "warehouse.duckdb", frame)
    sections = default_job()
    sections["publish"]["lakehouse"] = "lake"
    path = tmp_path / "job.toml"
    path.write_text(job_toml(sections), encoding="utf-8")
    assert main(["run", str(path)]) == 2
    err = capsys.readouterr().err.strip()
    assert err == ("arflow: error: source.keys: column site is UINTEGER, which Delta tables cannot hold; cast it in a "
                   "[source] query (e.g. SELECT CAST(site AS BIGINT) AS site ...) to publish to a lakehouse")
    assert not (tmp_path / "lake" / "arflow" / "runs").exists()  # refused before any work
