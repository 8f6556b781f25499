"""Panel building: calendar alignment, ragged series, data-quality flags (no exceptions)."""

from __future__ import annotations

import numpy as np

from arflow.core import panel as P


def test_ragged_alignment_and_trailing_run():
    codes = np.array([0, 0, 0, 1, 1, 1, 1, 1])
    periods = np.array([10, 11, 12, 3, 4, 6, 7, 8])  # series 1 has a gap at 5
    values = np.array([1.0, 2, 3, 9, 9, 5, 6, 7])
    p = P.build_panel(codes, periods, values, 2, as_of=12)
    assert p.n.tolist() == [3, 3]
    assert p.values[1].tolist() == [5.0, 6.0, 7.0]  # only the run after the gap is fitted
    assert p.last_period.tolist() == [12, 8]
    assert p.flags[1] & P.INTERNAL_GAPS
    assert p.flags[1] & P.ENDS_BEFORE_AS_OF
    assert p.flags[0] == 0


def test_duplicates_keep_the_last_row_and_are_flagged():
    p = P.build_panel(np.array([0, 0, 0]), np.array([1, 2, 2]), np.array([1.0, 2.0, 5.0]), 1)
    assert p.flags[0] & P.DUPLICATE_PERIODS
    assert p.values[0].tolist() == [1.0, 5.0]


def test_non_finite_constant_short_and_missing_series():
    codes = np.array([0] * 30 + [1] * 30 + [2] * 2)
    periods = np.r_[np.arange(30), np.arange(30), [28, 29]]
    vals = np.r_[np.arange(30.0), np.full(30, 4.0), [1.0, 2.0]]
    vals[10] = np.nan
    p = P.build_panel(codes, periods, vals, 4, min_observations=10)
    assert p.flags[0] & P.NON_FINITE_VALUES and p.n[0] == 19
    assert p.flags[1] & P.CONSTANT
    assert p.flags[2] & P.TOO_SHORT
    assert p.flags[3] & P.NO_DATA  # a code with no rows at all
    assert "no_data" in P.flag_names(int(p.flags[3]))


def test_as_of_cuts_later_rows():
    p = P.build_panel(np.zeros(10, int), np.arange(10), np.arange(10.0), 1, as_of=6)
    assert p.values[0].tolist() == list(np.arange(7.0))
    assert p.as_of == 6
