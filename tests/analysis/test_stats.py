"""t-intervals and paired comparisons against scipy and published worked examples."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from kablate.analysis.stats import t_interval, t_interval_from_summary


def test_t_interval_matches_scipy_stats_t():
    rng = np.random.default_rng(0)
    for n in (2, 3, 5, 10, 30):
        x = rng.normal(0.9, 0.02, size=n)
        got = t_interval(x, 0.95)
        # Reference: scipy.stats.t.interval with scale = s/√n.
        low, high = stats.t.interval(0.95, df=n - 1, loc=x.mean(), scale=stats.sem(x))
        assert got.n == n
        assert got.mean == pytest.approx(x.mean(), abs=1e-15)
        assert got.std == pytest.approx(x.std(ddof=1), rel=1e-12)
        assert (got.low, got.high) == (
            pytest.approx(low, abs=1e-12),
            pytest.approx(high, abs=1e-12),
        )
    assert t_interval(x, 0.90).high < t_interval(x, 0.95).high


def test_t_interval_nist_worked_example():
    # NIST/SEMATECH e-Handbook of Statistical Methods, §1.3.5.2 "Confidence Limits for the
    # Mean" (eda352.htm), "Confidence Interval Example" on ZARR13.DAT: N = 195,
    # MEAN = 9.261460, STANDARD DEVIATION = 0.022789, t(1-0.025, N-1) = 1.9723, "a 95 %
    # confidence interval for the mean is (9.258242, 9.264679)". Numbers as printed on the
    # page (checked against a public copy of it); the data file itself is not bundled. The
    # handbook rounds s and t, so its limits agree with the exact t to within 1e-6.
    low, high = t_interval_from_summary(9.261460, 0.022789, 195, 0.95)
    assert low == pytest.approx(9.258242, abs=1e-6)
    assert high == pytest.approx(9.264679, abs=1e-6)
    assert stats.t.ppf(0.975, 194) == pytest.approx(1.9723, abs=5e-5)


def test_t_interval_small_n_and_missing_values():
    one = t_interval([0.9, None, float("nan")])
    assert one.n == 1 and one.mean == 0.9 and np.isnan(one.low) and np.isnan(one.se)
    assert t_interval([]).n == 0
