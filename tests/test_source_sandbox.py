"""The source connection reads only what the job names: no other file, folder, network or extension.

Each refused query exits with one line and leaves the published target exactly
as it was (compared table by table with ``warehouse_state``).
"""

from __future__ import annotations

from pathlib import Path

import duckdb
import polars as pl
import pytest

from arflow.cli import main
from arflow.job_file import load_job
from arflow.sample.panels import default_job, job_toml, mixed_panel, warehouse_state, write_table
from arflow.warehouse.duckdb_source import DuckDBSource
from helpers import published_job, query_job

SECRET = "do-not-copy-this-line"


@pytest.fixture
def job(tmp_path: Path) -> Path:
    """A published vintage 2026-11, a secret file and another DuckDB file beside the warehouse."""
    write_table(tmp_path / "other.duckdb", mixed_panel(seed=3))
    (tmp_path / "secret.txt").write_text(SECRET + "\n", encoding="utf-8")
    mixed_panel(seed=5).write_parquet(tmp_path / "other.parquet")
    return published_job(tmp_path)


def _rows(fn: str) -> str:
    """A query shaped like the job's source (site, month, reading) whose sites come from ``fn``."""
    return f"SELECT CAST(x AS VARCHAR) AS site, DATE '2026-12-01' AS month, 1.0 AS reading FROM {fn} AS t(x)"


# (id, query built from the test folder): each tries to read outside the job's source inside one SELECT
READS_OUTSIDE = [
    ("read_text", lambda d: _rows(f"(SELECT content FROM read_text('{d / 'secret.txt'}'))")),
    ("read_text /etc", lambda d: _rows("(SELECT content FROM read_text('/etc/passwd'))")),
    ("read_blob", lambda d: _rows(f"(SELECT content FROM read_blob('{d / 'secret.txt'}'))")),
    ("read_csv", lambda d: _rows(f"(SELECT * FROM read_csv('{d / 'secret.txt'}', header = false))")),
    ("glob /root", lambda d: _rows("(SELECT file FROM glob('/root/*'))")),
    ("glob job folder", lambda d: _rows(f"(SELECT file FROM glob('{d}/*'))")),
    ("read_parquet https", lambda d: "SELECT * FROM read_parquet('https://example.invalid/readings.parquet')"),
    ("read_parquet other file", lambda d: f"SELECT site, month, reading FROM read_parquet('{d / 'other.parquet'}')"),
    ("file as table", lambda d: f"SELECT site, month, reading FROM '{d / 'other.parquet'}'"),
    ("in a filter", lambda d: "SELECT site, month, reading FROM readings "
                              f"WHERE (SELECT count(*) FROM read_text('{d / 'secret.txt'}')) >= 0"),
]


@pytest.mark.parametrize("make", [m for _, m in READS_OUTSIDE], ids=[i for i, _ in READS_OUTSIDE])
def test_query_reading_outside_the_source_is_refused(job: Path, capsys, make) -> None:
    before = warehouse_state(job.parent / "warehouse.duckdb")
    code = main(["run", str(query_job(job, make(job.parent)))])
    err = capsys.readouterr().err
    assert code == 3, err
    assert err.startswith("arflow: error: the source tried to reach something outside the job's source")
    assert err.count("\n") == 1 and SECRET not in err
    assert warehouse_state(job.parent / "warehouse.duckdb") == before


# statements that are not a SELECT never run: refused as a job-file error before the source is read
NOT_A_SELECT = [
    ("install", "INSTALL httpfs"),
    ("load", "LOAD httpfs"),
    ("attach", "ATTACH 'other.duckdb' AS other"),
    ("copy to", "COPY readings TO 'copied.csv'"),
    ("copy query to", "COPY (SELECT * FROM readings) TO 'copied.csv'"),
    ("export", "EXPORT DATABASE 'exported'"),
    ("set", "SET enable_external_access = true"),
    ("second statement", "SELECT site, month, reading FROM readings; COPY readings TO 'copied.csv'"),
]


@pytest.mark.parametrize("query", [q for _, q in NOT_A_SELECT], ids=[i for i, _ in NOT_A_SELECT])
def test_statement_that_is_not_a_select_is_refused(job: Path, capsys, query: str) -> None:
    before = warehouse_state(job.parent / "warehouse.duckdb")
    code = main(["run", str(query_job(job, query))])
    err = capsys.readouterr().err
    assert code == 2, err
    assert "exactly one SELECT statement" in err and err.count("\n") == 1
    assert warehouse_state(job.parent / "warehouse.duckdb") == before
    assert not (job.parent / "copied.csv").exists() and not (job.parent / "exported").exists()


@pytest.mark.parametrize("statement", [
    "INSTALL httpfs",
    "LOAD httpfs",
    "ATTACH '{d}/other.duckdb' AS other",
    "COPY readings TO '{d}/copied.csv'",
    "EXPORT DATABASE '{d}/exported'",
    "SELECT * FROM read_text('{d}/secret.txt')",
    "SELECT * FROM glob('{d}/*')",
    "SET enable_external_access = true",
    "SET lock_configuration = false",
    "RESET enable_external_access",
    "SET allowed_paths = ['{d}/secret.txt']",
    "SET autoload_known_extensions = true",
])
def test_source_connection_itself_is_locked(job: Path, statement: str) -> None:
    """Below the SELECT check, the connection refuses these on its own (DuckDB settings, locked)."""
    spec = load_job(job)
    with DuckDBSource(spec.source, "month") as source:
        with pytest.raises(duckdb.Error):
            source.con.execute(statement.format(d=job.parent)).fetchall()
        # the source itself still reads
        assert source.con.execute("SELECT count(*) FROM readings").fetchone()[0] > 0
    assert not (job.parent / "copied.csv").exists() and not (job.parent / "exported").exists()


def test_legitimate_query_still_runs(job: Path, capsys) -> None:
    code = main(["run", str(query_job(job, "SELECT site, month, reading FROM readings WHERE site <> 'flat'"))])
    assert code == 0, capsys.readouterr().err


def test_parquet_source_reads_exactly_its_files(tmp_path: Path, capsys) -> None:
    folder = tmp_path / "lake"
    folder.mkdir()
    panel = mixed_panel()
    panel.filter(pl.col("site") < "s04").write_parquet(folder / "part-1.parquet")
    panel.filter(pl.col("site") >= "s04").write_parquet(folder / "part-2.parquet")
    mixed_panel(seed=9).write_parquet(tmp_path / "elsewhere.parquet")
    sections = default_job()
    sections["source"].pop("table")
    sections["source"].pop("database")
    sections["source"]["parquet"] = str(folder / "part-*.parquet")
    sections["publish"]["database"] = "target.duckdb"
    path = tmp_path / "job.toml"
    path.write_text(job_toml(sections), encoding="utf-8")
    assert main(["run", str(path)]) == 0, capsys.readouterr().err
    capsys.readouterr()
    before = warehouse_state(tmp_path / "target.duckdb")

    # its own files, named one by one or through the view `source`, are readable
    sections["source"]["query"] = f"SELECT * FROM read_parquet('{folder / 'part-1.parquet'}') UNION ALL SELECT * FROM read_parquet('{folder / 'part-2.parquet'}')"
    path.write_text(job_toml(sections), encoding="utf-8")
    assert main(["run", str(path), "--dry-run"]) == 0, capsys.readouterr().err
    capsys.readouterr()
    # a Parquet file next to them that the job does not name is not, nor is a folder listing
    for query in (f"SELECT * FROM read_parquet('{tmp_path / 'elsewhere.parquet'}')",
                  f"SELECT * FROM read_parquet('{folder}/*.parquet')",
                  _rows(f"(SELECT file FROM glob('{folder}/*'))")):
        sections["source"]["query"] = query
        path.write_text(job_toml(sections), encoding="utf-8")
        code = main(["run", str(path)])
        err = capsys.readouterr().err
        assert code == 3 and "outside the job's source" in err and err.count("\n") == 1, err
    assert warehouse_state(tmp_path / "target.duckdb") == before


@pytest.mark.slow
def test_source_connection_still_spills_to_disk(job: Path, monkeypatch) -> None:
    """The sandbox leaves DuckDB's own temp folder usable: a grouping larger than memory still runs."""
    import arflow.warehouse.duckdb_source as duckdb_source

    query = "SELECT count(*) FROM (SELECT i % 2000000 AS k, list(i) AS l FROM range(20000000) t(i) GROUP BY k)"
    no_spill = duckdb.connect(":memory:", config={"memory_limit": "64MB", "temp_directory": ""})
    with pytest.raises(duckdb.OutOfMemoryException):  # the grouping does not fit in 64 MB ...
        no_spill.execute(query).fetchone()
    no_spill.close()
    monkeypatch.setattr(duckdb_source, "MEMORY_LIMIT", "64MB")
    spec = load_job(job)
    with DuckDBSource(spec.source, "month") as source:  # ... but spills from the locked source connection
        assert source.con.execute(query).fetchone()[0] == 2_000_000


def test_view_in_the_source_database_that_reads_a_file_is_refused(tmp_path: Path, capsys) -> None:
    mixed_panel().write_parquet(tmp_path / "outside.parquet")
    con = duckdb.connect(str(tmp_path / "warehouse.duckdb"))
    con.execute(f"CREATE VIEW readings AS SELECT * FROM read_parquet('{tmp_path / 'outside.parquet'}')")
    con.close()
    path = tmp_path / "job.toml"
    path.write_text(job_toml(default_job()), encoding="utf-8")
    code = main(["run", str(path)])
    err = capsys.readouterr().err
    assert code == 3 and "outside the job's source" in err and err.count("\n") == 1, err
    assert warehouse_state(tmp_path / "warehouse.duckdb") == {}
