"""Everything the report needs, computed once from a results folder's rows.

The numbers a user acts on come from the per-image evidence: each variant's validation
accuracy and its interval, the comparisons with the baseline and the recommended plan
(`decide`). The per-seed table (`tables.variant_frame`) supplies counts, costs, seed spreads,
test accuracy and the fronts; its validation columns are then replaced by the evidence's.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from kablate.analysis.bootstrap import resample_accuracies
from kablate.analysis.decide import (
    Accuracy,
    Contrast,
    Decision,
    accuracies,
    contrasts,
    decide,
)
from kablate.analysis.erf import ErfMap
from kablate.analysis.evidence import Evidence, gather_evidence
from kablate.analysis.flags import variant_flags
from kablate.analysis.halving import HalvingAccount, put_stopped, stopped_variants
from kablate.analysis.power import Resolution, resolution_after
from kablate.analysis.race import in_race, put_retired, retired_accuracies
from kablate.analysis.stem import StemAtlas
from kablate.analysis.tables import (
    add_fronts,
    balanced_seeds,
    trial_frame,
    variant_frame,
)
from kablate.errors import UsageError
from kablate.lifecycle import DONE, FINISHED, SETTLED
from kablate.plans.expand import cell_name, grid_cells
from kablate.results.columns import CURVE_COLUMNS
from kablate.results.data_record import DataRecord
from kablate.spec.costs import COSTS
from kablate.spec.fields import Where, read_table
from kablate.spec.schema import PickSpec


@dataclass
class Analysis:
    trials: pd.DataFrame
    variants: pd.DataFrame
    curves: pd.DataFrame
    baseline: str
    pick: PickSpec  # the rule's settings, as used
    decision: Decision | None
    evidence: Evidence | None = None  # validation evidence on the compared seeds
    test_contrast: Contrast | None = None  # recommended vs baseline on test, reported only
    flags: dict[str, list[str]] = field(default_factory=dict)  # variant → warnings
    resolution: Resolution | None = None  # what the sweep could resolve
    grid: pd.DataFrame | None = None  # mean val acc pivoted over a 2-axis grid
    grid_ci_half: pd.DataFrame | None = None  # half-width of each cell's 95% CI, same shape
    erf: list[ErfMap] = field(default_factory=list)  # filled by the report, if it can
    erf_note: str = ""  # why there is no effective-receptive-field map, when there is none
    stem: StemAtlas | None = None  # what the stem learned, filled by the report, if it can
    stem_note: str = ""  # why there is no stem atlas, when there is none
    seeds: list[int] | None = None  # the seeds a partial sweep is compared on; None: all
    classes: tuple[str, ...] = ()
    # (row, column) positions in ``grid`` of the baseline's and the recommended plan's cells
    grid_marks: dict[str, list[tuple[int, int]]] = field(default_factory=dict)
    race: dict | None = None  # racing: {"rule", "rounds"} (`trials.race.race_summary`), or None
    halving: HalvingAccount | None = None  # successive halving (`halving.halving_account`)
    search: dict | None = None  # a [search] sweep's search.json (`trials.search_run`), or None

    @property
    def recommended(self) -> str | None:
        return self.decision.recommended if self.decision else None

    @property
    def n_missing(self) -> int:
        return int(self.variants["n_missing"].sum())

    @property
    def held_back(self) -> pd.Series:
        """Mask of the trials that finished at a seed outside ``seeds`` (left out to compare
        every variant on the same seeds); all False when nothing is held back."""
        t = self.trials
        if self.seeds is None:
            return pd.Series(False, index=t.index)
        return t["status"].eq(DONE) & ~t["seed"].astype(int).isin(self.seeds)

    @property
    def missing(self) -> pd.DataFrame:
        """The trials without a result yet: variant, seed, status."""
        t = self.trials
        return t.loc[~t["status"].isin(SETTLED), ["variant", "seed", "status"]]


def pick_settings(meta: dict, **overrides) -> PickSpec:
    """The selection rule's settings: the command line's (``overrides`` that are not None),
    else the sweep file's ``[pick]`` table, else the defaults of `PickSpec`."""
    raw = dict(meta.get("resolved", {}).get("pick", {}))
    raw.update({k: v for k, v in overrides.items() if v is not None})
    return read_table(PickSpec, raw, Where("the command line or [pick]").key("pick"))


def analyze(
    rows: list[dict],
    curves: list[dict],
    plan: dict,
    grids: list[dict],
    data: DataRecord,
    pick: PickSpec | None = None,
) -> Analysis:
    """Tables, fronts, the recommended plan and the baseline comparisons.

    Args:
        rows, curves: `ResultsFolder.rows` output.
        plan: the content of ``plan.json``.
        grids: the sweep's grids (``sweep.json``'s ``grids``).
        data: the data record (labels of the scored images, class names).
        pick: the selection rule's settings (default: the non-inferiority rule, 1 pp, MACs).
    """
    pick = pick or PickSpec()
    trials = trial_frame(rows)
    # Variants retired by racing have fewer seeds: they are left out of the seed balance and
    # the decision (analysis/race.py says why the pick cannot change), and shown on their own.
    racing = in_race(trials)
    # So are variants that successive halving stopped on a seed: an early score is not a
    # trained variant's (analysis/halving.py); the card lists them with their last score.
    compared = racing & ~stopped_variants(trials)
    seeds = balanced_seeds(trials[compared])
    variants = variant_frame(trials, plan, seeds=seeds)
    base_id = plan["baseline"]
    baseline = variants.loc[variants["variant_id"] == base_id, "variant"].iloc[0]
    curves_frame = pd.DataFrame(curves) if curves else pd.DataFrame(columns=list(CURVE_COLUMNS))
    evidence = gather_evidence(trials[compared], data, seeds)
    decision, resolution = None, None
    if evidence is not None and baseline in evidence.names:
        cost_col = COSTS[pick.cost].column
        costs = dict(zip(variants["variant"], variants[cost_col].astype(float), strict=True))
        if any(not math.isfinite(costs[n]) for n in evidence.names):
            raise UsageError(
                f"the selection cost {pick.cost} was not measured for this sweep's variants; "
                "choose --cost macs or params (or [pick] cost in the sweep file)"
            )
        decision = decide(
            evidence,
            {n: costs[n] for n in evidence.names},
            baseline,
            pick.rule,
            pick.margin / 100,
            pick.within_se,
            cost_col,
        )
        resolution = observed_resolution(evidence, decision)
        apply_decision(variants, decision)
    elif evidence is not None:  # no baseline to compare with yet: the accuracies still count
        put_accuracies(variants, accuracies(evidence, resample_accuracies(evidence.correct)), "val")
        add_fronts(variants)
    test_contrast = contrast_on_test(trials[compared], data, seeds, decision, variants)
    show_retired(variants, trials[~racing], data)
    put_stopped(variants, trials)
    variants["recommended"] = variants["variant"] == (decision.recommended if decision else "")
    flags = variant_flags(
        trials[trials["status"].isin(FINISHED)],
        curves_frame,
        dict(zip(evidence.names, evidence.n_correct.tolist(), strict=True)) if evidence else {},
        evidence.n_images if evidence else 0,
        len(evidence.seeds) if evidence else 0,
        data.n_classes,
    )
    variants["flags"] = ["; ".join(flags.get(n, [])) for n in variants["variant"]]
    return Analysis(
        trials,
        variants,
        curves_frame,
        baseline,
        pick,
        decision,
        evidence,
        test_contrast,
        flags,
        resolution,
        grid_table(variants, plan, grids),
        grid_table(variants, plan, grids, ci_half_width(variants)),
        seeds=seeds,
        classes=data.classes,
        grid_marks=grid_marks(
            variants,
            plan,
            grids,
            {"baseline": baseline, "recommended": decision.recommended if decision else None},
        ),
    )


def apply_decision(variants: pd.DataFrame, decision: Decision) -> None:
    """Put the evidence's numbers into the variants table (in place).

    ``val_acc_mean``, ``val_acc_se``, ``val_acc_ci_low`` and ``val_acc_ci_high`` become the
    accuracy over every (seed, image) pair and its two-level bootstrap standard error and 95%
    interval; ``val_acc_std`` stays the spread over seeds. The fronts are recomputed on them.
    """
    acc, found = decision.accuracy, decision.contrasts
    names = variants["variant"]
    put_accuracies(variants, acc, "val")
    variants["n_correct"] = [acc[n].n_correct if n in acc else pd.NA for n in names]
    variants["n_scored"] = [acc[n].n_scored if n in acc else pd.NA for n in names]
    for col, attr in (
        ("diff", "diff"),
        ("diff_ci_low", "low"),
        ("diff_ci_high", "high"),
        ("diff_lower_bound", "lower_bound"),
        ("p_value", "p_value"),
        ("p_holm", "p_holm"),
    ):
        variants[col] = [getattr(found[n], attr) if n in found else math.nan for n in names]
    variants["noninferior"] = [
        n in found and found[n].lower_bound > -decision.margin for n in names
    ]
    variants["pick_share"] = [
        decision.pick_share.get(n, 0.0) if n in acc else math.nan for n in names
    ]
    base_cost = variants.loc[names == decision.baseline, decision.cost].iloc[0]
    variants["cost_ratio"] = variants[decision.cost].astype(float) / float(base_cost)
    add_fronts(variants)


def put_accuracies(
    variants: pd.DataFrame, acc: dict[str, Accuracy], split: str, keep_others: bool = False
) -> None:
    """``<split>_acc_mean``, ``_se``, ``_ci_low`` and ``_ci_high`` from the evidence (in place):
    the accuracy over every (seed, image) pair, its bootstrap standard error and interval.
    Variants not in ``acc`` get NaN, or keep their values with ``keep_others``."""
    names = variants["variant"]
    for suffix, attr in (("mean", "mean"), ("se", "se"), ("ci_low", "low"), ("ci_high", "high")):
        column = f"{split}_acc_{suffix}"
        old = pd.Series(math.nan, index=variants.index)
        if keep_others and column in variants:
            old = variants[column]
        variants[column] = [getattr(acc[n], attr) if n in acc else old[i] for i, n in names.items()]


def show_retired(variants: pd.DataFrame, retired: pd.DataFrame, data: DataRecord) -> None:
    """What racing did (in place): the ``retired_*`` columns, and each retired variant's
    accuracy and correct count on its own seeds, then the fronts again."""
    put_retired(variants, retired)
    for split in ("val", "test"):
        acc = retired_accuracies(retired, data, split)
        put_accuracies(variants, acc, split, keep_others=True)
        if split == "val":
            for name, found in acc.items():
                at = variants["variant"] == name
                variants.loc[at, "n_correct"] = found.n_correct
                variants.loc[at, "n_scored"] = found.n_scored
    add_fronts(variants)


def observed_resolution(evidence: Evidence, decision: Decision) -> Resolution | None:
    """The smallest difference the sweep resolved with 80% power, from the median standard
    error of the comparisons with the baseline, and the observed disagreement rate."""
    if not decision.contrasts:
        return None
    se = float(np.median([c.se for c in decision.contrasts.values()]))
    n_pairs = evidence.correct.shape[1] * evidence.n_images
    disagreement = float(np.mean([c.n_discordant / n_pairs for c in decision.contrasts.values()]))
    return resolution_after(se, evidence.n_images, disagreement)


def contrast_on_test(
    trials: pd.DataFrame,
    data: DataRecord,
    seeds: list[int] | None,
    decision: Decision | None,
    variants: pd.DataFrame,
) -> Contrast | None:
    """Test accuracy from the test evidence, reported only: each variant's accuracy and
    bootstrap interval go into the variants table (in place), and the recommended plan is
    compared with the baseline. Returns that comparison (None when there is none)."""
    test = gather_evidence(trials, data, seeds, split="test")
    if test is None:
        return None
    boot = resample_accuracies(test.correct)
    put_accuracies(variants, accuracies(test, boot), "test")
    if decision is None or decision.keeps_baseline:
        return None
    if not {decision.recommended, decision.baseline} <= set(test.names):
        return None
    return contrasts(test, boot, decision.baseline)[decision.recommended]


def ci_half_width(variants: pd.DataFrame) -> pd.Series:
    """Half the width of each variant's 95% interval of validation accuracy."""
    return (variants["val_acc_ci_high"] - variants["val_acc_ci_low"]) / 2


def grid_table(
    variants: pd.DataFrame, plan: dict, grids: list[dict], values: pd.Series | None = None
) -> pd.DataFrame | None:
    """Mean validation accuracy (or ``values``, one per variant row) over the first grid with
    exactly two axes, else None.

    A cell is found by its grid coordinates, or by its cell name among a variant's aliases
    (a cell that builds the same network as an earlier plan is kept under that plan's name).
    """
    values = variants["val_acc_mean"] if values is None else values
    for g, grid in enumerate(grids):
        if len(grid) != 2:
            continue
        rows, cols = list(grid)
        table = pd.DataFrame(
            index=pd.Index(grid[rows], name=rows),
            columns=pd.Index(grid[cols], name=cols),
            dtype=float,
        )
        acc = dict(zip(variants["variant_id"], values, strict=True))
        by_name = {}
        for v in plan["variants"]:
            for name in (v["name"], *v.get("aliases", [])):
                by_name[name] = v["id"]
            if v.get("grid") == g:
                axes = dict(v["axes"])
                if rows in axes and cols in axes:
                    table.loc[axes[rows], axes[cols]] = acc[v["id"]]
        for cell in grid_cells({k: tuple(vals) for k, vals in grid.items()}):
            vid = by_name.get(cell_name(cell))
            if vid is not None:
                table.loc[cell[rows], cell[cols]] = acc[vid]
        return table
    return None


def grid_marks(
    variants: pd.DataFrame, plan: dict, grids: list[dict], names: dict[str, str | None]
) -> dict[str, list[tuple[int, int]]]:
    """For each role (e.g. "baseline") whose variant ``names`` gives, the (row, column)
    positions in `grid_table`'s table of the cells that variant fills (none when it is not in
    the grid; several when cells alias it). Found by `grid_table` itself, so they agree."""
    out = {}
    for role, name in names.items():
        if name is None:
            continue
        table = grid_table(variants, plan, grids, (variants["variant"] == name).astype(float))
        if table is None:
            return {}
        rows, cols = np.nonzero(table.to_numpy(dtype=float) == 1.0)
        out[role] = [(int(r), int(c)) for r, c in zip(rows, cols, strict=True)]
    return out
