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


def t_interval(values: list[float] | np.ndarray, confidence: float = 0.95) -> Interval:
    """Mean ± t·s/√n, the Student-t confidence interval for a mean from n seeds."""
    x = np.asarray([v for v in values if v is not None and math.isfinite(v)], dtype=float)
    n = len(x)
    if n == 0:
        nan = float("nan")
        return Interval(nan, nan, nan, nan, 0)
    mean = float(x.mean())
    if n < 2:
        return Interval(mean, float("nan"), float("nan"), float("nan"), 1)
    std = float(x.std(ddof=1))
    half = float(stats.t.ppf(0.5 + confidence / 2, df=n - 1)) * std / math.sqrt(n)
    return Interval(mean, std, mean - half, mean + half, n)


@dataclass(frozen=True)
class PairedResult:
    n: int
    mean_diff: float  # variant − baseline
    ci_low: float
    ci_high: float
    p_value: float
    verdict: str


def paired_comparison(
    variant: dict[int, float],
    baseline: dict[int, float],
    confidence: float = 0.95,
    alpha: float = 0.05,
) -> PairedResult:
    """Per-seed paired differences (variant − baseline) on the seeds both have.

    The trainer's paired design (same seed → same data order and augmentation) makes the
    per-seed difference the right unit. The p-value is ``scipy.stats.ttest_rel``'s.
    """
    seeds = sorted(set(variant) & set(baseline))
    diffs = np.array([variant[s] - baseline[s] for s in seeds], dtype=float)
    n = len(diffs)
    if n < 2:
        nan = float("nan")
        mean = float(diffs.mean()) if n else nan
        return PairedResult(
            n, mean, nan, nan, nan, f"too few paired seeds (n = {n}) to tell them apart"
        )
    interval = t_interval(diffs, confidence)
    if np.allclose(diffs, diffs[0]):
        p = 0.0 if diffs[0] != 0 else 1.0  # ttest_rel is undefined when every diff is equal
    else:
        p = float(stats.ttest_rel([variant[s] for s in seeds], [baseline[s] for s in seeds]).pvalue)
    if p < alpha:
        word = "better" if interval.mean > 0 else "worse"
        verdict = f"{word} than the baseline (p = {p:.3g}, n = {n})"
    else:
        verdict = f"not distinguishable from the baseline at n = {n} (p = {p:.3g})"
    return PairedResult(n, interval.mean, interval.low, interval.high, p, verdict)
