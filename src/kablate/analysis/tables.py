"""Per-trial and per-variant tables (pandas), the numbers every plot and the report draw on."""

from __future__ import annotations

import math

import pandas as pd

from kablate.analysis.pareto import pareto_front
from kablate.analysis.stats import t_interval

COST_COLUMNS = {"params": "params", "macs": "macs", "latency": "latency_ms"}


def trial_frame(rows: list[dict]) -> pd.DataFrame:
    frame = pd.DataFrame(rows)
    for col in ("val_acc", "test_acc", "train_seconds", "samples_per_second"):
        frame[col] = pd.to_numeric(frame[col], errors="coerce")
    return frame


def variant_frame(trials: pd.DataFrame, plan: dict, confidence: float = 0.95) -> pd.DataFrame:
    """One row per variant of ``plan``: accuracy statistics over finished seeds, costs and
    Pareto flags. Unfinished trials are counted in ``n_missing``."""
    out = []
    for v in plan["variants"]:
        mine = trials[trials["variant_id"] == v["id"]]
        done = mine[mine["status"] == "done"]
        val = t_interval(done["val_acc"].tolist(), confidence)
        test = t_interval(done["test_acc"].tolist(), confidence)
        out.append(
            {
                "variant": v["name"],
                "variant_id": v["id"],
                "n_seeds": val.n,
                "n_missing": int((~mine["status"].isin(["done", "diverged"])).sum()),
                "n_diverged": int((mine["status"] == "diverged").sum()),
                "val_acc_mean": val.mean,
                "val_acc_std": val.std,
                "val_acc_ci_low": val.low,
                "val_acc_ci_high": val.high,
                "test_acc_mean": test.mean,
                "test_acc_std": test.std,
                "test_acc_ci_low": test.low,
                "test_acc_ci_high": test.high,
                "params": v["params"],
                "macs": v["macs"],
                "flops": v["flops"],
                "rf": v["rf"],
                "act_mem_bytes": v["act_mem_bytes"],
                "latency_ms": v.get("latency_ms"),
                "train_seconds_mean": float(done["train_seconds"].mean())
                if len(done)
                else math.nan,
                "plan": ";".join(f"{k}={s}" for k, s in v["plan"].items()),
            }
        )
    frame = pd.DataFrame(out)
    frame["latency_ms"] = pd.to_numeric(frame["latency_ms"], errors="coerce")
    add_fronts(frame)
    return frame


def add_fronts(frame: pd.DataFrame) -> None:
    """Add ``front_params``, ``front_macs``, ``front_latency`` (when measured) and
    ``front_all`` (all measured costs at once); only variants with a finished seed count."""
    ready = frame["n_seeds"] > 0
    costs = ["params", "macs"] + (["latency"] if frame["latency_ms"].notna().all() else [])
    sub = frame[ready]
    names = sub["variant"].tolist()
    acc = sub["val_acc_mean"].tolist()
    for cost in costs:
        col = COST_COLUMNS[cost]
        flags = pareto_front(acc, [[c] for c in sub[col].tolist()], names)
        frame[f"front_{cost}"] = False
        frame.loc[sub.index, f"front_{cost}"] = flags
    cols = [COST_COLUMNS[c] for c in costs]
    flags = pareto_front(acc, sub[cols].values.tolist(), names)
    frame["front_all"] = False
    frame.loc[sub.index, "front_all"] = flags
