"""Small-sample statistics over seeds: Student-t intervals of a mean (the seed spread of
test accuracy and of training time; validation accuracy uses the per-image evidence)."""

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
