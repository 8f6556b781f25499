"""Property-based: any job file drawn from the documented ranges, over odd source data, never
crashes arflow (no exit 1, no traceback); an error is always one line with exit 2 or 3.

Keys are drawn from the ranges the settings document (and, in about a
quarter of the jobs, one key gets an odd value, which must be refused with exit 2); the source is one of a few small
tables with odd values (NaN, +-inf, NULL, +-1e308, duplicates, mid-month dates,
exact ramps, odd key text). Bounded: a fixed number of examples on a
ten-series warehouse, derandomised so CI runs the same cases every time.
"""

from __future__ import annotations

import datetime as dt
import io
import itertools
from dataclasses import fields
from pathlib import Path

import numpy as np
import polars as pl
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from arflow.cli import main
from arflow.settings import BacktestSettings, ForecastSettings, GateSettings, ModelSettings
from arflow.sample.panels import ar_panel, job_toml, write_table

N_PERIODS = 60


def _tables() -> dict[str, pl.DataFrame]:
    base = ar_panel(8, N_PERIODS, seed=7)
    i = np.arange(N_PERIODS, dtype=np.float64)
    months = base.filter(pl.col("site") == "s01")["month"]

    def one(site: str, values: np.ndarray) -> pl.DataFrame:
        return pl.DataFrame({"site": [site] * N_PERIODS, "month": months, "reading": values},
                            schema={"site": pl.String, "month": pl.Date, "reading": pl.Float64})

    odd = pl.concat([
        base.head(N_PERIODS * 4),
        one("ramp", 1000.0 + 5.0 * i),
        one("huge", np.where(i % 2 == 0, 1e308, -1e308)),
        one("holes", np.where(i % 7 == 3, np.nan, 50.0 + np.sin(i))),
        one("infs", np.where(i == 30, np.inf, 10.0 + np.cos(i))),
        one("tiny", 1e-300 * (1.0 + np.sin(i))),
    ])
    midmonth = base.with_columns(
        month=pl.when(pl.int_range(pl.len()) % 17 == 5).then(pl.col("month") + dt.timedelta(days=14)).otherwise(pl.col("month")))
    dups = pl.concat([base, base.head(30).with_columns(reading=pl.col("reading") * 2)])
    nulls = base.with_columns(reading=pl.when(pl.int_range(pl.len()) % 5 == 0).then(None).otherwise(pl.col("reading")))
    keys = base.with_columns(site=pl.col("site").replace({"s01": "", "s02": "ü'\"; --", "s03": "x" * 300}))
    short = base.filter(pl.col("month") >= months[-5])
    return {"clean": base, "odd": odd, "midmonth": midmonth, "dups": dups, "nulls": nulls, "keys": keys, "short": short}


@pytest.fixture(scope="module")
def warehouse(tmp_path_factory: pytest.TempPathFactory) -> Path:
    folder = tmp_path_factory.mktemp("fuzz")
    db = folder / "source.duckdb"
    for name, frame in _tables().items():
        write_table(db, frame, name)
    return db


#: Odd values for one key of a job now and then (they must be refused with exit 2, never crash).
ODD_VALUES = [-1, 0, 10**30, -0.0, float("inf"), float("nan"), "", "auto ", True, [1], {"a": 1}, "\u00ff\x1b[2J", [0.8] * 50]


def _probability() -> st.SearchStrategy:
    return st.floats(min_value=1e-6, max_value=1 - 1e-6, allow_nan=False)


model = st.fixed_dictionaries({}, optional={
    "order": st.one_of(st.just("auto"), st.integers(1, 60)),
    "max_order": st.integers(1, 60),
    "criterion": st.sampled_from(["aic", "bic", "hqic"]),
    "seasonal_lag": st.one_of(st.sampled_from(["auto", "off"]), st.integers(2, 400)),
    "seasonal_alpha": _probability(),
    "unit_root": st.sampled_from(["difference", "quarantine", "ignore"]),
    "unit_root_alpha": _probability(),
    "unit_root_bias": st.floats(min_value=1e-3, max_value=1000),
})
forecast = st.fixed_dictionaries({}, optional={
    "horizon": st.integers(1, 1000),
    "coverage": st.lists(_probability(), min_size=1, max_size=6),
})
gates = st.fixed_dictionaries({}, optional={
    "residual_test": st.sampled_from(["ljung-box", "breusch-godfrey", "lag-t"]),
    "residual_lags": st.integers(1, 200),
    "alpha": st.one_of(st.floats(min_value=1e-6, max_value=0.1), _probability()),
    "lag_correction": st.sampled_from(["holm", "none"]),
    "series_fdr": _probability(),
    "min_observations": st.one_of(st.integers(3, 40), st.integers(3, 10**6)),
    "require_stationary": st.booleans(),
    "allow_gaps": st.booleans(),
    "allow_duplicates": st.booleans(),
    "max_periods_behind": st.integers(0, 10**6),
    "lower_bound": st.floats(min_value=-1e300, max_value=0),
    "upper_bound": st.floats(min_value=1, max_value=1e300),
    "arch_test": st.booleans(),
    "arch_lags": st.integers(1, 60),
    "max_quarantine_share": st.floats(min_value=0, max_value=1),
})
backtest = st.fixed_dictionaries({}, optional={
    "enabled": st.booleans(),
    "origins": st.integers(1, 500),
    "horizon": st.integers(1, 1000),
    "naive_gate": st.sampled_from(["off", "warn", "enforce"]),
    "naive_tolerance": st.floats(min_value=0, max_value=9.99),
    "naive_steps": st.integers(1, 1000),
})
source = st.fixed_dictionaries({
    "table": st.sampled_from(sorted(_tables())),
    # the tables are monthly: other frequencies mostly quarantine or refuse, so month is drawn half the time
    "frequency": st.one_of(st.just("month"), st.sampled_from(["day", "week", "month", "quarter", "year", "step"])),
})
run = st.fixed_dictionaries({}, optional={
    # more than one worker only with chunks of 5+ series: at most two processes start per example
    "chunk_series": st.integers(5, 50_000),
    "workers": st.integers(1, 256),
})
publish = st.fixed_dictionaries({
    "schema": st.sampled_from(["fuzz", "FUZZ", "main", "x_1"]),
}, optional={"on_failure": st.sampled_from(["keep-previous", "withdraw"])})
jobs = st.fixed_dictionaries({
    "publish": publish,
    "model": model, "forecast": forecast, "gates": gates, "backtest": backtest, "source": source, "run": run,
    "dry_run": st.booleans(), "as_of": st.sampled_from([None, None, "2021-06-01", "2019-01", "1900-01-01", "42"]),
    # at most one key per job gets an odd value, in about a quarter of the jobs
    "odd": st.one_of(st.none(), st.none(), st.none(), st.tuples(
        st.sampled_from(["model", "forecast", "gates", "backtest", "run", "source", "publish", "job"]),
        st.sampled_from(ODD_VALUES), st.integers(0, 20))),
})

_counter = itertools.count()
KEYS = {"model": [f.name for f in fields(ModelSettings)], "forecast": [f.name for f in fields(ForecastSettings)],
        "gates": [f.name for f in fields(GateSettings)], "backtest": [f.name for f in fields(BacktestSettings)],
        "run": ("chunk_series", "workers"), "source": ("frequency", "keys", "period", "value", "table"),
        "publish": ("schema", "on_failure", "database"), "job": ("name",)}


def _toml(value: object) -> str:
    """A TOML value (inline tables, escaped control characters), so odd values stay valid TOML."""
    if isinstance(value, dict):
        return "{" + ", ".join(f"{k} = {_toml(v)}" for k, v in value.items()) + "}"
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml(v) for v in value) + "]"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return '"' + "".join(c if c.isprintable() and c not in '"\\' else f"\\u{ord(c):04x}" for c in value) + '"'
    if isinstance(value, float) and value != value:
        return "nan"
    if isinstance(value, float) and value in (float("inf"), float("-inf")):
        return "inf" if value > 0 else "-inf"
    return repr(value)


def _render(draw: dict, database: Path, target: Path) -> str:
    sections = {
        "job": {"name": "fuzz"},
        "source": {"database": str(database), "table": draw["source"]["table"], "keys": ["site"], "period": "month",
                   "value": "reading", "frequency": draw["source"]["frequency"]},
        "publish": {"database": str(target), **draw["publish"]},
    }
    for name in ("model", "forecast", "gates", "backtest", "run"):
        if draw[name]:
            sections[name] = dict(draw[name])
    if draw["odd"] is not None:
        section, value, pick = draw["odd"]
        keys = list(KEYS[section])
        sections.setdefault(section, {})[keys[pick % len(keys)]] = value
    return "\n".join(
        f"[{name}]\n" + "\n".join(f"{k} = {_toml(v)}" for k, v in body.items()) + "\n" for name, body in sections.items()
    )


@pytest.mark.slow
@settings(max_examples=25, deadline=None, derandomize=True, suppress_health_check=[HealthCheck.function_scoped_fixture,
                                                                                   HealthCheck.too_slow])
@given(draw=jobs)
def test_no_job_file_crashes_arflow(warehouse: Path, draw: dict) -> None:
    folder = warehouse.parent
    n = next(_counter)
    target = folder / f"target{n}.duckdb"
    try:
        text = _render(draw, warehouse, target)
    except Exception:  # a value TOML cannot hold (e.g. a dict inside a list): write it raw
        text = repr(draw)
    path = folder / f"job{n}.toml"
    path.write_text(text, encoding="utf-8")
    argv = ["run", str(path)] + (["--dry-run"] if draw["dry_run"] else [])
    if draw["as_of"]:
        argv += ["--as-of", draw["as_of"]]
    out, err = io.StringIO(), io.StringIO()
    code = main(argv, out=out, err=err)
    message = err.getvalue()
    assert code in (0, 2, 3, 4), (code, message, text)
    assert "Traceback" not in message and "internal error" not in message, (message, text)
    if code in (2, 3):
        assert message.startswith("arflow: error: ") and message.count("\n") == 1, message
