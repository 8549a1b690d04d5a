"""How the variants stand so far: what `kablate status` shows of a sweep in progress.

Nothing is computed here: `summary.analyze` is run on the rows the study holds now, exactly as
the report would run it, and this module only keeps what a look at a running sweep needs. Each
variant's validation accuracy and its 95% interval therefore come from the per-image evidence
on the seeds every variant with a result has finished (`tables.balanced_seeds`), and the leader
is the plan the sweep's ``[pick]`` rule picks from that evidence. The leader is provisional as
long as a planned trial has no result: more seeds narrow the intervals and can change the pick.
Reading predictions and labels only (never a checkpoint or an image) keeps `status` fast.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

from kablate.analysis.summary import Analysis, analyze
from kablate.lifecycle import DONE
from kablate.results.data_record import DataRecord
from kablate.spec.schema import PickSpec

COUNT_COLUMNS = ("n_seeds", "n_planned")
ACCURACY_COLUMNS = ("val_acc_mean", "val_acc_ci_low", "val_acc_ci_high")  # fractions


@dataclass
class Standing:
    """The variants' accuracy so far and the leader under the sweep's rule."""

    rule: str
    margin_pp: float  # the rule's margin, in percentage points
    cost: str
    baseline: str | None
    leader: str | None  # None: no leader yet (``note`` says why)
    provisional: bool  # a planned trial has no result yet
    n_missing: int  # planned trials without a result (waiting, running, failed)
    seeds: list[int] | None  # the seeds compared on; None: every finished seed
    # `Decision.stability`: share of bootstrap resamples (margin) or of leave-one-seed-out
    # reruns (one-se) that pick the leader; None without one
    stability: float | None
    note: str  # what the leader means, or why there is none
    # "predictions": accuracy over (seed, image) pairs with a two-level bootstrap interval;
    # "seeds": the mean and t interval of the seeds' accuracies (no shared seed yet)
    accuracy_from: str = "predictions"
    # per variant: variant, n_seeds (in the mean), n_planned, val_acc_mean, _ci_low, _ci_high
    variants: list[dict] = field(default_factory=list)


def stand(
    rows: list[dict],
    curves: list[dict],
    plan: dict,
    grids: list[dict],
    data: DataRecord,
    pick: PickSpec,
) -> Standing:
    """The standing of a (possibly partial) sweep from `ResultsFolder.rows` output.

    Args:
        plan, grids, data: ``plan.json``, ``sweep.json``'s ``grids``, the data record.
        pick: the selection rule's settings (`summary.pick_settings`).

    Raises:
        KablateError: what `analyze` raises (an older folder without predictions, a selection
            cost that was not measured).
    """
    analysis = analyze(rows, curves, plan, grids, data, pick)
    decision = analysis.decision
    variants = [
        {
            "variant": r["variant"],
            **{c: int(r[c]) for c in COUNT_COLUMNS},
            **{c: number(r[c]) for c in ACCURACY_COLUMNS},
        }
        for r in analysis.variants.to_dict("records")
    ]
    stability = number(decision.stability) if decision else None
    return Standing(
        rule=pick.rule,
        margin_pp=pick.margin,
        cost=pick.cost,
        baseline=analysis.baseline,
        leader=analysis.recommended,
        provisional=analysis.n_missing > 0,
        n_missing=analysis.n_missing,
        seeds=analysis.seeds,
        stability=stability,
        note=leader_note(analysis),
        accuracy_from="predictions" if analysis.evidence is not None else "seeds",
        variants=variants,
    )


def leader_note(analysis: Analysis) -> str:
    """What the leader means under the rule, or why there is no leader yet."""
    pick, decision, base = analysis.pick, analysis.decision, analysis.baseline
    if decision is None:
        trials = analysis.trials
        if not (trials["status"] == DONE).any():
            return "no leader yet: no trial has finished"
        if not ((trials["variant"] == base) & (trials["status"] == DONE)).any():
            return (
                f"no leader yet: the baseline {base} has no finished trial, and the {pick.rule} "
                "rule compares every plan with it"
            )
        return (
            f"no leader yet: the baseline {base} and the other variants with a result share no "
            "finished seed, and the rule compares them on the same seeds"
        )
    if pick.rule == "one-se":
        rule = (
            f"the cheapest by {pick.cost} within {pick.within_se:g} standard error(s) of the "
            "most accurate variant"
        )
    else:
        rule = (
            f"the cheapest by {pick.cost} shown to lose less than {pick.margin:g} pp against "
            f"the baseline {base}, else the baseline"
        )
    return f"{rule}; on {decision.n_seeds} seed(s) × {decision.n_images} validation images"


def number(value) -> float | None:
    """A table cell as a JSON-safe number: NaN and missing become None."""
    if value is None or math.isnan(float(value)):
        return None
    return float(value)
