"""Fail closed: a gate that cannot compute its statistic fails, and a degenerate interval is never published.

``gates.decide`` is checked with NaN / +-inf in every input a gate compares
(a NaN compared with a threshold is False either way round, so ``not (p < alpha)``
used to count it as a pass). End to end, series whose checks cannot be computed
(exact ramps and polynomials, a series alternating +-1e308, series that are
constant after differencing) are quarantined with the reason, and the
published rows of other series are unaffected.
"""

from __future__ import annotations

import datetime as dt
import io
from pathlib import Path

import duckdb
import numpy as np
import polars as pl
import pytest

from arflow.cli import main
from arflow.core import gates
from arflow.sample.panels import ar_panel, default_job, job_toml, write_table
from arflow.settings import GateSettings
from helpers import gate_inputs

G = 3  # series 0 and 2 are healthy, series 1 gets the bad input


def _inputs(**override: np.ndarray) -> gates.GateInputs:
    """``G`` healthy series with every optional gate on (ARCH, naive benchmark, interval width)."""
    ok = dict(arch_statistic=np.full(G, 2.0), arch_pvalue=np.full(G, 0.7), naive_statistic=np.full(G, 0.8),
              naive_threshold=1.05, interval_relative_width=np.full(G, 0.5))
    return gate_inputs(G, **{**ok, **override})


SETTINGS = GateSettings(arch_test=True, lower_bound=0.0, upper_bound=1000.0)


def _bad(value: float, name: str) -> np.ndarray:
    a = np.asarray(getattr(_inputs(), name), dtype=np.float64).copy()
    a[1] = value
    return a


# (gate row, input that goes bad)
GATE_INPUTS = [
    ("unit_root", "adf_statistic"),
    ("unit_root", "adf_pvalue"),
    ("not_stationary", "max_root_modulus"),
    ("residual_autocorrelation", "residual_statistic"),
    ("residual_autocorrelation", "residual_pvalue"),
    ("residual_arch", "arch_statistic"),
    ("residual_arch", "arch_pvalue"),
    ("degenerate_interval", "interval_relative_width"),
    ("forecast_below_lower_bound", "forecast_min"),
    ("forecast_above_upper_bound", "forecast_max"),
    ("worse_than_naive", "naive_statistic"),
]


@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf], ids=["nan", "inf", "-inf"])
@pytest.mark.parametrize("gate, field", GATE_INPUTS, ids=[f"{g}-{f}" for g, f in GATE_INPUTS])
@pytest.mark.parametrize("policy", ["difference", "quarantine"])
def test_non_finite_gate_input_fails_closed(gate: str, field: str, bad: float, policy: str) -> None:
    out = gates.decide(_inputs(**{field: _bad(bad, field)}), SETTINGS, policy, naive_mode="enforce")
    row = out.gates[gate]
    assert row.applies[1] and not row.passed[1]
    reasons = out.reason_lists()
    assert "check_not_computed" in reasons[1], reasons[1]
    assert out.published.tolist() == [True, False, True]
    assert reasons[0] == [] and reasons[2] == []


def test_healthy_inputs_pass_every_gate() -> None:
    out = gates.decide(_inputs(), SETTINGS, "quarantine", naive_mode="enforce")
    assert out.published.all()
    assert all(row.passed.all() for row in out.gates.values())
    assert not out.reasons.any()


def test_reason_codes_are_appended() -> None:
    # codes are stored by name, but their order is part of reports: new ones go last
    assert gates.REASONS[:14][-1] == "worse_than_naive"
    assert "check_not_computed" in gates.REASONS[14:] and "degenerate_interval" in gates.REASONS[14:]


def test_zero_width_interval_is_not_published() -> None:
    width = np.array([0.5, 0.0, 1e-12])
    out = gates.decide(_inputs(interval_relative_width=width), SETTINGS, "difference")
    assert out.published.tolist() == [True, False, False]
    assert out.reason_lists()[1] == ["degenerate_interval"]


def test_warn_mode_naive_gate_never_holds_back() -> None:
    out = gates.decide(_inputs(naive_statistic=_bad(np.nan, "naive_statistic")), SETTINGS, "difference", "warn")
    assert out.published.all()


def test_ignored_unit_root_policy_does_not_judge_adf() -> None:
    out = gates.decide(_inputs(adf_statistic=_bad(np.nan, "adf_statistic")), SETTINGS, "ignore")
    assert out.published.all()


# ---------------------------------------------------------------- end to end

N = 96
CALENDAR = pl.date_range(dt.date(2017, 1, 1), dt.date(2017, 1, 1) + dt.timedelta(days=31 * N), "1mo", eager=True)[:N]
I = np.arange(N, dtype=np.float64)
DEGENERATE = {
    "ramp": 1000.0 + 5.0 * I,
    "quadratic": 3.0 + 2.0 * I + 0.5 * I**2,
    "cubic": 1.0 + 0.01 * I**3,
    "alternating": np.where(I % 2 == 0, 1e308, -1e308),
    "step_ramp": np.cumsum(np.full(N, 2.0)),  # all equal after differencing
    "big_ramp": 1e12 + 3.0 * I,
}


def _warehouse(tmp_path: Path) -> Path:
    good = ar_panel(4, N, seed=5, start=dt.date(2017, 1, 1))
    bad = pl.concat([
        pl.DataFrame({"site": [name] * N, "month": CALENDAR, "reading": values},
                     schema={"site": pl.String, "month": pl.Date, "reading": pl.Float64})
        for name, values in DEGENERATE.items()
    ])
    db = tmp_path / "warehouse.duckdb"
    write_table(db, pl.concat([good, bad]))
    return db


@pytest.mark.parametrize("require_stationary", [True, False])
def test_degenerate_series_are_quarantined_with_a_reason(tmp_path: Path, require_stationary: bool) -> None:
    db = _warehouse(tmp_path)
    job = default_job()
    job["gates"].update(require_stationary=require_stationary, max_quarantine_share=1.0)
    path = tmp_path / "job.toml"
    path.write_text(job_toml(job), encoding="utf-8")
    out, err = io.StringIO(), io.StringIO()
    assert main(["run", str(path)], out=out, err=err) == 0, err.getvalue()
    con = duckdb.connect(str(db), read_only=True)
    try:
        rows = dict(con.execute("SELECT site, reasons FROM arflow.models WHERE decision = 'quarantined'").fetchall())
        published = {r[0] for r in con.execute("SELECT DISTINCT site FROM arflow.forecasts").fetchall()}
        passed_null = con.execute(
            "SELECT count(*) FROM arflow.gates WHERE passed AND gate <> 'worse_than_naive' "
            "AND (statistic IS NULL OR (p_value IS NULL AND gate LIKE 'residual%'))"
        ).fetchone()[0]
        narrow = con.execute(
            "SELECT count(*) FROM arflow.forecasts WHERE NOT (upper_80 > lower_80 AND upper_95 > lower_95) "
            "OR NOT isfinite(lower_95) OR NOT isfinite(upper_95)"
        ).fetchone()[0]
    finally:
        con.close()
    assert set(DEGENERATE) <= set(rows), rows
    for name in DEGENERATE:
        assert {"check_not_computed", "degenerate_interval"} & set(rows[name]), (name, rows[name])
    assert not set(DEGENERATE) & published
    assert {"s01", "s02", "s03", "s04"} <= published  # healthy series unaffected
    assert passed_null == 0  # no gate passes on a statistic it could not compute
    assert narrow == 0  # no zero-width or non-finite interval is published
