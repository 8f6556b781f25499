"""The distribution functions the core uses, against scipy.stats and handbook tables."""

from __future__ import annotations

import numpy as np
from scipy import stats

from arflow.core import distributions as d


def test_against_scipy_stats():
    x = np.array([0.0, 0.3, 1.0, 1.96, 3.5, 10.0])
    for df in (1, 2, 5, 16, 120):
        np.testing.assert_allclose(d.t_sf(x, df), stats.t.sf(x, df), rtol=1e-12, atol=1e-300)  # scipy.stats
        np.testing.assert_allclose(d.chi2_sf(x, df), stats.chi2.sf(x, df), rtol=1e-12, atol=1e-300)
        np.testing.assert_allclose(d.f_sf(x, 1, df), stats.f.sf(x, 1, df), rtol=1e-12, atol=1e-300)
    p = np.array([0.001, 0.025, 0.5, 0.9, 0.975])
    np.testing.assert_allclose(d.norm_ppf(p), stats.norm.ppf(p), rtol=1e-14)
    np.testing.assert_allclose(d.norm_cdf(x), stats.norm.cdf(x), rtol=1e-14)
    assert np.isnan(d.chi2_sf(np.nan, 3)) and d.chi2_sf(-1.0, 3) == 1.0


def test_handbook_points():
    # NIST/SEMATECH e-Handbook, t table: two-tailed 5% at 16 df is 2.120
    assert abs(2 * d.t_sf(2.120, 16) - 0.05) < 1e-4
    # NIST/SEMATECH e-Handbook 1.3.6.7.4: chi-square upper 5% points, 1..12 df
    upper5 = [3.841, 5.991, 7.815, 9.488, 11.070, 12.592, 14.067, 15.507, 16.919, 18.307, 19.675, 21.026]
    for df, x in enumerate(upper5, start=1):
        assert abs(d.chi2_sf(x, df) - 0.05) < 2e-4
    # common practice: the 97.5% normal quantile is 1.96
    assert abs(d.norm_ppf(0.975) - 1.959964) < 1e-6
