"""Measured false-rejection and detection rates of the gates and policies (fixed seeds).

    python bench/calibration.py [--series 2000] [--length 120]

Prints one table: for each check, the data it was run on, what it should do,
and the measured rate. The README's "What the gates guarantee" section quotes
these numbers; tests/test_calibration.py asserts the acceptance bounds.
"""

from __future__ import annotations

import argparse

import numpy as np

from arflow.core.gates import REASONS
from arflow.sample.simulate import random_walks, simulate_ar as simulate, to_panel as panel_of
from arflow.core.pipeline import run_core
from arflow.settings import GateSettings, ModelSettings, Settings


def rate(result, reason: str) -> float:
    return float(result.outcome.reasons[:, REASONS.index(reason)].mean())


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--series", type=int, default=2000)
    ap.add_argument("--length", type=int, default=120)
    a = ap.parse_args()
    G, T = a.series, a.length
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
    rows.append(("differenced", "stationary seasonal series above", "<= 15%",
                 float(run_core(panel_of(seasonal), s).differenced.mean())))
    rows.append(("differenced", "stationary AR(1), phi 0.9", "(low power)", float(run_core(panel_of(ar09), s).differenced.mean())))
    r = run_core(ar12, Settings(frequency=month))
    rows.append(("published overall", "AR(1)/AR(2), defaults", "about 95%", float(r.outcome.published.mean())))
    print(f"{G} series of length {T} per row (fixed seeds)")
    print(f"{'check':<48} {'data':<40} {'target':<12} {'measured':>8}")
    for check, data, target, value in rows:
        print(f"{check:<48} {data:<40} {target:<12} {value:>8.1%}")


if __name__ == "__main__":
    main()
