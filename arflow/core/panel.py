"""Long observations -> a G x T panel on an integer period calendar, with data-quality flags.

The input is three flat arrays: a series code (0..G-1), an integer period
ordinal on the declared frequency (month number, day number, ...), and the
value (NaN for missing). The panel keeps, for each series, its **trailing
contiguous run** of finite values ending at its last observation on or before
the as-of period; this run is what the models are fitted on. Anything odd about
a series is recorded as a flag bit, never raised: a scheduled job must not fail
because one series of a million is broken.

The fitting array is right-aligned: series g occupies the last ``n[g]``
columns of ``values`` and earlier entries are NaN.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

# data-quality flag bits
DUPLICATE_PERIODS = 1
INTERNAL_GAPS = 2
NON_FINITE_VALUES = 4
TOO_SHORT = 8
CONSTANT = 16
ENDS_BEFORE_AS_OF = 32
NO_DATA = 64

QUALITY_FLAG_NAMES: dict[int, str] = {
    DUPLICATE_PERIODS: "duplicate_periods",
    INTERNAL_GAPS: "internal_gaps",
    NON_FINITE_VALUES: "non_finite_values",
    TOO_SHORT: "too_short",
    CONSTANT: "constant_series",
    ENDS_BEFORE_AS_OF: "ends_before_as_of",
    NO_DATA: "no_data",
}


def flag_names(bits: int) -> list[str]:
    """Names of the flag bits set in ``bits``."""
    return [name for bit, name in QUALITY_FLAG_NAMES.items() if bits & bit]


@dataclass(frozen=True)
class Panel:
    """Right-aligned fitting panel of G series.

    ``values`` (G, T): each series' trailing contiguous run, right-aligned, NaN before.
    ``n`` (G,): length of that run. ``last_period`` (G,): ordinal of its last
    observation (forecast step h is ``last_period + h``). ``first_period``
    (G,): ordinal of the series' first observation (whole history).
    ``flags`` (G,): data-quality bits. ``as_of``: the as-of ordinal.
    """

    values: np.ndarray
    n: np.ndarray
    first_period: np.ndarray
    last_period: np.ndarray
    flags: np.ndarray
    as_of: int

    @property
    def n_series(self) -> int:
        return int(self.values.shape[0])

    def take(self, idx: np.ndarray) -> "Panel":
        """The sub-panel of the series at ``idx`` (trimmed to their longest run)."""
        n = self.n[idx]
        width = int(n.max()) if len(n) else 0
        vals = self.values[idx][:, self.values.shape[1] - width :] if width else self.values[idx][:, :0]
        return Panel(vals, n, self.first_period[idx], self.last_period[idx], self.flags[idx], self.as_of)


def build_panel(
    codes: np.ndarray,
    periods: np.ndarray,
    values: np.ndarray,
    n_series: int,
    as_of: int | None = None,
    min_observations: int = 3,
    max_history: int | None = None,
) -> Panel:
    """Build the fitting panel from flat arrays (any order).

    Rows after ``as_of`` are ignored. Duplicated (series, period) pairs keep
    the last row in input order and set ``DUPLICATE_PERIODS``. Non-finite
    values count as missing and set ``NON_FINITE_VALUES``. Missing periods
    between a series' first and last observation set ``INTERNAL_GAPS`` and the
    series is fitted on its trailing run only. ``max_history`` caps the run.

    >>> p = build_panel(np.array([0, 0, 0]), np.array([5, 6, 7]), np.array([1.0, 2.0, 4.0]), 1)
    >>> p.values.tolist(), int(p.last_period[0])
    ([[1.0, 2.0, 4.0]], 7)
    """
    codes = np.asarray(codes, dtype=np.int64)
    periods = np.asarray(periods, dtype=np.int64)
    values = np.asarray(values, dtype=np.float64)
    G = int(n_series)
    flags = np.zeros(G, dtype=np.int64)
    if as_of is None:
        as_of = int(periods.max()) if len(periods) else 0
    keep = periods <= as_of
    codes, periods, values = codes[keep], periods[keep], values[keep]
    if len(codes) == 0:
        flags[:] = NO_DATA | TOO_SHORT
        z = np.zeros(G, dtype=np.int64)
        return Panel(np.full((G, 0), np.nan), z, z.copy(), z.copy(), flags, int(as_of))

    # stable sort by (code, period): a later duplicate wins
    order = np.lexsort((np.arange(len(codes)), periods, codes))
    codes, periods, values = codes[order], periods[order], values[order]
    same = (codes[1:] == codes[:-1]) & (periods[1:] == periods[:-1])
    if same.any():
        np.bitwise_or.at(flags, codes[1:][same], DUPLICATE_PERIODS)
        last_of_pair = np.ones(len(codes), dtype=bool)
        last_of_pair[:-1] = ~same
        codes, periods, values = codes[last_of_pair], periods[last_of_pair], values[last_of_pair]

    finite = np.isfinite(values)
    if not finite.all():
        np.bitwise_or.at(flags, codes[~finite], NON_FINITE_VALUES)

    has = np.zeros(G, dtype=bool)
    has[codes] = True
    first = np.full(G, np.iinfo(np.int64).max, dtype=np.int64)
    np.minimum.at(first, codes, periods)
    last_any = np.full(G, np.iinfo(np.int64).min, dtype=np.int64)
    np.maximum.at(last_any, codes, periods)
    # count of rows per series vs span -> internal gaps (missing periods)
    count = np.bincount(codes, minlength=G)
    span = np.where(has, last_any - first + 1, 0)
    flags[has & (count < span)] |= INTERNAL_GAPS

    # keep finite rows; the run is the trailing block of consecutive finite periods
    c, p, v = codes[finite], periods[finite], values[finite]
    has_f = np.zeros(G, dtype=bool)
    has_f[c] = True
    last = np.full(G, np.iinfo(np.int64).min, dtype=np.int64)
    np.maximum.at(last, c, p)
    # a break: same series, period not consecutive
    brk = np.zeros(len(c), dtype=bool)
    brk[1:] = (c[1:] == c[:-1]) & (p[1:] != p[:-1] + 1)
    # position from each series' end: rows with a later break in the same series are dropped
    # compute, per row, whether any break occurs after it within its series
    brk_pos = np.where(brk, np.arange(len(c)), -1)
    # last break index per series
    last_brk = np.full(G, -1, dtype=np.int64)
    np.maximum.at(last_brk, c, brk_pos)
    in_run = np.arange(len(c)) >= last_brk[c]
    c, p, v = c[in_run], p[in_run], v[in_run]
    n = np.bincount(c, minlength=G).astype(np.int64)
    if max_history is not None:
        n_cap = np.minimum(n, max_history)
        offs = last[c] - p  # 0 for the last observation
        keep = offs < n_cap[c]
        c, p, v, n = c[keep], p[keep], v[keep], n_cap
    T = int(n.max()) if G else 0
    panel = np.full((G, T), np.nan)
    col = T - 1 - (last[c] - p)
    panel[c, col] = v

    last = np.where(has_f, last, np.where(has, last_any, as_of))
    first = np.where(has, first, as_of)
    flags[~has] |= NO_DATA
    flags[has & ~has_f] |= NO_DATA
    flags[has_f & (last < as_of)] |= ENDS_BEFORE_AS_OF
    flags[n < min_observations] |= TOO_SHORT
    # constant: no variation in the run
    with np.errstate(invalid="ignore"):
        rng = np.nanmax(panel, axis=1, initial=-np.inf) - np.nanmin(panel, axis=1, initial=np.inf) if T else np.zeros(G)
    const = has_f & (n >= 2) & (rng <= 1e-12 * np.maximum(1.0, np.abs(np.nan_to_num(panel[:, -1]))) if T else np.zeros(G, bool))
    flags[const] |= CONSTANT
    return Panel(panel, n, first, last, flags, int(as_of))
