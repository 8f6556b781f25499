"""One name per check: everything the code can emit as a gate, reason, flag or status word is in the README table."""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import polars as pl

import arflow
from arflow import vocabulary
from arflow.core import gates as core_gates
from arflow.core.panel import QUALITY_FLAG_NAMES
from arflow.settings import BacktestSettings, GateSettings, ModelSettings, Settings

ROOT = Path(__file__).resolve().parents[1]
README = (ROOT / "README.md").read_text(encoding="utf-8")


def _readme_table() -> str:
    start = README.index("<!-- checks table")
    start = README.index("\n", start) + 1
    return README[start: README.index("<!-- end of checks table -->")].strip()


def _documented() -> set[str]:
    """Names in the first column (checks) and second column (status words) of the README's tables."""
    names = set()
    for line in _readme_table().splitlines():
        cells = [c.strip() for c in line.strip().strip("|").split("|")]
        for cell in cells[:2]:
            names.update(re.findall(r"^`([^`]+)`$", cell))
    return names


def _emitted_by_source() -> dict[str, set[str]]:
    """Scan the emitting code: gate rows, reason codes and flag names as written in arflow/core."""
    src = (ROOT / "arflow" / "core" / "gates.py").read_text(encoding="utf-8")
    gates = set(re.findall(r'b\.add\(\s*"(\w+)"', src))
    gates |= set(re.findall(r'\(\s*"(\w+)",\s*\w+\)', src))  # the data checks' loop
    reasons = set(re.findall(r'reason="(\w+)"', src)) | set(re.findall(r'b\.flag\("(\w+)"', src))
    return {"gate": gates, "reason": reasons | set(core_gates.REASONS), "flag": set(QUALITY_FLAG_NAMES.values())}


def _emitted_at_run_time() -> dict[str, set[str]]:
    """Run the pipeline on series with many problems (every gate switched on) and collect what it wrote."""
    rng = np.random.default_rng(7)
    rows = []
    for s in range(8):
        n = 30 if s == 0 else 90
        y = np.cumsum(rng.normal(size=n)) if s == 1 else rng.normal(size=n) + 100
        periods = list(range(n))
        if s == 2:
            periods = periods[:40] + periods[42:] + [200, 201]  # gaps
            y = y[: len(periods)]
        if s == 3:
            periods = periods + [periods[-1]]  # duplicate
            y = np.append(y, y[-1] + 1)
        if s == 4:
            y = np.full(n, 5.0)  # constant
        if s == 5:
            y[10] = np.nan
        if s == 6:
            y[50] += 40  # outlier
        if s == 7:
            y = y + 5  # forecasts above the upper bound
        rows += [{"k": f"s{s}", "t": p, "v": float(v)} for p, v in zip(periods, y)]
    frame = pl.DataFrame(rows)
    settings = Settings(
        frequency="step",
        gates=GateSettings(arch_test=True, lower_bound=99.0, upper_bound=101.0, min_observations=40),
        model=ModelSettings(outliers="quarantine", unit_root="quarantine"),
        backtest=BacktestSettings(naive_gate="enforce", coverage_gate="enforce", origins=8),
    )
    run = arflow.forecast(frame, keys="k", period="t", value="v", settings=settings, as_of=210)
    return {
        "gate": set(run.gates["gate"].unique().to_list()),
        "reason": set(run.models["reasons"].explode().drop_nulls().to_list()),
        "flag": set(run.models["quality_flags"].explode().drop_nulls().to_list()),
        "status": set(run.models["decision"].unique().to_list()) | set(run.backtests["model"].unique().to_list()),
    }


def test_readme_table_is_the_vocabulary_table() -> None:
    assert _readme_table() == vocabulary.readme_table().strip(), "regenerate it: python -m arflow.vocabulary"


def test_core_and_vocabulary_agree_both_ways() -> None:
    scanned = _emitted_by_source()
    for kind in ("gate", "reason", "flag"):
        assert scanned[kind] == set(vocabulary.names(kind)), kind


def test_everything_the_code_emits_is_documented() -> None:
    documented = _documented()
    scanned = _emitted_by_source()
    ran = _emitted_at_run_time()
    for kind, names in (*scanned.items(), *ran.items()):
        missing = names - documented
        assert not missing, f"{kind} names missing from the README table: {sorted(missing)}"
    # the run above really exercised the checks (not an empty set that passes trivially)
    assert {"too_short", "data_gaps", "duplicate_periods", "constant_series", "non_finite_values",
            "forecast_below_lower_bound", "forecast_above_upper_bound"} <= ran["reason"]
    assert len(ran["gate"]) >= 12


def test_status_words_in_code_and_sql_are_documented() -> None:
    documented = _documented()
    words = set()
    job = (ROOT / "arflow" / "job.py").read_text(encoding="utf-8")
    (status,) = set(re.findall(r'"(\w+)" if held else \("(\w+)" if alarm else "(\w+)"\)', job))  # the run's status
    words |= set(status)
    frames = (ROOT / "arflow" / "frames.py").read_text(encoding="utf-8")
    words |= set(re.findall(r'np\.where\((?:out\.)?published, "(\w+)", "(\w+)"\)', frames)[0])
    words |= set(re.findall(r'np\.where\(res\.differenced, "(\w+)", "(\w+)"\)', frames)[0])
    words |= set(re.findall(r'\("(\w+)", bt\.\w+\)', frames))
    for sql in (ROOT / "sql").rglob("*.sql"):
        words |= set(re.findall(r"decision\s*(?:=|<>)\s*'(\w+)'", sql.read_text(encoding="utf-8")))
    assert {"ok", "alarm", "held", "published", "quarantined", "level", "difference", "ar", "naive",
            "seasonal_naive"} <= words
    assert words <= documented, sorted(words - documented)
    assert "stale" in documented  # the view's column: its one meaning


def test_old_names_translate() -> None:
    assert vocabulary.canonical("internal_gaps") == ("data_gaps",)
    assert vocabulary.canonical("stale_series") == ("ends_before_as_of",)
    assert vocabulary.check("beats_naive").name == "worse_than_naive"
    assert vocabulary.canonical("too_short") == ("too_short",)
    # no old name is still emitted
    emitted = set().union(*_emitted_by_source().values())
    assert not emitted & set(vocabulary.RENAMED)
