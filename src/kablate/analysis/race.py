"""Racing over seeds: which variants the seeds trained so far already rule out.

Racing is sequential elimination of candidates as evidence comes in (Maron & Moore 1994,
"Hoeffding races: accelerating model selection search for classification and function
approximation"; Birattari, Stützle, Paquete & Varrentrapp 2002, "A racing algorithm for
configuring metaheuristics", the F-race). Here the candidates are the variants, the evidence
is their per-image predictions, and a seed round is one step of the race.

The rule, applied after every complete seed round to the variants still in the race, tests
a family of one-sided hypotheses on the report's paired two-level bootstrap
(`bootstrap.resample_accuracies`: seeds, then images, the same draw for every variant), with
d = acc(v) − acc(w) in each resample:

- **dominated**: v (not the baseline) against each w ≠ v that costs no more (the sweep's
  ``[pick] cost``); H0 "v loses at most the margin to w" (d ≥ −margin), p = the share of
  resamples with d ≥ −margin. Without adjustment, p < 0.05 is the same as "the upper
  one-sided 95% percentile bound of d lies below −margin".
- The p-values of the round's family are Holm-adjusted together (Holm 1979, through
  ``statsmodels.stats.multitest.multipletests``, as the report adjusts its comparisons).
- v is **retired** when one of its adjusted p-values is below 0.05. Its reason and reference
  are those of its smallest adjusted p-value (ties: the cheaper reference, then the name). The
  baseline is never retired.

Under the margin rule (``futility``), the default, the family holds only the tests that can
bear on that rule's pick, since every extra test in a Holm family costs the others power:

- a variant v that costs **more** than the baseline b is never recommended by the margin rule,
  so it is tested once, for **futility**: H0 "v gains at least the margin over b" (d ≥
  +margin with w = b), p = the share of resamples with d ≥ margin. Retired, it is shown to gain
  less than the margin, the difference the user said matters, for a higher cost. This is
  stopping a comparison early for futility, as group-sequential trials do (Jennison &
  Turnbull 2000, *Group Sequential Methods with Applications to Clinical Trials*, ch. 10;
  cited from memory).
- a variant v that costs **no more** than b keeps its domination tests against the variants
  that cost no more than it, and is also tested against b itself (**inferior**): H0 "v loses
  at most the margin to b", the non-inferiority question the margin rule asks, turned round.
  Retired, it is shown to lose more than the margin to the baseline, so the final sweep's
  lower bound would have to rise above the upper bound seen so far for it to qualify.

Under the one-standard-error rule (no ``futility``) the family is every domination pair: that
rule's reference is the best variant, and a costlier plan can be its pick.

Why the final pick does not change: if w costs no more than v and is better by more than the
margin, then w passes every test v passes (non-inferiority to the baseline, or being within a
tolerance of the best) and costs no more, so neither the margin rule nor the one-standard-error
rule (`decide`) would recommend v over w; a retired dominator is itself dominated by a cheaper,
better one, so the chain ends at a variant still in the race. Futility retires only variants
that cost more than the baseline, which the margin rule never recommends; an inferior variant
fails the very test the margin rule applies. These are statements about the truth behind the
evidence: each retirement is a test at the family's 5% level, not a certainty.

Known biases, stated on the card: a retired variant has fewer seeds, so its interval is wider;
after one seed the bootstrap has no seed level to resample, so the bound counts the images'
chance only, and a variant whose first seed was unlucky by more than the margin can be retired.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
import pandas as pd
from statsmodels.stats.multitest import multipletests

from kablate.analysis.bootstrap import N_RESAMPLES, resample_accuracies
from kablate.analysis.decide import ALPHA, Accuracy, accuracies
from kablate.analysis.evidence import Evidence, gather_evidence
from kablate.lifecycle import RETIRED, STOPPED
from kablate.results.columns import RETIRED_COLUMNS
from kablate.results.data_record import DataRecord

# Why a variant was retired: it loses more than the margin to a variant that costs no more;
# (futility) it costs more than the baseline and gains less than the margin over it; or
# (inferior) it costs no more than the baseline and loses more than the margin to it.
DOMINATED, FUTILE, INFERIOR = "dominated", "futile", "inferior"


@dataclass(frozen=True)
class Domination:
    """One tested pair: is ``name`` worse than ``by`` (which costs no more) by the margin;
    (``why`` = FUTILE, ``by`` the cheaper baseline) better than it by less than the margin; or
    (``why`` = INFERIOR, ``by`` the baseline, which costs more) worse than it by the margin?"""

    name: str
    by: str
    diff: float  # acc(name) − acc(by) on the compared seeds and images, a fraction
    upper: float  # one-sided 95% upper bound of that difference (bootstrap percentile)
    p_value: float  # one-sided, for H0: diff ≥ −margin (DOMINATED) or ≥ +margin (FUTILE)
    p_holm: float  # Holm-adjusted over every pair of the round
    why: str = DOMINATED

    @property
    def retires(self) -> bool:
        return self.p_holm < ALPHA


def compare_pairs(
    evidence: Evidence,
    costs: Mapping[str, float],
    baseline: str,
    margin: float,
    n_resamples: int = N_RESAMPLES,
    futility: bool = False,
) -> list[Domination]:
    """Every pair the rule tests (see the module docstring), with Holm-adjusted p-values.

    Args:
        evidence: the variants still in the race, on the seeds of the rounds so far.
        costs: each variant's cost; a variant whose cost is not finite is left out.
        margin: as a fraction (0.01 = 1 pp).
        futility: the margin rule's race: test each variant costlier than the baseline for
            futility only, and each other variant for inferiority to the baseline besides its
            domination tests (never under the one-standard-error rule; module docstring).
    """
    names = [n for n in evidence.names if math.isfinite(costs.get(n, math.nan))]
    if len(names) < 2:
        return []
    boot = resample_accuracies(evidence.correct, n_resamples)
    accuracy = evidence.accuracy
    pairs = []

    def test(v: str, w: str, bound: float, why: str) -> None:
        """H0: acc(v) − acc(w) ≥ bound; p = the share of resamples on H0's side."""
        i, j = evidence.index(v), evidence.index(w)
        d = boot[:, i] - boot[:, j]
        # The slack keeps a resample exactly at the bound (up to rounding) on H0's side.
        p = float(np.mean(d >= bound - 1e-12))
        upper = float(np.quantile(d, 1 - ALPHA))
        pairs.append((v, w, float(accuracy[i] - accuracy[j]), upper, p, why))

    decision = futility and baseline in names  # the margin rule's family (module docstring)
    for v in names:
        if v == baseline:
            continue
        if decision and costs[v] > costs[baseline]:
            test(v, baseline, margin, FUTILE)
            continue
        for w in names:
            if w != v and costs[w] <= costs[v]:
                test(v, w, -margin, DOMINATED)
        if decision and costs[baseline] > costs[v]:
            test(v, baseline, -margin, INFERIOR)
    if not pairs:
        return []
    adjusted = multipletests([pair[4] for pair in pairs], method="holm")[1]
    return [
        Domination(v, w, diff, upper, p, float(q), why)
        for (v, w, diff, upper, p, why), q in zip(pairs, adjusted, strict=True)
    ]


def retirements(
    evidence: Evidence,
    costs: Mapping[str, float],
    baseline: str,
    margin: float,
    n_resamples: int = N_RESAMPLES,
    futility: bool = False,
) -> dict[str, Domination]:
    """The variants the round retires, each with the pair that retires it."""
    out: dict[str, Domination] = {}
    tested = compare_pairs(evidence, costs, baseline, margin, n_resamples, futility)
    ranked = sorted(
        (d for d in tested if d.retires),
        key=lambda d: (d.p_holm, costs[d.by], d.by),
    )
    for found in ranked:
        out.setdefault(found.name, found)
    return out


def in_race(trials: pd.DataFrame) -> pd.Series:
    """Mask of the trial rows whose variant is still in the race (all True without racing):
    a variant is out once one of its planned trials reads ``retired`` for racing's reasons (not
    ``retired_why = "stopped"``: successive halving stopped that variant, analysis/halving.py)."""
    why = trials["retired_why"] if "retired_why" in trials else pd.Series(None, trials.index)
    out = set(trials.loc[(trials["status"] == RETIRED) & (why != STOPPED), "variant_id"])
    return ~trials["variant_id"].isin(out)


def put_retired(variants: pd.DataFrame, retired: pd.DataFrame) -> None:
    """The `RETIRED_COLUMNS` of every variant (in place; empty for a variant in the race).

    Args:
        retired: the trial rows of the retired variants, each with its ``retired`` entry
            (`trials.race.retired_variants`).
    """
    entries = {}
    if len(retired):
        entries = {r["variant_id"]: r["retired"] for r in retired.to_dict("records")}
    for column, key in RETIRED_COLUMNS.items():
        # a race recorded before futility existed retired by domination only
        default = DOMINATED if key == "why" else None
        values = [
            entries[v].get(key, default) if v in entries else None for v in variants["variant_id"]
        ]
        # a seed: an integer; names: text; figures: floats; each empty for a variant in the race
        kind = {"retired_after": "Int64", "retired_why": "string", "retired_by": "string"}.get(
            column, object
        )
        variants[column] = pd.array(values, dtype=kind)


def retired_accuracies(retired: pd.DataFrame, data: DataRecord, split: str) -> dict[str, Accuracy]:
    """Each retired variant's accuracy and bootstrap interval on its own finished seeds (fewer
    than the others': its interval is wider)."""
    out = {}
    for _, mine in retired.groupby("variant_id"):
        evidence = gather_evidence(mine, data, None, split)
        if evidence is not None:
            out.update(accuracies(evidence, resample_accuracies(evidence.correct)))
    return out
