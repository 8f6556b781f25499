"""The DuckDB connections arflow opens: quiet (no progress bar) and never left open when opening fails part-way.

DuckDB prints a progress bar on standard output (the file descriptor, not
``sys.stdout``) during statements that run longer than ``progress_bar_time``
(2 s by default; DuckDB's ``duckdb_settings()`` describes both settings), so
the checks use ``capfd`` and a progress bar due at once (``progress_bar_time =
0``, which also turns ``enable_progress_bar`` back on: arflow switches the
printing off as well), with a plain connection as the control that shows the
check can see one.
"""

from __future__ import annotations

from pathlib import Path

import duckdb
import pytest

import arflow.warehouse.duckdb_source as duckdb_source
from arflow.errors import SourceError
from arflow.job_file import SourceSpec
from arflow.sample.panels import mixed_panel, write_table
from arflow.warehouse.duckdb_source import DuckDBSource, open_duckdb
from arflow.warehouse.duckdb_target import open_target

#: a statement that runs for a fraction of a second on one core (long enough for a progress bar at progress_bar_time 0)
BUSY = "SELECT sum(hash(i)) FROM range(30000000) AS t(i)"


def _busy(con: duckdb.DuckDBPyConnection) -> None:
    con.execute("SET progress_bar_time = 0")
    con.execute(BUSY).fetchall()


def test_a_plain_connection_prints_a_progress_bar(capfd) -> None:
    """The control: DuckDB's default does print one (else the next test could not fail)."""
    con = duckdb.connect(":memory:")
    try:
        _busy(con)
    finally:
        con.close()
    out, err = capfd.readouterr()
    assert "%" in out + err


def test_arflow_connections_print_no_progress_bar(capfd, tmp_path: Path) -> None:
    con = open_duckdb(":memory:")
    try:
        _busy(con)
    finally:
        con.close()
    target = open_target(tmp_path / "target.duckdb")
    try:
        _busy(target)
    finally:
        target.close()
    assert capfd.readouterr() == ("", "")


def _spec(tmp_path: Path, **where: object) -> SourceSpec:
    return SourceSpec(keys=("site",), period="month", value="reading", **where)


@pytest.mark.parametrize("kind", ["database", "parquet"])
def test_source_connections_have_the_progress_bar_off(tmp_path: Path, kind: str) -> None:
    # the source locks its configuration, so the setting is read back rather than exercised with progress_bar_time 0
    if kind == "database":
        write_table(tmp_path / "src.duckdb", mixed_panel())
        spec = _spec(tmp_path, database=tmp_path / "src.duckdb", table=("readings",))
    else:
        mixed_panel().write_parquet(tmp_path / "src.parquet")
        spec = _spec(tmp_path, parquet=str(tmp_path / "src.parquet"))
    with DuckDBSource(spec, "month") as source:
        assert source.con.execute(
            "SELECT current_setting('enable_progress_bar'), current_setting('enable_progress_bar_print')"
        ).fetchall() == [(False, False)]


class _Recorder:
    """Wraps the source module's open and watch functions to see what opening left behind."""

    def __init__(self, monkeypatch: pytest.MonkeyPatch) -> None:
        self.opened: list[duckdb.DuckDBPyConnection] = []
        self.watched: set[int] = set()
        real_open, real_watch, real_unwatch = (duckdb_source.open_duckdb, duckdb_source.watch_connection,
                                               duckdb_source.unwatch_connection)

        def opening(*args, **kwargs):
            con = real_open(*args, **kwargs)
            self.opened.append(con)
            return con

        def watch(con) -> None:
            self.watched.add(id(con))
            real_watch(con)

        def unwatch(con) -> None:
            self.watched.discard(id(con))
            real_unwatch(con)

        monkeypatch.setattr(duckdb_source, "open_duckdb", opening)
        monkeypatch.setattr(duckdb_source, "watch_connection", watch)
        monkeypatch.setattr(duckdb_source, "unwatch_connection", unwatch)

    def assert_all_closed(self) -> None:
        assert self.opened and not self.watched
        for con in self.opened:
            with pytest.raises(duckdb.ConnectionException):
                con.execute("SELECT 1")


def test_source_closes_its_connection_when_opening_fails_after_the_connect(tmp_path: Path, monkeypatch) -> None:
    """A failure after the connection was opened and watched (here the source-open fault point) closes it."""
    write_table(tmp_path / "src.duckdb", mixed_panel())
    spec = _spec(tmp_path, database=tmp_path / "src.duckdb", table=("readings",))
    recorder = _Recorder(monkeypatch)
    monkeypatch.setenv("ARFLOW_TEST_FAIL_AFTER", "source-open")
    source = DuckDBSource(spec, "month")
    with pytest.raises(RuntimeError, match="source-open"):
        source.__enter__()
    recorder.assert_all_closed()
    # the file is free again: a read-write connection in this process is refused while a read-only one is open
    duckdb.connect(str(tmp_path / "src.duckdb")).close()
    monkeypatch.delenv("ARFLOW_TEST_FAIL_AFTER")
    with DuckDBSource(spec, "month") as again:
        assert again.check_rows() == mixed_panel().height


def test_source_closes_its_connection_when_the_parquet_files_do_not_read(tmp_path: Path, monkeypatch) -> None:
    (tmp_path / "broken.parquet").write_bytes(b"not a parquet file")
    recorder = _Recorder(monkeypatch)
    with pytest.raises(SourceError, match="cannot read parquet"):
        with DuckDBSource(_spec(tmp_path, parquet=str(tmp_path / "broken.parquet")), "month"):
            pass
    recorder.assert_all_closed()


def test_forecast_with_two_workers_prints_nothing(capfd) -> None:
    """The library call writes nothing to the caller's terminal (results come back as frames)."""
    import arflow

    run = arflow.forecast(mixed_panel(), keys=["site"], period="month", value="reading", workers=2)
    assert run.models.height > 0
    assert capfd.readouterr() == ("", "")


@pytest.mark.parametrize("command", [["explain", "site=s01"], ["report"]], ids=["explain", "report"])
def test_reading_commands_refuse_a_target_not_written_yet(tmp_path: Path, capsys, command: list[str]) -> None:
    """Both reading commands open the target through one function: the same one-line refusal, naming the command."""
    from arflow.cli import main
    from arflow.sample.panels import default_job
    from helpers import write_job

    sections = default_job()
    sections["publish"]["database"] = "target.duckdb"  # the source file exists, the target not yet
    job = write_job(tmp_path, sections)
    assert main([command[0], str(job), *command[1:]]) == 3
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "does not exist yet; run the job first (arflow run)" in err


@pytest.mark.parametrize("command", [["explain", "site=s01"], ["report"]], ids=["explain", "report"])
def test_reading_commands_refuse_a_target_the_job_has_not_written(tmp_path: Path, capsys, command: list[str]) -> None:
    """The target file exists (it is the source's) but holds no results yet: one line, exit 3, for both."""
    from arflow.cli import main
    from helpers import write_job

    job = write_job(tmp_path)
    assert main([command[0], str(job), *command[1:]]) == 3
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "holds no arflow results; run the job first" in err
