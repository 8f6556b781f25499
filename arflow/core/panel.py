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
#: set by the frame adapter (the panel sees ordinals only): duplicated periods whose values differ
CONFLICTING_DUPLICATES = 128
#: set by the frame adapter: a period label that is not on the frequency's calendar
#: (a mid-month date under "month", a Wednesday among Monday weeks, a time of day)
OFF_CALENDAR = 256

#: a series whose range is at most this share of its largest absolute value is constant
#: (about 4,500 float64 rounding units: only rounding noise, at any scale)
CONSTANT_RELATIVE_RANGE = 1e-12

QUALITY_FLAG_NAMES: dict[int, str] = {
    DUPLICATE_PERIODS: "duplicate_periods",
    INTERNAL_GAPS: "data_gaps",
    NON_FINITE_VALUES: "non_finite_values",
    TOO_SHORT: "too_short",
    CONSTANT: "constant_series",
    ENDS_BEFORE_AS_OF: "ends_before_as_of",
    NO_DATA: "no_data",
    CONFLICTING_DUPLICATES: "conflicting_duplicates",
    OFF_CALENDAR: "off_calendar_periods",
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
    if len(periods) and periods.max() > as_of:
        keep = periods <= as_of
        codes, periods, values = codes[keep], periods[keep], values[keep]
    if len(codes) == 0:
        flags[:] = NO_DATA | TOO_SHORT
        z = np.zeros(G, dtype=np.int64)
        return Panel(np.full((G, 0), np.nan), z, z.copy(), z.copy(), flags, int(as_of))

    # sort by (code, period), stable so that a later duplicate wins; skipped
    # when the rows already arrive in that order (the job reads them so)
    pmin = int(periods.min())
    span = int(periods.max()) - pmin + 1
    composite = codes * span + (periods - pmin)
    if len(composite) > 1 and np.any(composite[1:] < composite[:-1]):
        order = np.argsort(composite, kind="stable")
        codes, periods, values, composite = codes[order], periods[order], values[order], composite[order]
    same = composite[1:] == composite[:-1]
    if same.any():
        flags[np.unique(codes[1:][same])] |= DUPLICATE_PERIODS
        last_of_pair = np.ones(len(codes), dtype=bool)
        last_of_pair[:-1] = ~same
        codes, periods, values = codes[last_of_pair], periods[last_of_pair], values[last_of_pair]

    finite = np.isfinite(values)
    if not finite.all():
        flags[np.unique(codes[~finite])] |= NON_FINITE_VALUES

    # per-series boundaries of the sorted rows
    starts = np.flatnonzero(np.r_[True, codes[1:] != codes[:-1]])
    ends = np.r_[starts[1:], len(codes)]
    present = codes[starts]
    has = np.zeros(G, dtype=bool)
    has[present] = True
    first = np.full(G, as_of, dtype=np.int64)
    first[present] = periods[starts]
    last_any = np.full(G, as_of, dtype=np.int64)
    last_any[present] = periods[ends - 1]
    count = np.zeros(G, dtype=np.int64)
    count[present] = ends - starts
    flags[has & (count < last_any - first + 1)] |= INTERNAL_GAPS

    # keep finite rows; the run is the trailing block of consecutive periods
    if not finite.all():
        codes, periods, values = codes[finite], periods[finite], values[finite]
        starts = np.flatnonzero(np.r_[True, codes[1:] != codes[:-1]]) if len(codes) else np.zeros(0, np.int64)
        ends = np.r_[starts[1:], len(codes)]
    has_f = np.zeros(G, dtype=bool)
    last = np.full(G, as_of, dtype=np.int64)
    n = np.zeros(G, dtype=np.int64)
    if len(codes):
        present = codes[starts]
        has_f[present] = True
        last[present] = periods[ends - 1]
        newcode = np.r_[True, codes[1:] != codes[:-1]]
        # a break: within a series, the period is not the previous one plus one
        brk = newcode | np.r_[True, periods[1:] != periods[:-1] + 1]
        rows = np.arange(len(codes))
        run_start = np.maximum.reduceat(np.where(brk, rows, 0), starts)
        if max_history is not None:
            run_start = np.maximum(run_start, ends - max_history)
        n[present] = ends - run_start
        T = int(n.max())
        block = np.cumsum(newcode) - 1  # which series block each sorted row is in
        # column of row i in the right-aligned panel: T - (end of its block - i)
        dest = codes * T + (T - ends[block] + rows)
        panel = np.full((G, T), np.nan)
        if np.all(run_start == starts):
            panel.flat[dest] = values
        else:
            keep = rows >= run_start[block]
            panel.flat[dest[keep]] = values[keep]
    else:
        T = 0
        panel = np.full((G, 0), np.nan)

    last = np.where(has_f, last, np.where(has, last_any, as_of))
    flags[~has] |= NO_DATA
    flags[has & ~has_f] |= NO_DATA
    flags[has_f & (last < as_of)] |= ENDS_BEFORE_AS_OF
    flags[n < min_observations] |= TOO_SHORT
    if T:
        with np.errstate(invalid="ignore"):
            hi = np.nanmax(np.where(np.isnan(panel), -np.inf, panel), axis=1)
            lo = np.nanmin(np.where(np.isnan(panel), np.inf, panel), axis=1)
        # scale-free: the range relative to the series' magnitude (an all-zero series is constant)
        with np.errstate(over="ignore", invalid="ignore"):  # +-1e308 ranges overflow to inf: not constant
            const = has_f & (n >= 2) & (hi - lo <= CONSTANT_RELATIVE_RANGE * np.maximum(np.abs(hi), np.abs(lo)))
        flags[const] |= CONSTANT
    return Panel(panel, n, first, last, flags, int(as_of))
