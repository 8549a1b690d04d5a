"""Everything the report needs, computed once from a results folder's rows."""

from __future__ import annotations

from dataclasses import dataclass, field

import pandas as pd

from kablate.analysis.erf import ErfMap
from kablate.analysis.select import Selection, one_se_rule
from kablate.analysis.stats import PairedResult, paired_comparison
from kablate.analysis.tables import (
    COST_COLUMNS,
    FINISHED,
    balanced_seeds,
    trial_frame,
    variant_frame,
)
from kablate.plans.expand import cell_name, grid_cells

# The columns of curves.csv (kablate.trials.export.CURVE_COLUMNS), for an empty table.
CURVE_COLUMNS = ("variant", "seed", "epoch", "train_loss", "val_loss", "val_acc", "seconds")


@dataclass
class Analysis:
    trials: pd.DataFrame
    variants: pd.DataFrame
    curves: pd.DataFrame
    baseline: str
    selection: Selection | None
    comparisons: dict[str, PairedResult] = field(default_factory=dict)  # on validation accuracy
    grid: pd.DataFrame | None = None  # mean val acc pivoted over a 2-axis grid
    grid_ci_half: pd.DataFrame | None = None  # half-width of each cell's 95% CI, same shape
    test_comparison: PairedResult | None = None  # recommended vs baseline, on test accuracy
    erf: list[ErfMap] = field(default_factory=list)  # filled by the report, if it can
    erf_note: str = ""  # why there is no effective-receptive-field map, when there is none
    seeds: list[int] | None = None  # the seeds a partial sweep is compared on; None: all

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
        return t["status"].eq("done") & ~t["seed"].astype(int).isin(self.seeds)

    @property
    def missing(self) -> pd.DataFrame:
        """The trials without a result yet: variant, seed, status."""
        t = self.trials
        return t.loc[~t["status"].isin(FINISHED), ["variant", "seed", "status"]]


def analyze(
    rows: list[dict],
    curves: list[dict],
    plan: dict,
    grids: list[dict],
    cost: str = "macs",
    within_se: float = 1.0,
) -> Analysis:
    """Tables, fronts, the recommended plan and the baseline comparisons.

    Args:
        rows, curves: `kablate.trials.export.collect_trials` output.
        plan: the content of ``plan.json``.
        grids: the sweep's grids (``sweep.json``'s ``grids``).
        cost: ``macs``, ``params`` or ``latency``: what the recommended plan minimises.
        within_se: the selection rule's tolerance, in standard errors of the best variant.
    """
    trials = trial_frame(rows)
    seeds = balanced_seeds(trials)
    variants = variant_frame(trials, plan, seeds=seeds)
    base_id = plan["baseline"]
    baseline = variants.loc[variants["variant_id"] == base_id, "variant"].iloc[0]
    selection = None
    if (variants["n_seeds"] > 0).any():
        selection = one_se_rule(variants, COST_COLUMNS[cost], within_se)
    variants["recommended"] = variants["variant"] == (selection.recommended if selection else "")
    comparisons = compare_to_baseline(trials, variants, base_id, "val_acc")
    test_comparison = None
    if selection is not None and selection.recommended != baseline:
        rec_id = variants.loc[variants["recommended"], "variant_id"].iloc[0]
        test_comparison = paired_comparison(
            per_seed(trials, rec_id, "test_acc"), per_seed(trials, base_id, "test_acc")
        )
    return Analysis(
        trials,
        variants,
        pd.DataFrame(curves) if curves else pd.DataFrame(columns=list(CURVE_COLUMNS)),
        baseline,
        selection,
        comparisons,
        grid_table(variants, plan, grids),
        grid_ci_half=grid_table(variants, plan, grids, ci_half_width(variants)),
        test_comparison=test_comparison,
        seeds=seeds,
    )


def ci_half_width(variants: pd.DataFrame) -> pd.Series:
    """Half the width of each variant's 95% t-interval of validation accuracy (NaN at n < 2)."""
    return (variants["val_acc_ci_high"] - variants["val_acc_ci_low"]) / 2


def per_seed(trials: pd.DataFrame, vid: str, metric: str) -> dict[int, float]:
    """seed → metric of the variant's finished trials."""
    mine = trials[(trials["status"] == "done") & (trials["variant_id"] == vid)]
    return dict(zip(mine["seed"].astype(int), mine[metric].astype(float), strict=True))


def compare_to_baseline(
    trials: pd.DataFrame, variants: pd.DataFrame, base_id: str, metric: str
) -> dict[str, PairedResult]:
    base = per_seed(trials, base_id, metric)
    return {
        row.variant: paired_comparison(per_seed(trials, row.variant_id, metric), base)
        for row in variants.itertuples()
        if row.variant_id != base_id
    }


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
