"""Racing over seeds: which variants the seeds trained so far already rule out.

Racing is sequential elimination of candidates as evidence comes in (Maron & Moore 1994,
"Hoeffding races: accelerating model selection search for classification and function
approximation"; Birattari, Stützle, Paquete & Varrentrapp 2002, "A racing algorithm for
configuring metaheuristics", the F-race). Here the candidates are the variants, the evidence
is their per-image predictions, and a seed round is one step of the race.

The rule, applied after every complete seed round to the variants still in the race:

- For every ordered pair (v, w) with v not the baseline, w ≠ v and cost(w) ≤ cost(v) (the
  sweep's ``[pick] cost``), d = acc(v) − acc(w) in each resample of the report's paired
  two-level bootstrap (`bootstrap.resample_accuracies`: seeds, then images, the same draw for
  every variant).
- The one-sided bootstrap p-value of "v loses at most the margin to w" (H0: d ≥ −margin) is
  the share of resamples with d ≥ −margin. Without adjustment, p < 0.05 is the same as "the
  upper one-sided 95% percentile bound of d lies below −margin".
- The p-values of every pair of the round are Holm-adjusted together (Holm 1979, through
  ``statsmodels.stats.multitest.multipletests``, as the report adjusts its comparisons).
- v is **retired** when some pair's adjusted p-value is below 0.05: it is shown to lose more
  than the margin to a variant that costs no more. Its dominator is the w with the smallest
  adjusted p-value (ties: the cheaper, then the name). The baseline is never retired.
- **Futility** (only under the margin rule, which never recommends a plan that costs more
  than the baseline): a variant v that costs more than the baseline b is also tested on
  d = acc(v) − acc(b) for H0: d ≥ +margin ("v gains at least the margin"), p = the share of
  resamples with d ≥ margin, in the same Holm family. v is retired for futility when that
  adjusted p lies below 0.05: it is shown to gain less than the margin, the difference the
  user said matters, for a higher cost. This is stopping a comparison early for futility, as
  group-sequential trials do (Jennison & Turnbull 2000, *Group Sequential Methods with
  Applications to Clinical Trials*, ch. 10; cited from memory).

Why the final pick does not change: if w costs no more than v and is better by more than the
margin, then w passes every test v passes (non-inferiority to the baseline, or being within a
tolerance of the best) and costs no more, so neither the margin rule nor the one-standard-error
rule (`decide`) would recommend v over w; a retired dominator is itself dominated by a cheaper,
better one, so the chain ends at a variant still in the race. Futility retires only variants
that cost more than the baseline, which the margin rule never recommends; the one-standard-
error rule could (its reference is the best variant), so a race under it has no futility.

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

# Why a variant was retired: it loses more than the margin to a variant that costs no more, or
# (futility) it costs more than the baseline and gains less than the margin over it.
DOMINATED, FUTILE = "dominated", "futile"


@dataclass(frozen=True)
class Domination:
    """One tested pair: is ``name`` worse than ``by`` (which costs no more) by the margin, or
    (``why`` = FUTILE, ``by`` the cheaper baseline) better than it by less than the margin?"""

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
        futility: also test each variant costlier than the baseline for a gain under the
            margin (the margin rule's race; never under the one-standard-error rule).
    """
    names = [n for n in evidence.names if math.isfinite(costs.get(n, math.nan))]
    if len(names) < 2:
        return []
    boot = resample_accuracies(evidence.correct, n_resamples)
    accuracy = evidence.accuracy
    pairs = []
    for v in names:
        if v == baseline:
            continue
        for w in names:
            if w == v or costs[w] > costs[v]:
                continue
            i, j = evidence.index(v), evidence.index(w)
            d = boot[:, i] - boot[:, j]
            # The slack keeps a resample exactly at −margin (up to rounding) in H0's side.
            p = float(np.mean(d >= -margin - 1e-12))
            upper = float(np.quantile(d, 1 - ALPHA))
            pairs.append((v, w, float(accuracy[i] - accuracy[j]), upper, p, DOMINATED))
        if futility and baseline in names and costs[v] > costs[baseline]:
            i, j = evidence.index(v), evidence.index(baseline)
            d = boot[:, i] - boot[:, j]
            p = float(np.mean(d >= margin - 1e-12))
            upper = float(np.quantile(d, 1 - ALPHA))
            pairs.append((v, baseline, float(accuracy[i] - accuracy[j]), upper, p, FUTILE))
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
