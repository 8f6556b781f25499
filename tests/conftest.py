"""Shared fixtures. PostgreSQL: a real server (tests/pg_server.py), never a stand-in."""

from __future__ import annotations

import os
import uuid
from collections.abc import Iterator
from pathlib import Path

import pytest

import pg_server


@pytest.fixture(scope="session")
def vintaged_demo(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The sample warehouse with two vintages of its job (2024-12 and the latest, 2025-12): the job file's path.

    The second run scores the first vintage's forecasts, so ``accuracy`` has rows.
    """
    from arflow.demo import prepare_demo
    from arflow.job import run_job
    from arflow.job_file import load_job

    job_path = prepare_demo(tmp_path_factory.mktemp("vintaged_demo"))
    spec = load_job(job_path)
    run_job(spec, as_of="2024-12")
    run_job(spec)
    return job_path


@pytest.fixture(scope="session")
def pg_cluster() -> Iterator[pg_server.PgServer]:
    """The PostgreSQL server of this test session (ARFLOW_TEST_PG_URL, else a throwaway cluster).

    Skips the PostgreSQL tests when neither is available, except under
    ARFLOW_REQUIRE_PG=1 (CI), where that is a failure.
    """
    try:
        import adbc_driver_postgresql.dbapi  # noqa: F401
    except ImportError:
        _unavailable("the postgres extra is not installed (python -m pip install -e '.[test]')")
    try:
        server = pg_server.server_from_environment()
    except pg_server.ServerUnavailable as exc:
        _unavailable(str(exc))
    try:
        with pg_server.admin(server) as con:
            pg_server.create_roles(con)
        yield server
    finally:
        server.stop()


def _unavailable(reason: str) -> None:
    if os.environ.get("ARFLOW_REQUIRE_PG") == "1":
        pytest.fail(f"PostgreSQL tests are required here (ARFLOW_REQUIRE_PG=1) but: {reason}", pytrace=False)
    pytest.skip(f"no PostgreSQL server for the tests: {reason} (set ARFLOW_TEST_PG_URL or install the server binaries)")


@pytest.fixture()
def pg(pg_cluster: pg_server.PgServer, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Iterator[pg_server.ScratchDatabase]:
    """A fresh database owned by the job role, with the job's password in a password file (PGPASSFILE)."""
    name = "arflow_t_" + uuid.uuid4().hex[:10]
    with pg_server.admin(pg_cluster) as con:
        pg_server.execute(con, f'CREATE DATABASE "{name}" OWNER {pg_server.JOB_ROLE}')
    passfile = tmp_path / "pgpass"
    passfile.write_text(pg_server.passfile_text(pg_cluster), encoding="ascii")
    passfile.chmod(0o600)
    for key in [k for k in os.environ if k.startswith("PG")]:
        monkeypatch.delenv(key)
    monkeypatch.setenv("PGPASSFILE", str(passfile))
    db = pg_server.ScratchDatabase(pg_cluster, name, passfile)
    try:
        yield db
    finally:
        with pg_server.admin(pg_cluster) as con:
            pg_server.execute(con, f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')
