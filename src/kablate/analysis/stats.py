"""Small-sample statistics over seeds: t-intervals and paired comparisons."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import stats


@dataclass(frozen=True)
class Interval:
    mean: float
    std: float  # sample standard deviation (ddof = 1); NaN for n < 2
    low: float
    high: float
    n: int

    @property
    def se(self) -> float:
        return self.std / math.sqrt(self.n) if self.n >= 2 else float("nan")


def t_interval_from_summary(
    mean: float, std: float, n: int, confidence: float = 0.95
) -> tuple[float, float]:
    """Mean ± t(1 − α/2, n − 1) · s / √n, the Student-t confidence limits for a mean.

    The formula of the NIST/SEMATECH e-Handbook of Statistical Methods, §1.3.5.2.
    """
    half = float(stats.t.ppf(0.5 + confidence / 2, df=n - 1)) * std / math.sqrt(n)
    return mean - half, mean + half


def t_interval(values: list[float] | np.ndarray, confidence: float = 0.95) -> Interval:
    """The Student-t confidence interval for a mean from n seeds (NaN or None values are
    dropped; n < 2 gives a mean with no interval)."""
    x = np.asarray([v for v in values if v is not None and math.isfinite(v)], dtype=float)
    n = len(x)
    if n == 0:
        nan = float("nan")
        return Interval(nan, nan, nan, nan, 0)
    mean = float(x.mean())
    if n < 2:
        return Interval(mean, float("nan"), float("nan"), float("nan"), 1)
    std = float(x.std(ddof=1))
    low, high = t_interval_from_summary(mean, std, n, confidence)
    return Interval(mean, std, low, high, n)


@dataclass(frozen=True)
class PairedResult:
    n: int  # seeds both variants finished
    mean_diff: float  # variant − baseline
    ci_low: float
    ci_high: float
    p_value: float
    verdict: str
    t_stat: float = float("nan")

    @property
    def too_few(self) -> bool:
        return self.n < 2

    @property
    def half_width(self) -> float:
        """Half the CI's width: differences smaller than this cannot be told from zero."""
        return (self.ci_high - self.ci_low) / 2


def paired_comparison(
    variant: dict[int, float],
    baseline: dict[int, float],
    confidence: float = 0.95,
    alpha: float = 0.05,
) -> PairedResult:
    """Per-seed paired differences (variant − baseline) on the seeds both have.

    The trainer's paired design (same seed → same data order and augmentation) makes the
    per-seed difference the right unit. The p-value is ``scipy.stats.ttest_rel``'s (two-sided)
    and the interval is the t-interval of the differences, so the two always agree.

    Accuracies move in steps of one validation image, so every seed often shows the very same
    difference. The t-test is then undefined (zero spread) and its interval would have zero
    width, claiming a certainty a few seeds cannot give. In that case there is no interval,
    and the p-value is the exact two-sided sign test's (``scipy.stats.binomtest``, k = n of
    n differences with the same sign): 0.5 at n = 2, 0.25 at n = 3; below 0.05 only from
    n = 6 on.
    """
    seeds = sorted(set(variant) & set(baseline))
    diffs = np.array([variant[s] - baseline[s] for s in seeds], dtype=float)
    n = len(diffs)
    nan = float("nan")
    if n < 2:
        mean = float(diffs.mean()) if n else nan
        return PairedResult(
            n,
            mean,
            nan,
            nan,
            nan,
            f"too few paired seeds (n = {n}; at least 2 are needed) to tell them apart",
        )
    interval = t_interval(diffs, confidence)
    if np.allclose(diffs, diffs[0], rtol=0, atol=1e-12):
        return _no_spread(n, float(diffs[0]), alpha)
    test = stats.ttest_rel([variant[s] for s in seeds], [baseline[s] for s in seeds])
    p, t_stat = float(test.pvalue), float(test.statistic)
    low, high = interval.low, interval.high
    if p < alpha:
        word = "better" if interval.mean > 0 else "worse"
        verdict = f"{word} than the baseline (p = {p:.3g}, n = {n})"
    else:
        verdict = (
            f"not distinguishable from the baseline at n = {n}: the 95% CI of the difference "
            f"spans ±{100 * (high - low) / 2:.2f} pp"
        )
    return PairedResult(n, interval.mean, low, high, p, verdict, t_stat)


def _no_spread(n: int, diff: float, alpha: float) -> PairedResult:
    """Every seed gave the same difference: no t-test, no interval; the exact sign test."""
    nan = float("nan")
    if diff == 0:
        verdict = f"not distinguishable from the baseline at n = {n}: every seed scored the same"
        return PairedResult(n, 0.0, nan, nan, 1.0, verdict, 0.0)
    p = float(stats.binomtest(n, n, 0.5).pvalue)
    same = f"every seed differs by the same {100 * diff:+.2f} pp (no spread, so no t-test)"
    if p < alpha:
        word = "better" if diff > 0 else "worse"
        verdict = f"{word} than the baseline (sign test p = {p:.3g}, n = {n}): {same}"
    else:
        verdict = (
            f"not distinguishable from the baseline at n = {n}: {same}, and the exact sign "
            f"test gives only p = {p:.3g}"
        )
    return PairedResult(n, diff, nan, nan, p, verdict, math.copysign(math.inf, diff))
