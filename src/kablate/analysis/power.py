"""What a sweep can resolve: the smallest difference it detects, and what a margin needs.

A non-inferiority check is a one-sided test at α = 5%. With a standard error SE of the
difference (plan − baseline), a true difference of δ is detected with 80% power when
δ ≥ (z₀.₉₅ + z₀.₈₀)·SE ≈ 2.49·SE (the normal-approximation sample-size formula of the
NIST/SEMATECH e-Handbook of Statistical Methods, §7.2.2.2). The z-values come from
``statsmodels.stats.power.NormalIndPower`` with ``ratio=0``, its one-sample form.

Before a run the standard error is not known. On n validation images, the per-image
difference between two plans is −1, 0 or +1, so its standard deviation is at most √d, with d
the share of images the two score differently (their disagreement rate). The image part of the
standard error is then at most √(d/n), and more seeds do not shrink it: every seed scores the
same images.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from statsmodels.stats.power import NormalIndPower

ALPHA = 0.05
POWER = 0.8
# Assumed before a run: two compact CNNs that both reach ~95% disagree on about 5% of images
# (common practice as a planning figure; the report replaces it with the observed rate).
ASSUMED_DISAGREEMENT = 0.05
# Disagreement rates a dry run plans for: near-ceiling data, a typical small CNN, a hard task.
PLANNING_RATES = (0.01, 0.05, 0.10)


def z_sum(alpha: float = ALPHA, power: float = POWER) -> float:
    """z₁₋α + z_power for a one-sided test: the effect size, in standard errors, detected
    with the given power by one observation."""
    return float(
        NormalIndPower().solve_power(
            effect_size=None, nobs1=1, alpha=alpha, power=power, ratio=0, alternative="larger"
        )
    )


@dataclass(frozen=True)
class Resolution:
    smallest: float  # the smallest difference detected with 80% power (fraction)
    n_images: int
    disagreement: float  # the disagreement rate assumed or observed
    observed: bool  # from this sweep's evidence, or assumed before the run

    def images_for(self, margin: float) -> int:
        """Validation images needed for ``margin`` to be resolved, at the same disagreement."""
        return math.ceil(self.n_images * (self.smallest / margin) ** 2)


def resolution_before(n_images: int, disagreement: float = ASSUMED_DISAGREEMENT) -> Resolution:
    """What a sweep with ``n_images`` validation images can resolve, before it runs."""
    return Resolution(
        z_sum() * math.sqrt(disagreement / n_images), n_images, disagreement, observed=False
    )


def resolution_after(se: float, n_images: int, disagreement: float) -> Resolution:
    """What a finished sweep resolved, from the observed standard error of a difference."""
    return Resolution(z_sum() * se, n_images, disagreement, observed=True)


def plan_note(n_images: int, margin_pp: float, n_seeds: int) -> str:
    """What a sweep can resolve, said before it runs (for ``kablate run --dry-run``), at a few
    disagreement rates, since the rate is not known before the plans are trained."""
    margin = margin_pp / 100
    parts = []
    for rate in PLANNING_RATES:
        r = resolution_before(n_images, rate)
        need = (
            "enough for the margin"
            if r.smallest <= margin
            else f"the margin needs {r.images_for(margin):,} images"
        )
        parts.append(f"{100 * rate:g}% → {100 * r.smallest:.2f} pp ({need})")
    return (
        f"resolution (80% power, one-sided 5%) with {n_images} validation images and "
        f"{n_seeds} seed(s), by the share of images two plans disagree on: {'; '.join(parts)}. "
        f"Margin: {margin_pp:g} pp. More images shrink it; more seeds do not."
    )
