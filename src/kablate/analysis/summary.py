"""Everything the report needs, computed once from a results folder's rows."""

from __future__ import annotations

from dataclasses import dataclass, field

import pandas as pd

from kablate.analysis.select import Selection, one_se_rule
from kablate.analysis.stats import PairedResult, paired_comparison
from kablate.analysis.tables import COST_COLUMNS, trial_frame, variant_frame


@dataclass
class Analysis:
    trials: pd.DataFrame
    variants: pd.DataFrame
    curves: pd.DataFrame
    baseline: str
    selection: Selection | None
    comparisons: dict[str, PairedResult] = field(default_factory=dict)
    grid: pd.DataFrame | None = None  # mean val acc pivoted over a 2-axis grid

    @property
    def n_missing(self) -> int:
        return int(self.variants["n_missing"].sum())


def analyze(
    rows: list[dict],
    curves: list[dict],
    plan: dict,
    grids: list[dict],
    cost: str = "macs",
    within_se: float = 1.0,
) -> Analysis:
    """Tables, fronts, the recommended plan and the baseline comparisons."""
    trials = trial_frame(rows)
    variants = variant_frame(trials, plan)
    base_id = plan["baseline"]
    baseline = variants.loc[variants["variant_id"] == base_id, "variant"].iloc[0]
    selection = None
    if (variants["n_seeds"] > 0).any():
        selection = one_se_rule(variants, COST_COLUMNS[cost], within_se)
    variants["recommended"] = variants["variant"] == (selection.recommended if selection else "")
    comparisons = compare_to_baseline(trials, variants, base_id)
    return Analysis(
        trials,
        variants,
        pd.DataFrame(curves),
        baseline,
        selection,
        comparisons,
        grid_table(variants, plan, grids),
    )


def compare_to_baseline(
    trials: pd.DataFrame, variants: pd.DataFrame, base_id: str
) -> dict[str, PairedResult]:
    done = trials[trials["status"] == "done"]

    def per_seed(vid: str) -> dict[int, float]:
        mine = done[done["variant_id"] == vid]
        return dict(zip(mine["seed"].astype(int), mine["val_acc"].astype(float), strict=True))

    base = per_seed(base_id)
    return {
        row.variant: paired_comparison(per_seed(row.variant_id), base)
        for row in variants.itertuples()
        if row.variant_id != base_id
    }


def grid_table(variants: pd.DataFrame, plan: dict, grids: list[dict]) -> pd.DataFrame | None:
    """Mean validation accuracy over the first grid with exactly two axes, else None."""
    for g, grid in enumerate(grids):
        if len(grid) != 2:
            continue
        rows, cols = list(grid)
        cells = {}
        for v in plan["variants"]:
            if v.get("grid") != g:
                continue
            axes = dict(v["axes"])
            acc = variants.loc[variants["variant_id"] == v["id"], "val_acc_mean"].iloc[0]
            cells[(axes[rows], axes[cols])] = acc
        table = pd.DataFrame(
            index=pd.Index(grid[rows], name=rows),
            columns=pd.Index(grid[cols], name=cols),
            dtype=float,
        )
        for (r, c), acc in cells.items():
            table.loc[r, c] = acc
        return table
    return None
