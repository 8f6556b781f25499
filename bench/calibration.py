"""Measured false-rejection and detection rates of the gates and policies (fixed seeds).

    python bench/calibration.py [--series 2000] [--length 120]
                                [--part all|gates|decisions|coverage|outliers|coverage-gate]

Prints tables: for each check, the data it was run on, what it should do, and
the measured rate. The README's "Measured rates" section quotes these numbers;
tests/test_calibration.py asserts the acceptance bounds on smaller samples.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from arflow.core.gates import REASONS
from arflow.sample.simulate import interval_coverage as shared_coverage, outlier_rates, random_walks
from arflow.sample.simulate import simulate_ar as simulate, to_panel as panel_of
from arflow.core.pipeline import run_core
from arflow.settings import BacktestSettings, GateSettings, ModelSettings, Settings


def rate(result, reason: str) -> float:
    return float(result.outcome.reasons[:, REASONS.index(reason)].mean())


def quarantined(result) -> float:
    return float((~result.outcome.published).mean())


#: the unit-root decision cases: (label, frequency, AR coefficients or "rw", length, target)
DECISION_CASES = [
    ("monthly 0.3 y(t-1) + 0.5 y(t-12)", "month", {1: 0.3, 12: 0.5}, 60, "diff <= 8%"),
    ("monthly 0.3 y(t-1) + 0.5 y(t-12)", "month", {1: 0.3, 12: 0.5}, 120, "diff <= 8%"),
    ("weekly 0.3 y(t-1) + 0.5 y(t-52)", "week", {1: 0.3, 52: 0.5}, 156, "diff <= 8%"),
    ("monthly AR(1), phi 0.5", "month", {1: 0.5}, 24, "diff <= 8%"),
    ("monthly AR(1), phi 0.5", "month", {1: 0.5}, 30, "diff <= 8%"),
    ("monthly AR(1), phi 0.9", "month", {1: 0.9}, 120, "(low power)"),
    ("monthly unit-root seasonal 0.5 / 0.5 at 1, 12", "month", {1: 0.5, 12: 0.5}, 120, "(see README)"),
    ("random walk, monthly", "month", "rw", 40, "(short)"),
    ("random walk, monthly", "month", "rw", 60, "diff >= 90%"),
    ("random walk, monthly", "month", "rw", 120, "diff >= 90%"),
    ("random walk, weekly", "week", "rw", 156, "diff >= 90%"),
    ("random walk, quarterly", "quarter", "rw", 60, "diff >= 90%"),
    ("random walk, daily", "day", "rw", 120, "diff >= 90%"),
]

#: residual-test cases with the seasonal lag beyond residual_lags: (label, freq, phi, length, model, gates, target)
RESIDUAL_CASES = [
    ("weekly {1, 52} model right, Ljung-Box", "week", {1: 0.3, 52: 0.5}, 1040, ModelSettings(unit_root="ignore"),
     GateSettings(), "5% +/- 2"),
    ("weekly {1, 52} model right, Breusch-Godfrey", "week", {1: 0.3, 52: 0.5}, 1040, ModelSettings(unit_root="ignore"),
     GateSettings(residual_test="breusch-godfrey"), "5% +/- 2"),
    ("weekly {1, 52} model right, lag-t Holm", "week", {1: 0.3, 52: 0.5}, 1040, ModelSettings(unit_root="ignore"),
     GateSettings(residual_test="lag-t"), "<= 5%"),
    ("weekly {1, 52} model right, Ljung-Box, 156 pts", "week", {1: 0.3, 52: 0.5}, 156, ModelSettings(unit_root="ignore"),
     GateSettings(), "5% +/- 2"),
    ("monthly {1, 12}, residual_lags 6, Ljung-Box", "month", {1: 0.3, 12: 0.5}, 240, ModelSettings(unit_root="ignore"),
     GateSettings(residual_lags=6), "5% +/- 2"),
    ("monthly {1, 12}, residual_lags 6, Breusch-Godfrey", "month", {1: 0.3, 12: 0.5}, 240,
     ModelSettings(unit_root="ignore"), GateSettings(residual_lags=6, residual_test="breusch-godfrey"), "5% +/- 2"),
    ("monthly {1, 12}, residual_lags 6, lag-t Holm", "month", {1: 0.3, 12: 0.5}, 240,
     ModelSettings(unit_root="ignore"), GateSettings(residual_lags=6, residual_test="lag-t"), "<= 5%"),
    ("monthly {1, 12}, residual_lags 6, LB, 120 pts", "month", {1: 0.3, 12: 0.5}, 120,
     ModelSettings(unit_root="ignore"), GateSettings(residual_lags=6), "5% +/- 2"),
    ("omitted lag 52 caught (AR(1) fitted), LB", "week", {1: 0.3, 52: 0.5}, 156,
     ModelSettings(order=1, seasonal_lag="off", unit_root="ignore"), GateSettings(), ">= 90%"),
    ("omitted lag 52 caught (AR(1) fitted), BG", "week", {1: 0.3, 52: 0.5}, 156,
     ModelSettings(order=1, seasonal_lag="off", unit_root="ignore"), GateSettings(residual_test="breusch-godfrey"),
     ">= 90%"),
    ("omitted lag 12 caught, residual_lags 6, LB", "month", {1: 0.3, 12: 0.5}, 120,
     ModelSettings(order=1, seasonal_lag="off", unit_root="ignore"), GateSettings(residual_lags=6), ">= 90%"),
]


def decision_table(G: int) -> list[tuple]:
    rows = []
    for i, (label, freq, phi, T, target) in enumerate(DECISION_CASES):
        Y = random_walks(G, T, 300 + i) if phi == "rw" else simulate(phi, G, T, 200 + i)
        r = run_core(panel_of(Y), Settings(frequency=freq))
        rows.append((f"{label}, n = {T}", target, float(r.differenced.mean()), quarantined(r),
                     rate(r, "residual_autocorrelation"), rate(r, "not_stationary")))
    return rows


def residual_table(G: int) -> list[tuple]:
    rows = []
    for i, (label, freq, phi, T, model, gates, target) in enumerate(RESIDUAL_CASES):
        Y = simulate(phi, G, T, 400 + i)
        r = run_core(panel_of(Y), Settings(frequency=freq, model=model, gates=gates))
        rows.append((f"{label}, n = {T}", target, rate(r, "residual_autocorrelation")))
    return rows


def gates_table(G: int, T: int) -> list[tuple]:
    half = G // 2
    ar12 = panel_of(np.vstack([simulate({1: 0.5}, half, T, 11), simulate({1: 0.5, 2: 0.3}, G - half, T, 12)]))
    seasonal = simulate({1: 0.2, 4: 0.5}, G, T, 21)
    walks = random_walks(G, T, 31)
    ar09 = simulate({1: 0.9}, G, T, 41)
    rows = []
    month = "month"
    for label, gates in [
        ("Ljung-Box, 12 lags (default)", GateSettings()),
        ("Breusch-Godfrey, 12 lags", GateSettings(residual_test="breusch-godfrey")),
        ("per-lag t, 12 lags, Holm", GateSettings(residual_test="lag-t")),
        ("per-lag t, 12 lags, uncorrected", GateSettings(residual_test="lag-t", lag_correction="none")),
    ]:
        r = run_core(ar12, Settings(frequency=month, gates=gates))
        rows.append((f"residual gate: {label}", "AR(1)/AR(2), null true", "about 5%", rate(r, "residual_autocorrelation")))
    r = run_core(ar12, Settings(frequency=month, model=ModelSettings(criterion="aic")))
    rows.append(("residual gate after AIC order selection", "AR(1)/AR(2), null true", "about 5%",
                 rate(r, "residual_autocorrelation")))
    r = run_core(panel_of(seasonal), Settings(frequency="quarter", model=ModelSettings(order=1, seasonal_lag="off", unit_root="ignore")))
    rows.append(("residual gate catches an omitted lag 4", "0.2 y(t-1) + 0.5 y(t-4), AR(1) fitted", ">= 90%",
                 rate(r, "residual_autocorrelation")))
    r = run_core(panel_of(seasonal), Settings(frequency="quarter"))
    j = list(r.fit.lags).index(4)
    rows.append(("seasonal candidate: published with lag 4", "same seasonal series, defaults", ">= 90%",
                 float((r.outcome.published & r.fit.lag_mask[:, j]).mean())))
    s = Settings(frequency="quarter")
    rows.append(("differenced", "random walks", ">= 90%", float(run_core(panel_of(walks), s).differenced.mean())))
    rows.append(("differenced", "stationary seasonal series above", "<= 8%",
                 float(run_core(panel_of(seasonal), s).differenced.mean())))
    rows.append(("differenced", "stationary AR(1), phi 0.9", "(low power)", float(run_core(panel_of(ar09), s).differenced.mean())))
    r = run_core(ar12, Settings(frequency=month))
    rows.append(("published overall", "AR(1)/AR(2), defaults", "about 95%", float(r.outcome.published.mean())))
    return rows


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--series", type=int, default=2000)
    ap.add_argument("--length", type=int, default=120)
    ap.add_argument("--part", choices=("all", "gates", "decisions", "coverage", "outliers", "coverage-gate"), default="all")
    a = ap.parse_args()
    G, T = a.series, a.length
    t0 = time.perf_counter()
    if a.part in ("all", "gates"):
        print(f"{G} series of length {T} per row (fixed seeds)")
        print(f"{'check':<48} {'data':<40} {'target':<12} {'measured':>8}")
        for check, data, target, value in gates_table(G, T):
            print(f"{check:<48} {data:<40} {target:<12} {value:>8.1%}")
    if a.part in ("all", "decisions"):
        print(f"\nunit-root decision, defaults (difference policy), {G} series per row; quarantined = any reason")
        print(f"{'data':<58} {'target':<12} {'diff':>7} {'quar':>7} {'resid':>7} {'nonstat':>7}")
        for data, target, d, q, ra, ns in decision_table(G):
            print(f"{data:<58} {target:<12} {d:>7.1%} {q:>7.1%} {ra:>7.1%} {ns:>7.1%}")
        print(f"\nresidual tests with the seasonal lag beyond residual_lags, {G} series per row, level 5%")
        print(f"{'case':<64} {'target':<10} {'rejected':>8}")
        for case, target, v in residual_table(G):
            print(f"{case:<64} {target:<10} {v:>8.1%}")
    if a.part in ("all", "coverage"):
        print_coverage(G)
    if a.part in ("all", "outliers"):
        print_outliers(G)
    if a.part in ("all", "coverage-gate"):
        print_coverage_gate(G)
    print(f"\n{time.perf_counter() - t0:.0f} s")



# ---- prediction-interval coverage and outlier detection (separate from the table above) -----------------


def interval_coverage(Y: np.ndarray, n: int, frequency: str = "month", steps=(1, 12), parameter_uncertainty: bool = True,
                      model: ModelSettings | None = None, selection_uncertainty: bool = True) -> dict:
    """Coverage of the published intervals (:func:`arflow.sample.simulate.interval_coverage`) with these settings."""
    from arflow.settings import ForecastSettings

    s = Settings(frequency=frequency, model=model or ModelSettings(),
                 forecast=ForecastSettings(horizon=max(steps), parameter_uncertainty=parameter_uncertainty,
                                           selection_uncertainty=selection_uncertainty),
                 backtest=BacktestSettings(enabled=False))
    return shared_coverage(Y, n, s, steps)


COVERAGE_CASES = [
    ("AR(1) 0.5", lambda G, T, seed: simulate({1: 0.5}, G, T, seed)),
    ("AR(2) 0.5, 0.3", lambda G, T, seed: simulate({1: 0.5, 2: 0.3}, G, T, seed)),
    ("AR(1) 0.9", lambda G, T, seed: simulate({1: 0.9}, G, T, seed)),
    ("random walk", lambda G, T, seed: random_walks(G, T, seed)),
]

#: seasonal shapes: (label, frequency, generator, lengths)
SEASONAL_COVERAGE_CASES = [
    ("monthly 0.3/0.5 at 1, 12", "month", lambda G, T, seed: simulate({1: 0.3, 12: 0.5}, G, T, seed), (60, 120)),
    ("weekly 0.3/0.5 at 1, 52", "week", lambda G, T, seed: simulate({1: 0.3, 52: 0.5}, G, T, seed), (156,)),
]

#: interval kinds: (label, parameter_uncertainty, selection_uncertainty)
INTERVAL_KINDS = [("plug-in", False, False), ("parameter", True, False), ("default", True, True)]


def coverage_table(G: int = 2000, lengths=(40, 60, 120), seed: int = 500) -> list[tuple]:
    """Rows (case, n, interval kind, {(level, step): coverage}): plug-in, parameter term only, default."""
    rows = []
    cases = [(label, "month", gen, lengths) for label, gen in COVERAGE_CASES] + SEASONAL_COVERAGE_CASES
    for k, (label, freq, gen, ns) in enumerate(cases):
        for j, n in enumerate(ns):
            Y = gen(G, n + 12, seed + 10 * k + j)
            for kind, pu, su in INTERVAL_KINDS:
                rows.append((label, n, kind, interval_coverage(Y, n, freq, parameter_uncertainty=pu,
                                                               selection_uncertainty=su)))
    return rows


def print_coverage(G: int = 2000) -> None:
    print(f"\nPrediction-interval coverage, {G} series per row (fit on n points with the defaults, score steps 1 and 12;"
          f" seeds 500 + 10 case + length index)")
    print(f"{'data':<26} {'n':>4} {'intervals':<10} {'80% h1':>7} {'80% h12':>8} {'95% h1':>7} {'95% h12':>8}")
    for label, n, method, c in coverage_table(G):
        print(f"{label:<26} {n:>4} {method:<10} {c[(0.8, 1)]:>7.1%} {c[(0.8, 12)]:>8.1%} {c[(0.95, 1)]:>7.1%} {c[(0.95, 12)]:>8.1%}",
              flush=True)


OUTLIER_CASES = [
    # label, frequency, generator(G, T, seed), length
    ("AR(1) 0.5", "month", lambda G, T, seed: simulate({1: 0.5}, G, T, seed), 120),
    ("AR(2) 0.5, 0.3", "month", lambda G, T, seed: simulate({1: 0.5, 2: 0.3}, G, T, seed), 120),
    ("white noise", "month", lambda G, T, seed: simulate({1: 0.0}, G, T, seed), 120),
    ("AR(1) 0.9", "month", lambda G, T, seed: simulate({1: 0.9}, G, T, seed), 120),
    ("monthly 0.3 y(t-1) + 0.5 y(t-12)", "month", lambda G, T, seed: simulate({1: 0.3, 12: 0.5}, G, T, seed), 120),
    ("weekly 0.3 y(t-1) + 0.5 y(t-52)", "week", lambda G, T, seed: simulate({1: 0.3, 52: 0.5}, G, T, seed), 156),
    ("random walk", "month", lambda G, T, seed: random_walks(G, T, seed), 120),
    ("AR(1) 0.5, short", "month", lambda G, T, seed: simulate({1: 0.5}, G, T, seed), 30),
    ("AR(1) 0.5, short", "month", lambda G, T, seed: simulate({1: 0.5}, G, T, seed), 45),
    ("AR(1) 0.5, short", "month", lambda G, T, seed: simulate({1: 0.5}, G, T, seed), 60),
]


def outlier_table(G: int = 2000, seed: int = 700) -> list[tuple]:
    rows = []
    for k, (label, freq, gen, T) in enumerate(OUTLIER_CASES):
        false, caught = outlier_rates(gen(G, T, seed + k), freq, seed=seed + 100 + k)
        rows.append((label, T, false, caught))
    return rows


def print_outliers(G: int = 2000) -> None:
    print(f"\nAdditive outliers (default policy), {G} series per row: false flags on clean series, one 8-SD outlier caught")
    print(f"{'data':<36} {'n':>4} {'false flag':>10} {'caught':>8}")
    for label, T, false, caught in outlier_table(G):
        print(f"{label:<36} {T:>4} {false:>10.1%} {caught:>8.1%}")


def coverage_gate_rate(Y: np.ndarray, frequency: str = "month", parameter_uncertainty: bool = True,
                       origins: int = 24) -> float:
    """Share of fitted series the interval_calibration gate fails (defaults: step 1, 5%, Bonferroni over levels)."""
    from arflow.settings import ForecastSettings

    s = Settings(frequency=frequency, forecast=ForecastSettings(parameter_uncertainty=parameter_uncertainty),
                 backtest=BacktestSettings(origins=origins, coverage_gate="enforce"))
    r = run_core(panel_of(Y), s)
    row = r.outcome.gates["interval_undercoverage"]
    return float((~row.passed[r.fit.fitted]).mean())


def print_coverage_gate(G: int = 2000) -> None:
    print(f"\ninterval_calibration gate (5%, step 1, 24 origins), {G} series of 120 per row: share failed")
    for label, gen in COVERAGE_CASES:
        Y = gen(G, 120, 900)
        print(f"{label:<16} corrected {coverage_gate_rate(Y):>6.1%}   plug-in {coverage_gate_rate(Y, parameter_uncertainty=False):>6.1%}")


if __name__ == "__main__":
    main()
