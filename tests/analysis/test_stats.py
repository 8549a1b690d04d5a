"""t-intervals and paired comparisons against scipy and published worked examples."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from kablate.analysis.stats import paired_comparison, t_interval, t_interval_from_summary


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


# Student's (1908) sleep data, as shipped with R (`sleep`; Cushny & Peebles 1905): extra hours
# of sleep of 10 patients under two drugs. R's documented paired t-test on them,
# t.test(extra ~ group, paired = TRUE), gives t = -4.0621, df = 9, p-value = 0.002833,
# 95% CI -2.4598858 to -0.7001142, mean difference -1.58. That output and the drug-1 values
# were checked against public copies of R's printout; the drug-2 values are from memory and
# reproduce the printed group means (0.75 and 2.33) and the whole output above.
DRUG1 = [0.7, -1.6, -0.2, -1.2, -0.1, 3.4, 3.7, 0.8, 0.0, 2.0]
DRUG2 = [1.9, 0.8, 1.1, 0.1, -0.1, 4.4, 5.5, 1.6, 4.6, 3.4]


def test_paired_comparison_matches_the_sleep_worked_example():
    result = paired_comparison(dict(enumerate(DRUG1)), dict(enumerate(DRUG2)))
    assert result.n == 10
    assert result.mean_diff == pytest.approx(-1.58, abs=1e-12)
    assert result.t_stat == pytest.approx(-4.0621, abs=5e-5)
    assert result.p_value == pytest.approx(0.002833, abs=5e-7)
    assert result.ci_low == pytest.approx(-2.4598858, abs=5e-8)
    assert result.ci_high == pytest.approx(-0.7001142, abs=5e-8)
    assert result.verdict.startswith("worse than the baseline")


def test_paired_comparison_uses_only_shared_seeds_and_says_when_n_is_too_small():
    few = paired_comparison({0: 0.9, 1: 0.8}, {0: 0.85, 2: 0.7})
    assert few.n == 1 and few.too_few
    assert "too few paired seeds (n = 1" in few.verdict
    none = paired_comparison({}, {0: 0.5})
    assert none.n == 0 and none.too_few


def test_paired_comparison_with_equal_differences_is_defined():
    same = paired_comparison({0: 0.9, 1: 0.8}, {0: 0.9, 1: 0.8})
    assert same.p_value == 1.0 and same.mean_diff == 0.0
    assert "every seed scored the same" in same.verdict


def test_equal_nonzero_differences_fall_back_to_the_sign_test():
    # Two seeds each one validation image (1/300) worse: the t-test is undefined (zero
    # spread). A p of 0 would claim certainty from two seeds; the exact two-sided sign test
    # gives 2 · 0.5^n (binomial distribution, common practice): 0.5 at n = 2, 0.25 at n = 3.
    two = paired_comparison({0: 0.9900, 1: 0.9867}, {0: 0.9933, 1: 0.9900})
    assert two.p_value == pytest.approx(0.5)
    assert np.isnan(two.ci_low) and np.isnan(two.ci_high)
    assert two.verdict.startswith("not distinguishable from the baseline at n = 2")
    assert "every seed differs by the same -0.33 pp" in two.verdict
    shifted = paired_comparison({0: 0.91, 1: 0.81, 2: 0.71}, {0: 0.9, 1: 0.8, 2: 0.7})
    assert shifted.p_value == pytest.approx(2 * 0.5**3) and shifted.mean_diff == pytest.approx(0.01)
    six = paired_comparison({s: 0.91 for s in range(6)}, {s: 0.90 for s in range(6)})
    assert six.p_value == pytest.approx(2 * 0.5**6)
    assert six.verdict.startswith("better than the baseline (sign test p = 0.0312, n = 6)")


def test_not_distinguishable_verdict_names_the_interval():
    r = paired_comparison({0: 0.90, 1: 0.95, 2: 0.88}, {0: 0.91, 1: 0.90, 2: 0.90})
    assert r.p_value > 0.05
    assert "not distinguishable from the baseline at n = 3" in r.verdict
    assert f"±{100 * r.half_width:.2f} pp" in r.verdict
