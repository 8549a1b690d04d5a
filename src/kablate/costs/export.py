"""The plan of a sweep as JSON, CSV or a terminal table (at most 100 columns)."""

from __future__ import annotations

import csv
import io
import json
import textwrap

from kablate.costs.catalog import Catalog, CostedVariant
from kablate.costs.graph import GraphCost
from kablate.costs.static import LayerCost, StaticCost
from kablate.nets.model_variant import ModelVariant
from kablate.plans.expand import plan_text


def layer_json(row: LayerCost) -> dict:
    layer = row.layer
    return {
        "name": layer.name,
        "kind": layer.kind,
        "in_ch": layer.in_ch,
        "out_ch": layer.out_ch,
        "kernel": list(layer.kernel),
        "stride": list(layer.stride),
        "padding": list(layer.padding),
        "dilation": list(layer.dilation),
        "groups": layer.groups,
        "in_hw": list(layer.in_hw),
        "out_hw": list(layer.out_hw),
        "params": row.params,
        "macs": row.macs,
        "rf": list(row.rf) if row.rf is not None else None,  # None: unknown (foreign models)
        "jump": list(row.jump) if row.jump is not None else None,
    }


def cost_json(cost: StaticCost | GraphCost) -> dict:
    """The cost fields of a variant, shared by sweeps and by a single model (`--model`)."""
    return {
        "params": cost.params,
        "macs": cost.macs,
        "flops": cost.flops,
        "rf": cost.rf,
        "jump": cost.jump,
        "out_hw": list(cost.out_hw) if cost.out_hw is not None else None,
        "act_mem_bytes": cost.act_mem_bytes,
    }


def variant_json(item: CostedVariant, with_layers: bool = True) -> dict:
    cost = item.cost
    out = {
        "id": item.variant.id,
        "name": item.name,
        "plan": item.variant.plan,
        "aliases": list(item.variant.aliases),
        **cost_json(cost),
        "latency_ms": item.latency.batch1_ms if item.latency else None,
        "latency_batch_ms": item.latency.batch_ms if item.latency else None,
        "latency_threads": item.latency.threads if item.latency else None,
    }
    if isinstance(item.blueprint, ModelVariant):  # a [model] sweep: whose code, what changed
        out["model"] = {"factory": item.blueprint.factory, "arguments": item.blueprint.arguments}
        out["rewrites"] = dict(item.blueprint.changes)
        out["initialisation"] = dict(item.blueprint.inits)
    if with_layers:
        out["layers"] = [layer_json(row) for row in cost.layers]
    return out


def catalog_json(catalog: Catalog) -> str:
    return json.dumps([variant_json(v) for v in catalog.variants], indent=2)


def catalogs_json(planned: list[tuple[object, Catalog | Exception]]) -> str:
    """Several sweep files: a list with one object per file, in the order given. A planned
    file is ``{"file", "sweep", "variants"}`` (`variants` as `catalog_json`), a refused one
    ``{"file", "error"}``."""
    out = []
    for path, catalog in planned:
        if isinstance(catalog, Catalog):
            variants = [variant_json(v) for v in catalog.variants]
            out.append({"file": str(path), "sweep": catalog.sweep.name, "variants": variants})
        else:
            out.append({"file": str(path), "error": str(catalog)})
    return json.dumps(out, indent=2)


CSV_COLUMNS = (
    "id",
    "name",
    "params",
    "macs",
    "flops",
    "rf",
    "jump",
    "out_hw",
    "act_mem_bytes",
    "latency_ms",
    "latency_batch_ms",
    "latency_threads",
    "plan",
)


def _csv_cells(item: CostedVariant) -> list:
    row = variant_json(item, with_layers=False)
    row["out_hw"] = "x".join(map(str, row["out_hw"])) if row["out_hw"] else ""
    row["plan"] = plan_text(row["plan"])
    return [row[c] if row[c] is not None else "" for c in CSV_COLUMNS]


def catalog_csv(catalog: Catalog) -> str:
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(CSV_COLUMNS)
    writer.writerows(_csv_cells(item) for item in catalog.variants)
    return buf.getvalue()


def catalogs_csv(planned: list[tuple[object, Catalog | Exception]]) -> str:
    """Several sweep files: one CSV, the columns of `catalog_csv` after a first `file` column;
    a refused file has no rows (its error goes to stderr)."""
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(("file", *CSV_COLUMNS))
    for path, catalog in planned:
        if isinstance(catalog, Catalog):
            writer.writerows([str(path), *_csv_cells(item)] for item in catalog.variants)
    return buf.getvalue()


def human(n: float) -> str:
    """12345678 → '12.3M'."""
    for unit, size in (("G", 1e9), ("M", 1e6), ("k", 1e3)):
        if abs(n) >= size:
            return f"{n / size:.1f}{unit}"
    return f"{n:.0f}"


TABLE_WIDTH = 100
NAME_WIDTH = 28


def _wrap(text: str) -> list[str]:
    return textwrap.wrap(text, TABLE_WIDTH, subsequent_indent="    ", break_on_hyphens=False)


def _latency_cells(item: CostedVariant) -> str:
    if item.latency is None:
        return f"{'-':>7} {'-':>8}"
    return f"{item.latency.batch1_ms:7.2f} {item.latency.batch_ms:8.2f}"


def _cell(value) -> str:
    """A cost that may be unknown (a step of a user's model that cannot be followed)."""
    return "?" if value is None else str(value)


def catalog_table(catalog: Catalog) -> str:
    """Variants sorted by MACs (then params), cheapest first, with cost relative to the
    baseline; at most 100 columns. A name too long for its column gets a line of its own."""
    sweep, base = catalog.sweep, catalog.baseline.cost
    c, h, w = catalog.in_shape
    batch = sweep.recipe.batch_size
    lines = _wrap(
        f"sweep {sweep.name}: {len(catalog.variants)} variants x {len(sweep.seeds)} seeds on "
        f"{sweep.data.source} ({c}x{h}x{w}), batch {batch}"
    )
    if sweep.model is not None:  # the one key that runs code: say so wherever the plan shows
        lines += _wrap(
            f"model: {sweep.model.factory} (model.factory); planning imported and ran its code"
        )
    lines += _wrap(f"costs before training, baseline {catalog.baseline.name} (*); FLOPs = 2 x MACs")
    lines += [
        "",
        f"{'variant':<{NAME_WIDTH + 1}} {'MACs':>7} {'xbase':>6} {'params':>7} {'rf':>4} "
        f"{'jump':>4} {'map':>5} {'act mem':>8} {'ms @1':>7} {f'ms @{batch}':>8}",
    ]
    rule = "-" * len(lines[-1])
    lines.append(rule)
    for item in sorted(catalog.variants, key=lambda v: (v.cost.macs, v.cost.params, v.name)):
        cost = item.cost
        mark = "*" if item is catalog.baseline else " "
        name = item.name
        if len(name) > NAME_WIDTH:
            lines += textwrap.wrap(f"{name}{mark}".rstrip(), TABLE_WIDTH)
            name = ""
        shape = "x".join(map(str, cost.out_hw)) if cost.out_hw else "?"
        memory = human(cost.act_mem_bytes) + "B" if cost.act_mem_bytes is not None else "?"
        lines.append(
            f"{name:<{NAME_WIDTH}}{mark} {human(cost.macs):>7} "
            f"{cost.macs / max(1, base.macs):>6.2f} {human(cost.params):>7} {_cell(cost.rf):>4} "
            f"{_cell(cost.jump):>4} {shape:>5} {memory:>8} "
            f"{_latency_cells(item)}"
        )
    lines.append(rule)
    lines += _wrap(
        "rf and jump: receptive field and effective stride at the input of the head's global "
        "pool, in input pixels. map: the feature map pooled there. act mem: what one training "
        f"step keeps for backward at batch {batch}. ms: CPU latency (--latency)."
    )
    if any(item.latency for item in catalog.variants):
        lat = next(item.latency for item in catalog.variants if item.latency)
        lines += _wrap(
            f"latency: median of {lat.repeats} timed passes at batch 1 and {lat.batch_repeats} "
            f"at batch {lat.batch_size}, eval mode, {lat.threads} threads"
        )
    for item in catalog.variants:
        if item.variant.aliases:
            lines += _wrap(f"same network: {item.name} = {', '.join(item.variant.aliases)}")
    for item, reason in catalog.dropped:
        lines += _wrap(f"dropped {item.name}: {reason}")
    inits = {i for item in catalog.variants for _, i in getattr(item.blueprint, "inits", ())}
    for init in sorted(inits):
        lines += _wrap(f"rewritten convs initialised as {init} (--format json: per conv)")
    for warning in catalog.warnings:
        lines += _wrap(f"warning: {warning}")
    return "\n".join(lines)
