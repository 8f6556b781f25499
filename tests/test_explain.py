"""``arflow explain`` and the per-series status on the sample warehouse: the same numbers as the tables."""

from __future__ import annotations

import json
from pathlib import Path

import duckdb
import pytest

from arflow.cli import main
from arflow.explain import ar_roots


def _con(job: Path) -> duckdb.DuckDBPyConnection:
    return duckdb.connect(str(job.parent / "vellmar_water.duckdb"), read_only=True)


def _explain(job: Path, capsys, *args: str) -> dict:
    assert main(["explain", str(job), *args, "--log-format", "json"]) == 0
    lines = capsys.readouterr().out.strip().splitlines()
    assert len(lines) == 1  # one object
    event = json.loads(lines[0])
    assert event["event"] == "explain"
    return event


def test_quarantined_series_shows_its_failing_gate_with_the_tables_numbers(vintaged_demo: Path, capsys) -> None:
    con = _con(vintaged_demo)
    try:
        district, zone, stat, p, thr = con.execute(
            "SELECT g.district, g.zone, g.statistic, g.p_value, g.threshold FROM arflow.gates AS g "
            "JOIN arflow.runs AS r ON r.run_id = g.run_id "
            "WHERE r.as_of = (SELECT max(as_of) FROM arflow.runs) AND g.gate = 'residual_autocorrelation' "
            "AND NOT g.passed ORDER BY g.district, g.zone LIMIT 1").fetchone()
    finally:
        con.close()
    e = _explain(vintaged_demo, capsys, f"district={district}", f"zone={zone}")
    assert e["decision"] == "quarantined" and "residual_autocorrelation" in e["reasons"]
    gate = next(g for g in e["gates"] if g["gate"] == "residual_autocorrelation")
    # exactly the stored numbers (JSON floats round-trip exactly)
    assert (gate["statistic"], gate["p_value"], gate["threshold"]) == (stat, p, thr)
    assert gate["passed"] is False and gate["verdict"] == "failed: quarantined"
    assert e["gates"][0]["gate"] == "residual_autocorrelation"  # failed gates first
    assert e["forecast"] == []  # a quarantined run publishes no numbers for it
    assert e["model"]["terms"] and e["model"]["sigma"] > 0 and e["data"]["observations_fitted"] > 0
    # the text screen shows the same gate with its verdict, on one screen
    assert main(["explain", str(vintaged_demo), district, zone]) == 0
    text = capsys.readouterr().out
    line = next(x for x in text.splitlines() if "residual_autocorrelation" in x and "failed" in x)
    assert "failed: quarantined" in line and f"{p:.4g}"[:5] in line
    assert len(text.splitlines()) <= 45


def test_published_series_shows_its_forecast_rows_as_published_forecasts_has_them(vintaged_demo: Path, capsys) -> None:
    con = _con(vintaged_demo)
    try:
        district, zone = con.execute(
            "SELECT district, zone FROM arflow.published_forecasts WHERE NOT stale ORDER BY district, zone LIMIT 1"
        ).fetchone()
        cur = con.execute(
            "SELECT * EXCLUDE (run_id, job, as_of, stale, district, zone) FROM arflow.published_forecasts "
            "WHERE district = ? AND zone = ? ORDER BY step", [district, zone])
        cols = [d[0] for d in cur.description]
        expected = [dict(zip(cols, r)) for r in cur.fetchall()]
    finally:
        con.close()
    e = _explain(vintaged_demo, capsys, f"district={district}", f"zone={zone}")
    assert e["decision"] == "published" and e["reasons"] == []
    assert len(e["forecast"]) == len(expected) == 12
    for got, want in zip(e["forecast"], expected):
        assert got["period"] == want["period"].isoformat()
        assert {k: v for k, v in got.items() if k != "period"} == {k: v for k, v in want.items() if k != "period"}
    assert all(g["passed"] or g["verdict"] == "failed: warning only" for g in e["gates"])
    # the first vintage's forecasts were scored by the second run
    assert e["earlier_vintages"] and e["earlier_vintages"][0]["forecast_as_of"] == "2024-12-01"
    assert e["backtest"] and e["backtest"][0]["step"] == 1


def test_explain_an_earlier_vintage_and_user_errors(vintaged_demo: Path, capsys) -> None:
    e = _explain(vintaged_demo, capsys, "Amberlode", "AMB-018", "--as-of", "2024-12")
    assert e["as_of"] == "2024-12-01" and e["earlier_vintages"] == []
    for args, words in [(["district=Amberlode", "zone=NOPE"], "has no series district=Amberlode zone=NOPE"),
                        (["zone=AMB-018"], "missing key value(s) for district"),
                        (["colour=red", "zone=AMB-018"], "'colour' is not a key column"),
                        (["Amberlode", "AMB-018", "--as-of", "2019-01"], "matches 0 vintage(s)")]:
        assert main(["explain", str(vintaged_demo), *args]) == 2
        err = capsys.readouterr().err
        assert err.count("\n") == 1 and words in err and "Traceback" not in err


def test_ar_roots_are_the_companion_eigenvalues() -> None:
    # y_t = 0.5 y_(t-1) + 0.3 y_(t-2): roots of z^2 - 0.5 z - 0.3 (textbook companion form, checked with numpy)
    import numpy as np

    roots = ar_roots([1, 2], [0.5, 0.3])
    companion = np.array([[0.5, 0.3], [1.0, 0.0]])
    want = sorted(np.abs(np.linalg.eigvals(companion)), reverse=True)
    assert [r["modulus"] for r in roots] == pytest.approx(want)
    assert ar_roots([], []) == []


def test_latest_series_status_view_carries_decision_reasons_and_failed_gates(vintaged_demo: Path) -> None:
    con = _con(vintaged_demo)
    try:
        rows = con.execute("SELECT count(*), count(DISTINCT (district, zone)), min(as_of), max(as_of) "
                           "FROM arflow.latest_series_status").fetchone()
        assert rows[0] == rows[1] and str(rows[2]) == str(rows[3]) == "2025-12-01"
        # every failed gate row of the latest run is in the view with its numbers; reasons as in models
        diff = con.execute("""
            WITH v AS (SELECT district, zone, unnest(failed_gates, recursive := true) FROM arflow.latest_series_status),
                 g AS (SELECT g.district, g.zone, g.gate, g.statistic, g.p_value, g.threshold FROM arflow.gates AS g
                       JOIN arflow.latest_series_status AS s USING (run_id, district, zone) WHERE NOT g.passed)
            SELECT (SELECT count(*) FROM (SELECT * FROM v EXCEPT SELECT * FROM g)),
                   (SELECT count(*) FROM (SELECT * FROM g EXCEPT SELECT * FROM v)), (SELECT count(*) FROM g)""").fetchone()
        assert diff[0] == diff[1] == 0 and diff[2] > 40
        mism = con.execute("""SELECT count(*) FROM arflow.latest_series_status AS s JOIN arflow.models AS m
                              USING (run_id, district, zone) WHERE s.reasons IS DISTINCT FROM m.reasons
                              OR s.decision <> m.decision""").fetchone()[0]
        assert mism == 0
        # warnings only for series the check did not hold back
        bad = con.execute("""SELECT count(*) FROM arflow.latest_series_status
                             WHERE len(list_intersect(warnings, reasons)) > 0""").fetchone()[0]
        assert bad == 0
    finally:
        con.close()


def test_summary_and_finish_event_count_warnings(vintaged_demo: Path, capsys) -> None:
    assert main(["run", str(vintaged_demo), "--dry-run", "--log-format", "json"]) == 0
    finish = [json.loads(x) for x in capsys.readouterr().out.splitlines() if '"finish"' in x][0]
    assert finish["warning_counts"] and set(finish["warning_counts"]) <= {
        "order_candidates", "worse_than_naive", "interval_undercoverage"}
    assert main(["run", str(vintaged_demo), "--dry-run"]) == 0
    out = capsys.readouterr().out
    assert "(a series can have several reasons)" in out and "warnings (not held back)" in out
    for name, count in finish["warning_counts"].items():
        assert any(line.split()[:2] == [name, str(count)] for line in out.splitlines())
