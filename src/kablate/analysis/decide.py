"""The recommended plan: the cheapest plan shown not to lose more than the margin.

The question a sweep answers is usually "which plan is cheapest without being worse than the
baseline by more than my margin?". That is a non-inferiority question (ICH E9, "Statistical
principles for clinical trials", §3.3.2; Piaggio et al. 2012, CONSORT extension for
non-inferiority trials): a plan qualifies when the one-sided 95% lower confidence bound of
(plan − baseline) lies above −margin. Among the qualifying plans that cost less than the
baseline, the cheapest is recommended; when none qualifies, the verdict is to keep the
baseline. A plan that costs more is never recommended for being "as good"; one whose lower
bound lies above zero is listed as "worth its cost?" for the engineer to weigh.

The one-standard-error rule (Breiman et al. 1984; Hastie, Tibshirani & Friedman, *The
Elements of Statistical Learning*, 2nd ed., §7.10) stays available as a named option, with
the standard error from the same two-level bootstrap (seeds and images).

Everything is computed from per-image evidence (`evidence.Evidence`); the bounds come from
the paired two-level bootstrap, p-values are Holm-adjusted across the comparisons with the
baseline (``statsmodels.stats.multitest.multipletests``), and a comparison on one seed uses
the exact McNemar test (``statsmodels.stats.contingency_tables.mcnemar``).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
from scipy.stats import norm
from statsmodels.stats.contingency_tables import mcnemar
from statsmodels.stats.multitest import multipletests

from kablate.analysis.bootstrap import (
    N_RESAMPLES,
    exact_binomial_interval,
    percentile_interval,
    resample_accuracies,
    zero_discordance_bound,
)
from kablate.analysis.evidence import Evidence
from kablate.spec.costs import COSTS
from kablate.spec.schema import PICK_RULES as RULES
from kablate.spec.schema import PickSpec

# The selection rules and their defaults have one home, the sweep file's [pick] table.
DEFAULT_PICK = PickSpec()
# The headline calls a pick unstable when the point rule, applied to the bootstrap resamples,
# agrees with it in fewer than this share of them (documented in sweeps/README.md).
STABLE_SHARE = 0.7
ALPHA = 0.05
Z_975 = float(norm.ppf(0.975))


@dataclass(frozen=True)
class Accuracy:
    """One variant's validation accuracy over the common seeds and every image."""

    name: str
    n_correct: int
    n_scored: int  # seeds × images
    low: float  # 95% interval: bootstrap percentile, never narrower than Clopper–Pearson's
    high: float
    se: float  # standard deviation of the bootstrap distribution

    @property
    def mean(self) -> float:
        return self.n_correct / self.n_scored

    @property
    def interval_se(self) -> float:
        """The standard error the 95% interval implies, (high − low) / (2 · z₀.₉₇₅), or the
        bootstrap's if larger. It is never zero: the interval is never narrower than the exact
        binomial one, so a plan at 100% on every seed keeps the rule of three's width."""
        return max(self.se, (self.high - self.low) / (2 * Z_975))


@dataclass(frozen=True)
class Contrast:
    """A variant against the baseline, paired on seeds and images."""

    name: str
    diff: float  # variant − baseline, accuracy as a fraction
    low: float  # two-sided 95% interval
    high: float
    lower_bound: float  # one-sided 95% lower bound: the non-inferiority check
    se: float
    p_value: float  # two-sided, for "no difference"
    p_holm: float = math.nan  # Holm-adjusted over the comparisons with the baseline
    test: str = "paired bootstrap"
    n_discordant: int = 0  # (seed, image) pairs scored right by exactly one of the two


@dataclass
class Decision:
    rule: str
    cost: str  # the column minimised
    baseline: str
    recommended: str
    margin: float  # fraction (0.01 = 1 pp)
    within_se: float
    tolerance: float  # one-se: the tolerance used, as a fraction
    accuracy: dict[str, Accuracy]
    contrasts: dict[str, Contrast]
    # the plans the rule accepts, cheapest first: for margin, those cheaper than the baseline
    # and non-inferior; for one-se, those within the tolerance of the best plan
    qualifying: tuple[str, ...]
    worth_cost: tuple[str, ...]  # costlier than the baseline, lower bound above zero
    pick_share: dict[str, float]  # how often each plan is the point pick in a resample
    stability: float  # share of resamples whose point pick is the recommended plan
    leave_one_out: dict[int, str] = field(default_factory=dict)  # left-out seed → pick
    n_seeds: int = 0
    n_images: int = 0

    @property
    def unstable(self) -> bool:
        return self.stability < STABLE_SHARE

    @property
    def keeps_baseline(self) -> bool:
        return self.recommended == self.baseline


def accuracies(evidence: Evidence, boot: np.ndarray) -> dict[str, Accuracy]:
    """Each variant's accuracy with its bootstrap interval.

    A bootstrap interval has zero width when a variant scores every image alike on every seed
    (say 100%). The interval is therefore widened to at least the exact binomial interval of
    one seed's worth of images (Clopper & Pearson 1934), which at 100% is the rule of three.
    """
    out = {}
    n_seeds, n_images = evidence.correct.shape[1:]
    for v, name in enumerate(evidence.names):
        k = int(evidence.n_correct[v])
        low, high = percentile_interval(boot[:, v])
        per_seed_k = round(k / n_seeds)
        cp_low, cp_high = exact_binomial_interval(per_seed_k, n_images)
        out[name] = Accuracy(
            name,
            k,
            n_seeds * n_images,
            min(low, cp_low),
            max(high, cp_high),
            float(boot[:, v].std()),
        )
    return out


def contrasts(evidence: Evidence, boot: np.ndarray, baseline: str) -> dict[str, Contrast]:
    """Every variant against the baseline, with Holm-adjusted p-values."""
    b = evidence.index(baseline)
    n_seeds = evidence.correct.shape[1]
    accuracy = evidence.accuracy  # computed once, not per variant
    out = {}
    for v, name in enumerate(evidence.names):
        if v == b:
            continue
        d = boot[:, v] - boot[:, b]
        diff = float(accuracy[v] - accuracy[b])
        discordant = int((evidence.correct[v] != evidence.correct[b]).sum())
        low, high = percentile_interval(d)
        lower = float(np.quantile(d, ALPHA))
        if discordant == 0:  # identical on every image: the bootstrap cannot see the spread
            bound = zero_discordance_bound(evidence.n_images)
            low, high, lower = -bound, bound, -bound
        if n_seeds == 1:
            p, test = exact_mcnemar(evidence.correct[v, 0], evidence.correct[b, 0]), "exact McNemar"
        else:
            p, test = bootstrap_p_value(d), "paired bootstrap"
        out[name] = Contrast(
            name, diff, low, high, lower, float(d.std()), p, test=test, n_discordant=discordant
        )
    return holm_adjust(out)


def exact_mcnemar(a: np.ndarray, b: np.ndarray) -> float:
    """Exact McNemar p-value for two classifiers scored on the same images (McNemar 1947)."""
    table = [
        [int((a & b).sum()), int((a & ~b).sum())],
        [int((~a & b).sum()), int((~a & ~b).sum())],
    ]
    return float(mcnemar(table, exact=True).pvalue)


def bootstrap_p_value(diffs: np.ndarray) -> float:
    """Two-sided p-value for "no difference" from the bootstrap distribution of a difference:
    twice the smaller tail share at zero (the percentile interval's dual), at most 1."""
    below = float(np.mean(diffs <= 0))
    above = float(np.mean(diffs >= 0))
    return min(1.0, 2 * min(below, above))


def holm_adjust(found: dict[str, Contrast]) -> dict[str, Contrast]:
    """Holm's step-down adjustment (Holm 1979) of the p-values, through statsmodels."""
    if not found:
        return found
    names = list(found)
    adjusted = multipletests([found[n].p_value for n in names], method="holm")[1]
    return {
        n: Contrast(**{**found[n].__dict__, "p_holm": float(p)})
        for n, p in zip(names, adjusted, strict=True)
    }


def noninferior_pick(
    costs: Mapping[str, float],
    lower_bounds: Mapping[str, float],
    n_correct: Mapping[str, int],
    baseline: str,
    margin: float,
) -> tuple[str, tuple[str, ...], tuple[str, ...]]:
    """The non-inferiority rule on summary numbers.

    Returns:
        (recommended, qualifying, worth_cost): the cheapest variant that costs less than the
        baseline and whose lower bound lies above −margin (else the baseline); every such
        variant, cheapest first (ties in cost: more correct predictions, then name); and the
        costlier variants whose lower bound lies above zero.
    """
    base_cost = costs[baseline]
    cheaper = [n for n in lower_bounds if n != baseline and costs[n] < base_cost]
    qualifying = sorted(
        (n for n in cheaper if lower_bounds[n] > -margin),
        key=lambda n: (costs[n], -n_correct[n], n),
    )
    worth = sorted(
        (
            n
            for n in lower_bounds
            if n != baseline and costs[n] >= base_cost and lower_bounds[n] > 0
        ),
        key=lambda n: (costs[n], n),
    )
    return (qualifying[0] if qualifying else baseline), tuple(qualifying), tuple(worth)


def one_se_pick(
    scores: Mapping[str, float],
    ses: Mapping[str, float],
    costs: Mapping[str, float],
    within_se: float,
    ties: Mapping[str, int] | None = None,
) -> tuple[str, str, float]:
    """The one-standard-error rule on summary numbers.

    The best variant has the highest score (ties: the larger ``ties`` count, i.e. correct
    predictions, then the cheaper, then the name); every variant whose score is at least
    best − within_se × SE(best) qualifies, and the cheapest of them is picked (ties: higher
    score, then name).

    Returns:
        (picked, best, tolerance, qualifying): the tolerance in score units, and every
        variant within it, cheapest first.
    """
    ties = ties or {}
    best = min(scores, key=lambda n: (-ties.get(n, 0), -scores[n], costs[n], n))
    se = ses[best]
    tolerance = within_se * se if math.isfinite(se) else 0.0
    # The small slack keeps a score that equals the threshold up to rounding.
    ok = sorted(
        (n for n in scores if scores[n] >= scores[best] - tolerance - 1e-12),
        key=lambda n: (costs[n], -scores[n], n),
    )
    return ok[0], best, tolerance, tuple(ok)


def point_picks(
    boot: np.ndarray, names: Sequence[str], costs: Mapping[str, float], baseline: str, margin: float
) -> np.ndarray:
    """In each resample, the plan the rule would pick if that resample were the truth: the
    cheapest variant cheaper than the baseline whose resampled difference exceeds −margin
    (ties in cost: the larger resampled accuracy, then the name), else the baseline.
    Returns the picked index per resample."""
    b = names.index(baseline)
    order = sorted(
        (v for v, n in enumerate(names) if v != b and costs[n] < costs[baseline]),
        key=lambda v: (costs[names[v]], names[v]),
    )
    picks = np.full(len(boot), b)
    undecided = np.ones(len(boot), dtype=bool)
    groups: dict[float, list[int]] = {}
    for v in order:
        groups.setdefault(costs[names[v]], []).append(v)
    for members in groups.values():
        acc = boot[:, members]
        ok = acc - boot[:, [b]] > -margin
        masked = np.where(ok, acc, -np.inf)
        best = np.asarray(members)[np.argmax(masked, axis=1)]  # first (by name) among ties
        hit = undecided & ok.any(axis=1)
        picks[hit] = best[hit]
        undecided &= ~hit
    return picks


def one_se_point_picks(
    boot: np.ndarray, names: Sequence[str], costs: Mapping[str, float], tolerance: float
) -> np.ndarray:
    """In each resample, the plan the one-standard-error rule would pick if that resample
    were the truth: the cheapest plan within ``tolerance`` of the resample's best (ties in
    cost: the larger resampled accuracy, then the name). Returns the picked index per
    resample."""
    order = sorted(range(len(names)), key=lambda v: (costs[names[v]], names[v]))
    acc = boot[:, order]
    cost = np.array([costs[names[v]] for v in order], dtype=float)
    ok = acc >= acc.max(axis=1, keepdims=True) - tolerance - 1e-12
    key = np.where(ok, cost[None, :], np.inf)
    cheapest = ok & (key == key.min(axis=1, keepdims=True))
    # Among the cheapest accepted plans the more accurate; argmax takes the first by name.
    pick = np.argmax(np.where(cheapest, acc, -np.inf), axis=1)
    return np.asarray(order)[pick]


def decide(
    evidence: Evidence,
    costs: Mapping[str, float],
    baseline: str,
    rule: str = DEFAULT_PICK.rule,
    margin: float = DEFAULT_PICK.margin / 100,  # a fraction here, percentage points in [pick]
    within_se: float = DEFAULT_PICK.within_se,
    cost: str = COSTS[DEFAULT_PICK.cost].column,
    n_resamples: int = N_RESAMPLES,
    leave_one_out: bool = True,
) -> Decision:
    """Pick the recommended plan from the evidence (see the module docstring)."""
    if rule not in RULES:
        raise ValueError(f"unknown rule {rule!r}")
    names = list(evidence.names)
    boot = resample_accuracies(evidence.correct, n_resamples)
    acc = accuracies(evidence, boot)
    found = contrasts(evidence, boot, baseline)
    counts = dict(zip(names, evidence.n_correct.tolist(), strict=True))
    lower = {n: c.lower_bound for n, c in found.items()}
    recommended, qualifying, worth = noninferior_pick(costs, lower, counts, baseline, margin)
    tolerance = 0.0
    picks = point_picks(boot, names, costs, baseline, margin)
    if rule == "one-se":
        scores = {n: a.mean for n, a in acc.items()}
        ses = {n: a.interval_se for n, a in acc.items()}
        recommended, _, tolerance, qualifying = one_se_pick(scores, ses, costs, within_se, counts)
        picks = one_se_point_picks(boot, names, costs, tolerance)
    share = {n: float(np.mean(picks == v)) for v, n in enumerate(names)}
    decision = Decision(
        rule,
        cost,
        baseline,
        recommended,
        margin,
        within_se,
        tolerance,
        acc,
        found,
        qualifying,
        worth,
        share,
        share[recommended] if rule == "margin" else math.nan,
        n_seeds=len(evidence.seeds),
        n_images=evidence.n_images,
    )
    if leave_one_out and len(evidence.seeds) >= 2:
        for seed in evidence.seeds:
            rest = decide(
                evidence.without_seed(seed),
                costs,
                baseline,
                rule,
                margin,
                within_se,
                cost,
                n_resamples=max(1000, n_resamples // 4),
                leave_one_out=False,
            )
            decision.leave_one_out[seed] = rest.recommended
    if rule == "one-se":  # stability: how often leaving a seed out keeps the pick
        kept = [p == recommended for p in decision.leave_one_out.values()]
        decision.stability = float(np.mean(kept)) if kept else math.nan
    return decision
