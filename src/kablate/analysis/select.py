"""Pick the recommended plan with the one-standard-error rule.

Breiman, Friedman, Olshen & Stone 1984; Hastie, Tibshirani & Friedman, *The Elements of
Statistical Learning*, 2nd ed., §7.10: among models whose estimated score is within one
standard error of the best one's, prefer the simplest. Here "simplest" is "cheapest by the
chosen cost" (MACs by default), and the score is mean validation accuracy over seeds.
Test accuracy is never looked at.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import pandas as pd


@dataclass(frozen=True)
class Selection:
    recommended: str
    best: str  # highest mean validation accuracy
    threshold: float  # best mean − tolerance × best's standard error
    best_se: float
    cost: str
    within_se: float
    reason: str


def one_se_rule(variants: pd.DataFrame, cost: str = "macs", within_se: float = 1.0) -> Selection:
    """Apply the rule to a variants table with ``val_acc_mean``, ``val_acc_std``,
    ``n_seeds``, ``variant`` and the ``cost`` column. Variants with no finished seed are
    ignored; ties in cost go to the more accurate, then to the smaller name."""
    pool = variants[variants["n_seeds"] > 0].copy()
    if pool.empty:
        raise ValueError("no variant has a finished trial yet")
    pool = pool.sort_values(["val_acc_mean", "variant"], ascending=[False, True])
    best = pool.iloc[0]
    n = int(best["n_seeds"])
    se = float(best["val_acc_std"]) / math.sqrt(n) if n >= 2 else float("nan")
    if not math.isfinite(se):
        return Selection(
            best["variant"],
            best["variant"],
            float(best["val_acc_mean"]),
            se,
            cost,
            within_se,
            "the best variant has fewer than 2 seeds, so no standard error: the "
            "most accurate variant is recommended",
        )
    threshold = float(best["val_acc_mean"]) - within_se * se
    ok = pool[pool["val_acc_mean"] >= threshold - 1e-12]
    ok = ok.sort_values([cost, "val_acc_mean", "variant"], ascending=[True, False, True])
    pick = ok.iloc[0]
    if pick["variant"] == best["variant"]:
        reason = (
            f"it has the best mean validation accuracy, and no cheaper variant (by "
            f"{cost}) comes within {within_se:g} standard error of it"
        )
    else:
        reason = (
            f"it is the cheapest variant by {cost} whose mean validation accuracy "
            f"({pick['val_acc_mean']:.4f}) is within {within_se:g} standard error "
            f"({se:.4f}) of the best, {best['variant']} ({best['val_acc_mean']:.4f})"
        )
    return Selection(pick["variant"], best["variant"], threshold, se, cost, within_se, reason)
