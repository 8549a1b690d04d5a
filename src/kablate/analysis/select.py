"""Pick the recommended plan with the one-standard-error rule.

Breiman, Friedman, Olshen & Stone 1984; Hastie, Tibshirani & Friedman, *The Elements of
Statistical Learning*, 2nd ed., §7.10: among models whose estimated score is within one
standard error of the best one's, prefer the simplest. Here "simplest" is "cheapest by the
chosen cost" (MACs by default), the score is mean validation accuracy over seeds and the
standard error is the best variant's s / √n. Test accuracy is never looked at.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import pandas as pd

from kablate.errors import UsageError

# Only these columns may be read: validation statistics, costs and the name.
SELECTION_COLUMNS = ("variant", "n_seeds", "val_acc_mean", "val_acc_std")


@dataclass(frozen=True)
class Selection:
    recommended: str
    best: str  # highest mean validation accuracy
    threshold: float  # best mean − tolerance × best's standard error
    best_se: float
    cost: str  # the column minimised: macs, params or latency_ms
    within_se: float
    reason: str
    candidates: tuple[str, ...] = ()  # variants within the tolerance, cheapest first


def pct(x: float) -> str:
    return f"{100 * x:.2f}%"


def one_se_rule(variants: pd.DataFrame, cost: str = "macs", within_se: float = 1.0) -> Selection:
    """Apply the rule to a variants table with ``variant``, ``n_seeds``, ``val_acc_mean``,
    ``val_acc_std`` and the ``cost`` column.

    Variants with no finished seed are ignored. Ties in cost go to the more accurate, then to
    the smaller name. If the best variant has fewer than two seeds there is no standard error:
    the tolerance is zero, and the cheapest of the variants sharing the best mean is picked.

    Raises:
        ValueError: no variant has a finished seed.
        UsageError: the cost column is missing or not measured (e.g. latency).
    """
    label = {"macs": "MACs", "latency_ms": "latency"}.get(cost, cost)
    if cost not in variants.columns or variants[cost].isna().all():
        raise UsageError(
            f"the selection cost {label} was not measured for this sweep's variants; "
            "choose --cost macs or params (or [pick] cost in the sweep file)"
        )
    pool = variants[list(SELECTION_COLUMNS) + ([cost] if cost not in SELECTION_COLUMNS else [])]
    pool = pool[pool["n_seeds"] > 0]
    if pool.empty:
        raise ValueError("no variant has a finished trial yet")
    pool = pool.sort_values(["val_acc_mean", "variant"], ascending=[False, True])
    best = pool.iloc[0]
    n = int(best["n_seeds"])
    se = float(best["val_acc_std"]) / math.sqrt(n) if n >= 2 else float("nan")
    # Without a standard error (fewer than two seeds) the tolerance is zero: the rule keeps
    # the variants that share the best mean and takes the cheapest of them.
    threshold = float(best["val_acc_mean"]) - (within_se * se if math.isfinite(se) else 0.0)
    # The small slack keeps a variant whose mean equals the threshold up to rounding.
    ok = pool[(pool["val_acc_mean"] >= threshold - 1e-12) & pool[cost].notna()]
    ok = ok.sort_values([cost, "val_acc_mean", "variant"], ascending=[True, False, True])
    pick = ok.iloc[0]
    unit = "standard error" if within_se == 1 else "standard errors"
    if not math.isfinite(se):
        tied = f", the cheapest by {label} of the {len(ok)} that share it" if len(ok) > 1 else ""
        reason = (
            f"the best variant has fewer than 2 finished seeds, so there is no standard error "
            f"and the rule keeps only the best mean ({pct(best['val_acc_mean'])}){tied}"
        )
    elif pick["variant"] == best["variant"]:
        reason = (
            f"it has the best mean validation accuracy ({pct(best['val_acc_mean'])}), and no "
            f"cheaper variant by {label} comes within {within_se:g} {unit} "
            f"({100 * se:.2f} pp) of it"
        )
    else:
        reason = (
            f"it is the cheapest variant by {label} whose mean validation accuracy "
            f"({pct(pick['val_acc_mean'])}) is within {within_se:g} {unit} "
            f"({100 * se:.2f} pp) of the best, {best['variant']} ({pct(best['val_acc_mean'])})"
        )
    return Selection(
        pick["variant"],
        best["variant"],
        threshold,
        se,
        cost,
        within_se,
        reason,
        tuple(ok["variant"]),
    )
