"""The plan of a sweep as JSON, CSV or a terminal table (at most 100 columns)."""

from __future__ import annotations

import csv
import io
import json

from kablate.costs.catalog import Catalog, CostedVariant
from kablate.costs.static import LayerCost


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
        "rf": list(row.rf),
        "jump": list(row.jump),
    }


def variant_json(item: CostedVariant, with_layers: bool = True) -> dict:
    cost = item.cost
    out = {
        "id": item.variant.id,
        "name": item.name,
        "plan": item.variant.plan,
        "aliases": list(item.variant.aliases),
        "params": cost.params,
        "macs": cost.macs,
        "flops": cost.flops,
        "rf": cost.rf,
        "jump": cost.jump,
        "out_hw": list(cost.out_hw),
        "act_mem_bytes": cost.act_mem_bytes,
        "latency_ms": item.latency.batch1_ms if item.latency else None,
        "latency_batch_ms": item.latency.batch_ms if item.latency else None,
        "latency_threads": item.latency.threads if item.latency else None,
    }
    if with_layers:
        out["layers"] = [layer_json(row) for row in cost.layers]
    return out


def catalog_json(catalog: Catalog) -> str:
    return json.dumps([variant_json(v) for v in catalog.variants], indent=2)


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
    "plan",
)


def catalog_csv(catalog: Catalog) -> str:
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(CSV_COLUMNS)
    for item in catalog.variants:
        row = variant_json(item, with_layers=False)
        row["out_hw"] = "x".join(map(str, row["out_hw"]))
        row["plan"] = ";".join(f"{k}={v}" for k, v in row["plan"].items())
        writer.writerow([row[c] if row[c] is not None else "" for c in CSV_COLUMNS])
    return buf.getvalue()


def human(n: float) -> str:
    """12345678 → '12.3M'."""
    for unit, size in (("G", 1e9), ("M", 1e6), ("k", 1e3)):
        if abs(n) >= size:
            return f"{n / size:.1f}{unit}"
    return f"{n:.0f}"


def catalog_table(catalog: Catalog) -> str:
    """Variants sorted by MACs, cheapest first, with cost relative to the baseline."""
    sweep, base = catalog.sweep, catalog.baseline.cost
    c, h, w = catalog.in_shape
    lines = [
        f"sweep {sweep.name}: {len(catalog.variants)} variants x {len(sweep.seeds)} seeds "
        f"on {sweep.data.source} ({c}x{h}x{w}), batch {sweep.recipe.batch_size}",
        f"baseline: {catalog.baseline.name}   costs before training; FLOPs = 2 x MACs",
        "",
        f"{'variant':<30} {'MACs':>7} {'xbase':>6} {'params':>7} {'rf':>4} {'jump':>4} "
        f"{'map':>5} {'act mem':>8} {'lat ms':>7}",
        "-" * 86,
    ]
    for item in sorted(catalog.variants, key=lambda v: (v.cost.macs, v.cost.params, v.name)):
        cost = item.cost
        name = item.name if len(item.name) <= 30 else item.name[:29] + "~"
        mark = "*" if item is catalog.baseline else " "
        lat = f"{item.latency.batch1_ms:7.2f}" if item.latency else f"{'-':>7}"
        lines.append(
            f"{name:<29}{mark} {human(cost.macs):>7} {cost.macs / max(1, base.macs):>6.2f} "
            f"{human(cost.params):>7} {cost.rf:>4} {cost.jump:>4} "
            f"{cost.out_hw[0]:>2}x{cost.out_hw[1]:<2} {human(cost.act_mem_bytes) + 'B':>8} {lat}"
        )
    lines.append("-" * 86)
    lines.append("* baseline.  rf and jump at the head's global pool, in input pixels.")
    for item, reason in catalog.dropped:
        lines.append(f"dropped {item.name}: {reason}")
    for warning in dict.fromkeys(catalog.warnings):
        lines.append(f"warning: {warning}")
    return "\n".join(lines)
