"""Seeded simulators of AR panels, shared by the benchmarks, the calibration tests and the demo tools,
and the two measurements the interval and outlier calibration repeat (coverage of published intervals,
false-flag and detection rates of the outlier step).

Everything is vectorised over series (the loop runs over time only).

>>> simulate_ar({1: 0.5}, 3, 10, seed=1).shape
(3, 10)
>>> import numpy as np; to_panel(np.ones((2, 4))).n.tolist()
[4, 4]
"""

from __future__ import annotations

import numpy as np


def simulate_ar(phi: dict[int, float], G: int, T: int, seed: int, burn: int = 200, mean: float = 50.0) -> np.ndarray:
    """(G, T) Gaussian AR series ``y_t = sum phi[lag] y_(t-lag) + e_t`` with unit innovation variance, plus ``mean``."""
    rng = np.random.default_rng(seed)
    e = rng.normal(size=(G, T + burn))
    y = np.zeros((G, T + burn))
    for t in range(max(phi), T + burn):
        y[:, t] = sum(c * y[:, t - lag] for lag, c in phi.items()) + e[:, t]
    return mean + y[:, burn:]


def random_walks(G: int, T: int, seed: int, start: float = 50.0) -> np.ndarray:
    """(G, T) Gaussian random walks."""
    return start + np.cumsum(np.random.default_rng(seed).normal(size=(G, T)), axis=1)


def mixed_monthly(G: int, T: int, seed: int = 7, level: float = 100.0) -> np.ndarray:
    """A third each of AR(1) (0.6), seasonal AR (0.2 at lag 1, 0.5 at lag 12) and random walks."""
    rng = np.random.default_rng(seed)
    burn = 60
    e = rng.normal(size=(G, T + burn))
    kind = rng.integers(0, 3, size=G)
    a1 = np.where(kind == 0, 0.6, np.where(kind == 1, 0.2, 1.0))
    a12 = np.where(kind == 1, 0.5, 0.0)
    y = np.zeros((G, T + burn))
    for t in range(12, T + burn):
        y[:, t] = a1 * y[:, t - 1] + a12 * y[:, t - 12] + e[:, t]
    return level + y[:, burn:]


def mixed_seasonal(G: int, T: int, season: int, seed: int = 7, level: float = 100.0) -> np.ndarray:
    """:func:`mixed_monthly` with the seasonal lag ``season`` (52 for weekly data, 7 for daily)."""
    rng = np.random.default_rng(seed)
    burn = 5 * season
    e = rng.normal(size=(G, T + burn))
    kind = rng.integers(0, 3, size=G)
    a1 = np.where(kind == 0, 0.6, np.where(kind == 1, 0.2, 1.0))
    a_s = np.where(kind == 1, 0.5, 0.0)
    y = np.zeros((G, T + burn))
    for t in range(season, T + burn):
        y[:, t] = a1 * y[:, t - 1] + a_s * y[:, t - season] + e[:, t]
    return level + y[:, burn:]


def to_panel(Y: np.ndarray):
    """The core's panel of a complete (G, T) array (periods 0..T-1)."""
    from arflow.core.panel import build_panel

    G, T = Y.shape
    return build_panel(np.repeat(np.arange(G), T), np.tile(np.arange(T), G), Y.ravel(), G)


def right_align(rows: list[np.ndarray], T: int | None = None) -> np.ndarray:
    """Series of different lengths as a right-aligned (G, T) panel, NaN before each start.

    >>> right_align([np.array([1.0]), np.array([2.0, 3.0])]).tolist()
    [[nan, 1.0], [2.0, 3.0]]
    """
    T = T or max(len(r) for r in rows)
    out = np.full((len(rows), T), np.nan)
    for g, r in enumerate(rows):
        if len(r):
            out[g, T - len(r) :] = r
    return out


def interval_coverage(Y: np.ndarray, n: int, settings, steps=(1, 12)) -> dict:
    """Empirical coverage of the core's intervals: fit on the first ``n`` columns of ``Y``, score the next ``max(steps)``.

    Returns {(level, step): share of fitted series whose actual at ``n + step - 1`` fell inside},
    whatever transform the pipeline chose for each series (gates are not applied).
    """
    from arflow.core.pipeline import run_core

    r = run_core(to_panel(Y[:, :n]), settings)
    ok = r.fit.fitted
    out = {}
    for ci, level in enumerate(r.forecasts.coverage):
        for h in steps:
            a = Y[:, n + h - 1]
            inside = (a >= r.forecasts.lower[ci, :, h - 1]) & (a <= r.forecasts.upper[ci, :, h - 1])
            out[(level, h)] = float(inside[ok].mean())
    return out


def outlier_rates(Y: np.ndarray, frequency: str, size: float = 8.0, seed: int = 0) -> tuple[float, float]:
    """(false-flag rate on the clean series, detection rate of one planted additive outlier), defaults, no backtest.

    The outlier (``size`` innovation standard deviations, random sign) is added at one period drawn
    uniformly from the last three quarters of each series; "caught" means that period is flagged.
    """
    from arflow.core.pipeline import run_core
    from arflow.settings import BacktestSettings, Settings

    G, T = Y.shape
    s = Settings(frequency=frequency, backtest=BacktestSettings(enabled=False))
    clean = run_core(to_panel(Y), s)
    false = float((clean.outliers.count[clean.fit.fitted] > 0).mean())
    rng = np.random.default_rng(seed)
    t = rng.integers(T // 4, T, size=G)
    Z = Y.copy()
    Z[np.arange(G), t] += size * rng.choice([-1.0, 1.0], size=G)
    r = run_core(to_panel(Z), s)
    W = r.outliers.effect.shape[1]
    caught = np.isfinite(r.outliers.effect[np.arange(G), t - T + W])
    return false, float(caught[r.fit.fitted].mean())
