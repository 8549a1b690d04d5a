"""The plan of one model, built by the user's factory (`kablate plan --model`).

It is a sweep's plan with a single variant, the unchanged model: the JSON and CSV carry the
same fields as `kablate.costs.plan_output` gives each variant of a sweep, plus ``model`` (the
factory, its keyword arguments and the input) and ``notes`` (what could not be measured).
"""

from __future__ import annotations

import csv
import io
import json
from dataclasses import dataclass, field

from kablate.costs.graph import GraphCost, graph_cost
from kablate.costs.plan_output import (
    CSV_COLUMNS,
    _cell,
    _wrap,
    cost_json,
    csv_cell,
    human,
    latency_json,
    layer_json,
)
from kablate.nets.factory import build_model

MODEL_ID = "model"  # the id of the one variant; its name is the factory


@dataclass(frozen=True)
class ModelPlan:
    factory: str
    kwargs: dict
    in_shape: tuple[int, int, int]
    batch_size: int
    cost: GraphCost
    warnings: tuple[str, ...] = field(default=())


def plan_model(factory: str, kwargs: dict, in_shape: tuple[int, int, int], batch_size: int):
    """Build the model that ``factory`` names (this imports and runs its code) and cost it."""
    model = build_model(factory, kwargs)
    return ModelPlan(factory, kwargs, in_shape, batch_size, graph_cost(model, in_shape, batch_size))


def model_variant_json(plan: ModelPlan, with_layers: bool = True) -> dict:
    out = {
        "id": MODEL_ID,
        "name": plan.factory,
        "plan": {},
        "aliases": [],
        **cost_json(plan.cost),
        "infer_mem_bytes": None,  # measured with the latency, not for a single model yet
        **latency_json(None),  # not measured for a single model yet
        "model": {
            "factory": plan.factory,
            "kwargs": plan.kwargs,
            "input": list(plan.in_shape),
            "batch_size": plan.batch_size,
        },
        "notes": list(plan.cost.notes),
    }
    if with_layers:
        out["layers"] = [layer_json(row) for row in plan.cost.layers]
    return out


def model_json(plan: ModelPlan) -> str:
    return json.dumps([model_variant_json(plan)], indent=2)


def model_csv(plan: ModelPlan) -> str:
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(CSV_COLUMNS)
    row = model_variant_json(plan, with_layers=False)
    writer.writerow([csv_cell(row[c]) for c in CSV_COLUMNS])
    return buf.getvalue()


def model_table(plan: ModelPlan) -> str:
    """One model's costs, its largest layers by MACs, and its notes; at most 100 columns."""
    cost = plan.cost
    c, h, w = plan.in_shape
    shape = "x".join(map(str, cost.out_hw)) if cost.out_hw else "?"
    memory = human(cost.act_mem_bytes) + "B" if cost.act_mem_bytes is not None else "?"
    lines = _wrap(f"model {plan.factory} on {c}x{h}x{w} (its factory's code was imported and run)")
    lines += [
        "costs before training; FLOPs = 2 x MACs",
        "",
        f"{'MACs':>8} {'FLOPs':>8} {'params':>8} {'rf':>5} {'jump':>4} {'map':>6} {'act mem':>9}",
        f"{human(cost.macs):>8} {human(cost.flops):>8} {human(cost.params):>8} "
        f"{_cell(cost.rf):>5} {_cell(cost.jump):>4} {shape:>6} {memory:>9}",
        "",
        "rf and jump: receptive field and effective stride at the map the head pools, in input",
        f"pixels. act mem: what one training step keeps for backward at batch {plan.batch_size}.",
        f"{len(cost.layers)} layers; --format json lists each with its shape, MACs and rf.",
    ]
    for note in cost.notes:
        lines += _wrap(f"note: {note}")
    return "\n".join(lines)
