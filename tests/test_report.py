"""``arflow report``: a self-contained page, opened in a real headless Chromium (Debian's package), offline."""

from __future__ import annotations

import os
import re
import sys
from pathlib import Path

import duckdb
import pytest

from arflow.cli import main
from arflow.job_file import load_job
from arflow.report import ReportOptions, write_report
from arflow.report.browser import browser_paths, chart_census, load, offline_browser
from arflow.report.build import gate_in_words
from arflow.report.cautions import CAUTIONS

ROOT = Path(__file__).resolve().parents[1]


def _need_browser() -> None:
    if browser_paths() is None:
        if os.environ.get("CI"):
            pytest.fail("CI must have Chromium: .ci/run installs Debian's chromium and chromium-driver")
        pytest.skip("no Chromium here: apt-get install chromium chromium-driver")


@pytest.fixture(scope="module")
def report(vintaged_demo: Path, tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, object]:
    out = tmp_path_factory.mktemp("report") / "run.html"
    summary = write_report(load_job(vintaged_demo), out, options=ReportOptions(sample_published=5))
    return out, summary


def test_cautions_are_the_readme_section_word_for_word() -> None:
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    section = text[text.index("## What the gates guarantee and what they do not"):]
    section = section[: section.index("\n## ", 5)]
    bullets = tuple(re.sub(r"\s+", " ", b).strip() for b in section.split("\n* ")[1:])
    assert bullets == CAUTIONS, "re-copy the README section into arflow/report/cautions.py"


def test_page_is_self_contained(report) -> None:
    path, summary = report
    page = path.read_text(encoding="utf-8")
    assert page.startswith("<!DOCTYPE html>")
    # no external script, style sheet, image or frame: nothing to fetch
    assert not re.search(r"<(script|link|img|iframe)[^>]+(src|href)\s*=", page, re.I)
    assert "cdn." not in page.split("<script>", 2)[0]
    assert summary.charts >= 2 + summary.charted_series
    for c in CAUTIONS[:3]:
        assert c.split("`")[0][:40] in page


def test_every_quarantined_series_and_the_sample_are_charted(report, vintaged_demo: Path) -> None:
    path, summary = report
    con = duckdb.connect(str(vintaged_demo.parent / "vellmar_water.duckdb"), read_only=True)
    try:
        (quarantined,) = con.execute("SELECT series_quarantined FROM arflow.runs ORDER BY as_of DESC LIMIT 1").fetchone()
    finally:
        con.close()
    assert summary.charted_series == quarantined + 5
    page = path.read_text(encoding="utf-8")
    assert page.count('<div class="series"') == quarantined + 5


def test_gate_in_words_names_numbers_and_action() -> None:
    text = gate_in_words("residual_autocorrelation", 31.5, 0.0021, 0.05)
    assert "residual_autocorrelation" in text and "31.5" in text and "0.0021" in text and "0.05" in text
    assert "What to do" in text
    assert "fails closed" in gate_in_words("unit_root", None, None, None)
    assert gate_in_words("beats_naive", 1.2, None, 1.05).startswith("worse_than_naive")  # old name translated


def test_missing_extra_is_one_line_naming_it(vintaged_demo: Path, monkeypatch, capsys) -> None:
    monkeypatch.setitem(sys.modules, "plotly.graph_objects", None)  # import fails as if plotly were missing
    assert main(["report", str(vintaged_demo), "-o", str(vintaged_demo.parent / "x.html")]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "arflow-gated[report]" in err and "Traceback" not in err
    assert not (vintaged_demo.parent / "x.html").exists()


def test_report_command_writes_the_default_path(vintaged_demo: Path, capsys) -> None:
    assert main(["report", str(vintaged_demo), "--sample", "0", "--as-of", "2024-12"]) == 0
    out = capsys.readouterr().out
    path = vintaged_demo.parent / "vellmar_demand_2024-12-01_report.html"
    assert path.is_file() and str(path) in out
    assert main(["report", str(vintaged_demo), "--sample", "-1"]) == 2


def test_report_opens_offline_in_chromium_without_errors_and_filters(report, vintaged_demo: Path) -> None:
    _need_browser()
    path, summary = report
    with offline_browser() as driver:
        load(driver, path)
        # the page came from the file and nothing else: no console errors (a blocked fetch would log one)
        errors = [e for e in driver.get_log("browser") if e["level"] == "SEVERE"]
        assert errors == []
        assert driver.execute_script("return navigator.onLine") is False  # the network really was off
        charts = chart_census(driver)
        assert len(charts) == summary.charts
        for c in charts:
            assert c["svgs"] >= 1, c
            assert c["bars"] + c["lines"] >= 1, c  # every chart drew its data
            assert c["xtitle"] and c["ytitle"] and c["title"], c  # axis labels everywhere
        titles = [c["title"] for c in charts]
        assert "Reasons for quarantine" in titles
        assert any(t.startswith("History and forecast") for t in titles)
        assert any(t.startswith("Interval hit rate") for t in titles)
        assert any(t.startswith("Backtest skill") for t in titles)
        fan = next(c for c in charts if c["title"] == "History and forecast")
        assert fan["fills"] >= 2  # the 80% and 95% bands
        # the series table filters by text and by decision, and sorts
        rows = lambda: driver.execute_script(  # noqa: E731
            "return Array.prototype.filter.call(document.querySelectorAll('#series-table tbody tr'),"
            "function(r){return r.style.display!=='none';}).length")
        con = duckdb.connect(str(vintaged_demo.parent / "vellmar_water.duckdb"), read_only=True)
        try:
            total, quarantined, gappy = con.execute(
                "SELECT count(*), count(*) FILTER (decision = 'quarantined'), "
                "count(*) FILTER (list_contains(reasons, 'data_gaps')) FROM arflow.latest_series_status").fetchone()
        finally:
            con.close()
        assert rows() == total
        box = driver.find_element("id", "series-filter")
        box.send_keys("data_gaps")
        assert rows() == gappy > 0
        box.clear()
        box.send_keys(" ")  # an input event with an empty filter
        assert rows() == total
        driver.execute_script("var s=document.getElementById('decision-filter');s.value='quarantined';"
                              "s.dispatchEvent(new Event('change'));")
        assert rows() == quarantined
        assert driver.find_element("id", "series-count").text == f"{quarantined} of {total} series shown"
        header = driver.find_element("xpath", "//table[@id='series-table']//th[text()='observations']")
        header.click()
        header.click()  # descending
        first = driver.execute_script(
            "var r=Array.prototype.filter.call(document.querySelectorAll('#series-table tbody tr'),"
            "function(r){return r.style.display!=='none';});return r.map(function(x){return +x.cells[5].getAttribute('data-v');});")
        assert first == sorted(first, reverse=True)
