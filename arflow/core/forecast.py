"""Chain forecasts and psi-weight prediction intervals for a batch of AR fits.

Each step feeds the next: ``y(T+h) = b0 + sum_j phi_j y(T+h-j)`` with
forecasts standing in for unknown values. The h-step forecast error of an AR
model is ``sum_{j<h} psi_j e(T+h-j)``, so its variance is
``sigma^2 * sum_{j<h} psi_j^2`` with ``psi_0 = 1`` and
``psi_j = sum_i phi_i psi_{j-i}``. Intervals are Gaussian:
``forecast +/- z_{(1+c)/2} * sd``. For a model fitted to first differences,
forecasts are cumulated onto the last level and the level psi-weights are the
running sums of the difference model's psi-weights, so intervals are for levels.

Caveat (stated in the README): these intervals treat the fitted coefficients
as known; they do not include parameter-estimation uncertainty or model error.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from .distributions import norm_ppf


@dataclass(frozen=True)
class Forecasts:
    """``mean`` and ``sd`` (G, H); ``lower``/``upper`` (C, G, H) for the coverage levels."""

    mean: np.ndarray
    sd: np.ndarray
    coverage: tuple[float, ...]
    lower: np.ndarray
    upper: np.ndarray


def psi_weights(phi: np.ndarray, horizon: int) -> np.ndarray:
    """psi_0..psi_{H-1} (G, H) of the AR polynomial ``phi`` (G, L), lag j in column j-1."""
    G, L = phi.shape
    psi = np.zeros((G, horizon))
    psi[:, 0] = 1.0
    for j in range(1, horizon):
        m = min(j, L)
        # psi_j = sum_{i=1..m} phi_i psi_{j-i}
        psi[:, j] = np.einsum("gi,gi->g", phi[:, :m], psi[:, j - 1 :: -1][:, :m])
    return psi


def chain_forecast(history: np.ndarray, intercept: np.ndarray, phi: np.ndarray, horizon: int) -> np.ndarray:
    """h = 1..H forecasts (G, H) from the last L values of ``history`` (G, >= L, right-aligned, finite)."""
    G, L = phi.shape
    buf = np.zeros((G, L + horizon))
    if L:
        buf[:, :L] = history[:, history.shape[1] - L :]
    for h in range(horizon):
        # lag j value sits at column L + h - j
        past = buf[:, h : L + h][:, ::-1]  # column 0 is lag 1
        buf[:, L + h] = intercept + np.einsum("gi,gi->g", phi, past)
    return buf[:, L:]


def forecast_ar(
    history: np.ndarray,
    intercept: np.ndarray,
    phi: np.ndarray,
    sigma: np.ndarray,
    horizon: int,
    coverage: tuple[float, ...] = (0.8, 0.95),
    differenced: np.ndarray | None = None,
) -> Forecasts:
    """Forecasts with intervals for all series at once.

    ``history`` (G, T) right-aligned levels; ``phi`` (G, L); ``sigma`` (G,);
    ``differenced`` (G,) bool marks models fitted to first differences (their
    ``intercept``/``phi`` describe the differences; output is in levels).

    >>> f = forecast_ar(np.array([[0.0, 1.0]]), np.array([0.0]), np.array([[0.5]]), np.array([1.0]), 3, (0.95,))
    >>> f.mean.round(3).tolist(), f.sd.round(4).tolist()
    ([[0.5, 0.25, 0.125]], [[1.0, 1.118, 1.1456]])
    """
    history = np.asarray(history, dtype=np.float64)
    G, L = phi.shape
    diff = np.zeros(G, dtype=bool) if differenced is None else np.asarray(differenced, dtype=bool)
    src = history
    if diff.any():
        d = np.diff(history, axis=1)
        src = np.where(diff[:, None], np.concatenate([np.full((G, 1), np.nan), d], axis=1), history)
    mean = chain_forecast(np.nan_to_num(src), intercept, phi, horizon)
    psi = psi_weights(phi, horizon)
    if diff.any():
        last = history[:, -1]
        mean = np.where(diff[:, None], last[:, None] + np.cumsum(mean, axis=1), mean)
        psi = np.where(diff[:, None], np.cumsum(psi, axis=1), psi)
    sd = sigma[:, None] * np.sqrt(np.cumsum(psi * psi, axis=1))
    cov = tuple(float(c) for c in coverage)
    z = norm_ppf(0.5 + np.asarray(cov) / 2.0)
    lower = mean[None] - z[:, None, None] * sd[None]
    upper = mean[None] + z[:, None, None] * sd[None]
    return Forecasts(mean, sd, cov, lower, upper)
