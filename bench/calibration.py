"""Measured false-rejection and detection rates of the gates and policies (fixed seeds).

    python bench/calibration.py [--series 2000] [--length 120] [--part all|gates|decisions]

Prints tables: for each check, the data it was run on, what it should do, and
the measured rate. The README's "Measured rates" section quotes these numbers;
tests/test_calibration.py asserts the acceptance bounds on smaller samples.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from arflow.core.gates import REASONS
from arflow.sample.simulate import random_walks, simulate_ar as simulate, to_panel as panel_of
from arflow.core.pipeline import run_core
from arflow.settings import GateSettings, ModelSettings, Settings


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
    ap.add_argument("--part", choices=("all", "gates", "decisions"), default="all")
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
    print(f"\n{time.perf_counter() - t0:.0f} s")


if __name__ == "__main__":
    main()
