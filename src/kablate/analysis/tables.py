"""Per-trial and per-variant tables (pandas), the numbers every plot and the report draw on."""

from __future__ import annotations

import math

import pandas as pd

from kablate.analysis.pareto import pareto_front
from kablate.analysis.stats import t_interval
from kablate.costs.memory import weight_bytes
from kablate.costs.plan_output import LATENCY_FIELDS, ORT_FIELDS
from kablate.lifecycle import DIVERGED, DONE, FINISHED, SETTLED
from kablate.plans.expand import plan_text
from kablate.spec.costs import COSTS

# Latency fields that hold a mapping or a list, not one figure per variant
LISTS = ("conv_backends", "latency_input")


def trial_frame(rows: list[dict]) -> pd.DataFrame:
    """One row per (variant, seed) of the plan, whatever its status."""
    frame = pd.DataFrame(rows)
    for col in ("val_acc", "test_acc", "train_seconds", "samples_per_second"):
        if col not in frame:
            frame[col] = math.nan
        frame[col] = pd.to_numeric(frame[col], errors="coerce")
    for col in ("variant_id", "status"):
        if col not in frame:
            frame[col] = pd.Series(dtype=object)
    return frame


def balanced_seeds(trials: pd.DataFrame) -> list[int] | None:
    """The seeds to compare variants on when a sweep is partial, else None (use all).

    Every seed contributes its own offset to all variants alike (same data order and
    augmentation), so means over different seed sets do not compare: a variant that has only
    finished a lucky seed would look better than one that has also finished an unlucky one.
    When the variants with a result have not finished the same seeds, the statistics use the
    seeds that all of them have finished (the runner orders trials seed by seed, so a sweep cut
    short still has some). None when the seed sets agree, or when they share no seed.
    """
    finished = trials[trials["status"].isin(FINISHED)]
    sets = [set(g["seed"].astype(int)) for _, g in finished.groupby("variant_id")]
    if not sets or all(s == sets[0] for s in sets):
        return None
    common = set.intersection(*sets)
    return sorted(common) or None


def variant_frame(
    trials: pd.DataFrame, plan: dict, confidence: float = 0.95, seeds: list[int] | None = None
) -> pd.DataFrame:
    """One row per variant of ``plan``: accuracy statistics over finished seeds (only those in
    ``seeds``, when given), costs and Pareto flags. ``n_missing`` counts the planned trials with
    no result yet, ``n_held_back`` the finished ones left out because their seed is not in
    ``seeds``."""
    out = []
    for v in plan["variants"]:
        mine = trials[trials["variant_id"] == v["id"]]
        done = mine[mine["status"] == DONE]
        held = mine[mine["status"].isin(FINISHED)]
        if seeds is not None:
            done = done[done["seed"].astype(int).isin(seeds)]
            held = held[~held["seed"].astype(int).isin(seeds)]
        else:
            held = held.iloc[0:0]
        val = t_interval(done["val_acc"].tolist(), confidence)
        test = t_interval(done["test_acc"].tolist(), confidence)
        out.append(
            {
                "variant": v["name"],
                "variant_id": v["id"],
                "n_seeds": val.n,
                "n_planned": len(plan["seeds"]),
                "n_missing": int((~mine["status"].isin(SETTLED)).sum()),
                "n_diverged": int((mine["status"] == DIVERGED).sum()),
                "n_held_back": len(held),
                "val_acc_mean": val.mean,
                "val_acc_std": val.std,
                "val_acc_se": val.se,
                "val_acc_ci_low": val.low,
                "val_acc_ci_high": val.high,
                "test_acc_n": test.n,
                "test_acc_mean": test.mean,
                "test_acc_std": test.std,
                "test_acc_ci_low": test.low,
                "test_acc_ci_high": test.high,
                "params": v["params"],
                "macs": v["macs"],
                "flops": v["flops"],
                "rf": v["rf"],
                "act_mem_bytes": v.get("act_mem_bytes"),
                "infer_mem_bytes": v.get("infer_mem_bytes"),
                "weight_bytes_fp32": weight_bytes(v["params"], "fp32"),
                "weight_bytes_int8": weight_bytes(v["params"], "int8"),
                **{f: v.get(f) for f in LATENCY_FIELDS + ORT_FIELDS if f not in LISTS},
                "train_seconds_mean": float(done["train_seconds"].mean())
                if len(done)
                else math.nan,
                "plan": plan_text(v["plan"]),
            }
        )
    frame = pd.DataFrame(out)
    for cost in COSTS.values():
        frame[cost.column] = pd.to_numeric(frame[cost.column], errors="coerce")
    add_fronts(frame)
    return frame


def measured_costs(frame: pd.DataFrame) -> list[str]:
    """The costs a front is drawn for: those every variant with a result has (params and MACs
    always; latency when measured; activation memory when the plan records it)."""
    ready = frame[frame["n_seeds"] > 0]
    return [
        c.name
        for c in COSTS.values()
        if c.always or (len(ready) > 0 and ready[c.column].notna().all())
    ]


def add_fronts(frame: pd.DataFrame) -> None:
    """Add a boolean ``front_<cost>`` for every cost of `COSTS` (None where that cost was not
    measured) and ``front_all`` (every measured cost at once). Only variants with a finished
    seed can be on a front."""
    sub = frame[frame["n_seeds"] > 0]
    names = sub["variant"].tolist()
    acc = sub["val_acc_mean"].tolist()
    costs = measured_costs(frame)
    for cost in COSTS:
        col = COSTS[cost].front
        if cost not in costs:
            frame[col] = None
            continue
        flags = pareto_front(acc, [[float(c)] for c in sub[COSTS[cost].column]], names)
        frame[col] = False
        frame.loc[sub.index, col] = flags
        frame[col] = frame[col].astype(bool)
    cols = [COSTS[c].column for c in costs]
    flags = pareto_front(acc, sub[cols].astype(float).values.tolist(), names)
    frame["front_all"] = False
    frame.loc[sub.index, "front_all"] = flags
    frame["front_all"] = frame["front_all"].astype(bool)
