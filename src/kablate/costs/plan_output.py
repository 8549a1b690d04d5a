"""The plan of a sweep as JSON, CSV or a terminal table (at most 100 columns)."""

from __future__ import annotations

import csv
import io
import json
import textwrap

from kablate.costs.catalog import Catalog, CostedVariant
from kablate.costs.graph import GraphCost
from kablate.costs.latency import NOISY_IQR_RATIO, Latency, Timing, crosses_backends
from kablate.costs.static import LayerCost, StaticCost
from kablate.nets.model_variant import ModelVariant
from kablate.plans.expand import plan_text
from kablate.spec.costs import COSTS, Cost


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


def timing_fields(cost: Cost) -> tuple[str, ...]:
    """The fields of a timed cost (`Cost.timing`): median, first and third quartile at batch 1
    (its median is the cost's `column`, the figure a selection on it uses), then the same at
    ``latency_batch_size``."""
    return tuple(cost.timing(stat, batch) for batch in (False, True) for stat in ("", "q1", "q3"))


LATENCY_FIELDS = (
    *timing_fields(COSTS["latency"]),
    "latency_noisy",
    "latency_rounds",
    "latency_batch_size",
    "latency_threads",
    "latency_torch",
    "conv_backends",
    "crosses_backends",
    "latency_input",  # C, H, W of the timed input: the data's, or [target] input
)
# ONNX Runtime's figures, taken in the same rounds as torch's (the `onnx` extra); where it was
# not measured, `ort_absent` says why.
ORT_FIELDS = (
    *timing_fields(COSTS["ort_latency"]),
    "ort_latency_noisy",
    "onnxruntime_version",
    "ort_absent",
)


def timing_json(cost: Cost, one: Timing, many: Timing) -> dict:
    """The medians and quartiles at batch 1 and at the batch size, under the fields the timed
    ``cost`` names (`Cost.timing`)."""
    values = (one.median_ms, one.q1_ms, one.q3_ms, many.median_ms, many.q1_ms, many.q3_ms)
    return dict(zip(timing_fields(cost), values, strict=True))


def latency_json(latency: Latency | None, baseline: Latency | None = None) -> dict:
    """The latency fields of a variant (all None when not measured); ``crosses_backends``
    compares its conv backends with ``baseline``'s."""
    if latency is None:
        return dict.fromkeys(LATENCY_FIELDS + ORT_FIELDS)
    return {
        **ort_json(latency),
        **timing_json(COSTS["latency"], latency.batch1, latency.batch),
        "latency_noisy": latency.noisy,
        "latency_rounds": latency.batch1.n,
        "latency_batch_size": latency.batch_size,
        "latency_threads": latency.threads,
        "latency_torch": latency.torch_version,
        "conv_backends": dict(latency.backends),
        "crosses_backends": crosses_backends(latency, baseline) if baseline else None,
        "latency_input": list(latency.in_shape) or None,
    }


def ort_json(latency: Latency) -> dict:
    """ONNX Runtime's fields of a measured variant (None, and the reason, where absent)."""
    ort = latency.ort
    if ort is None:
        return dict(dict.fromkeys(ORT_FIELDS), ort_absent=latency.ort_absent)
    return {
        **timing_json(COSTS["ort_latency"], ort.batch1, ort.batch),
        "ort_latency_noisy": ort.noisy,
        "onnxruntime_version": ort.version,
        "ort_absent": None,
    }


def variant_json(
    item: CostedVariant, with_layers: bool = True, baseline: Latency | None = None
) -> dict:
    cost = item.cost
    out = {
        "id": item.variant.id,
        "name": item.name,
        "plan": item.variant.plan,
        "aliases": list(item.variant.aliases),
        **cost_json(cost),
        "infer_mem_bytes": item.infer_mem_bytes,  # measured with the latency
        **latency_json(item.latency, baseline),
    }
    if isinstance(item.blueprint, ModelVariant):  # a [model] sweep: whose code, what changed
        out["model"] = {"factory": item.blueprint.factory, "arguments": item.blueprint.arguments}
        out["rewrites"] = dict(item.blueprint.changes)
        out["initialisation"] = dict(item.blueprint.inits)
    if with_layers:
        out["layers"] = [layer_json(row) for row in cost.layers]
    return out


def catalog_json(catalog: Catalog) -> str:
    base = catalog.baseline.latency
    return json.dumps([variant_json(v, baseline=base) for v in catalog.variants], indent=2)


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
    *LATENCY_FIELDS,
    "plan",
    *ORT_FIELDS,  # after `plan`: columns are only ever appended
    "infer_mem_bytes",
)


def csv_cell(value) -> str:
    """A JSON field as one CSV cell: '' for None, 'a=x;b=y' for a mapping, 'x' for a list."""
    if value is None:
        return ""
    if isinstance(value, dict):
        return ";".join(f"{k}={v}" for k, v in value.items())
    if isinstance(value, list):
        return "x".join(map(str, value))
    return value


def _csv_cells(item: CostedVariant, baseline=None) -> list:
    row = variant_json(item, with_layers=False, baseline=baseline)
    row["plan"] = plan_text(row["plan"])
    return [csv_cell(row[c]) for c in CSV_COLUMNS]


def catalog_csv(catalog: Catalog) -> str:
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(CSV_COLUMNS)
    base = catalog.baseline.latency
    writer.writerows(_csv_cells(item, base) for item in catalog.variants)
    return buf.getvalue()


def catalogs_csv(planned: list[tuple[object, Catalog | Exception]]) -> str:
    """Several sweep files: one CSV, the columns of `catalog_csv` after a first `file` column;
    a refused file has no rows (its error goes to stderr)."""
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(("file", *CSV_COLUMNS))
    for path, catalog in planned:
        if isinstance(catalog, Catalog):
            base = catalog.baseline.latency
            writer.writerows([str(path), *_csv_cells(item, base)] for item in catalog.variants)
    return buf.getvalue()


def human(n: float) -> str:
    """12345678 → '12.3M', 512 → '512', and below 100 three significant digits: a latency of
    0.34 ms is '0.34', not '0'."""
    for unit, size in (("G", 1e9), ("M", 1e6), ("k", 1e3)):
        if abs(n) >= size:
            return f"{n / size:.1f}{unit}"
    return f"{n:.3g}" if abs(n) < 100 else f"{n:.0f}"


TABLE_WIDTH = 100
NAME_WIDTH = 28


def _wrap(text: str) -> list[str]:
    return textwrap.wrap(text, TABLE_WIDTH, subsequent_indent="    ", break_on_hyphens=False)


def latency_table(catalog: Catalog) -> list[str]:
    """The measured latencies, each a median with its interquartile range, the conv backends
    each variant runs on, and a mark where a comparison with the baseline is noisy or crosses
    backends; empty when nothing was measured."""
    timed = [item for item in catalog.variants if item.latency]
    if not timed:
        return []
    lat, base = timed[0].latency, catalog.baseline.latency
    batch = lat.batch_size
    shape = "x".join(map(str, lat.in_shape)) or "?"
    lines = _wrap(
        f"latency in ms, median [interquartile range] of {lat.batch1.n} interleaved rounds at "
        f"batch 1 and {lat.batch.n} at batch {batch}; input {shape}; eval mode, channels_last, "
        f"{lat.threads} thread(s), torch {lat.torch_version}"
    )
    lines += [
        "",
        f"{'variant':<{NAME_WIDTH + 1}} {'@1':>19} {f'@{batch}':>19} {'flag':<4} conv backends",
    ]
    rule = "-" * TABLE_WIDTH
    lines.append(rule)
    crossing, noisy = [], []
    for item in sorted(timed, key=lambda v: (v.latency.batch1_ms, v.name)):
        mark = "*" if item is catalog.baseline else " "
        flags = ""
        if item.latency.noisy:
            flags += "!"
            noisy.append(item.name)
        if base and crosses_backends(item.latency, base):
            flags += "≠"
            crossing.append(item.name)
        name = item.name if len(item.name) <= NAME_WIDTH else item.name[: NAME_WIDTH - 1] + "…"
        row = (
            f"{name:<{NAME_WIDTH}}{mark} {item.latency.batch1.text():>19} "
            f"{item.latency.batch.text():>19} {flags:<4}"
        )
        backends = item.latency.backend_counts()
        if len(row) + 1 + len(backends) > TABLE_WIDTH:  # many backends: a line of their own
            lines += [row.rstrip(), *_wrap(f"    {backends}")]
        else:
            lines.append(f"{row} {backends}")
    lines.append(rule)
    if noisy:
        lines += _wrap(
            f"! noisy: the interquartile range exceeds {NOISY_IQR_RATIO:.0%} of the median at "
            f"batch 1 or {batch} ({', '.join(noisy)}); the machine was busy, so rerun on a quiet "
            "one before choosing on latency"
        )
    if crossing:
        lines += _wrap(
            f"≠ other backends: {', '.join(crossing)} run(s) some convs on other torch "
            f"backends than the baseline {catalog.baseline.name}; their latency difference is "
            "partly a difference of implementations (--format json lists each layer's backend)"
        )
    return lines + ort_table(timed, batch)


def ort_table(timed: list[CostedVariant], batch: int) -> list[str]:
    """ONNX Runtime's latencies beside torch's (× torch: the ratio of the medians at batch
    1), or why there are none."""
    measured = [item for item in timed if item.latency.ort]
    if not measured:
        return ["", *_wrap(f"ONNX Runtime latency: not measured: {timed[0].latency.ort_absent}")]
    ort = measured[0].latency.ort
    lines = [
        "",
        *_wrap(
            f"ONNX Runtime {ort.version} latency in ms, the same rounds, threads and inputs "
            "(the network exported with torch.onnx, run by an InferenceSession on the CPU)"
        ),
        "",
        f"{'variant':<{NAME_WIDTH + 1}} {'@1':>19} {f'@{batch}':>19} {'x torch':>7} {'flag':<4}",
        "-" * TABLE_WIDTH,
    ]
    for item in sorted(measured, key=lambda v: (v.latency.ort.batch1.median_ms, v.name)):
        lat = item.latency
        name = item.name if len(item.name) <= NAME_WIDTH else item.name[: NAME_WIDTH - 1] + "…"
        ratio = lat.ort.batch1.median_ms / lat.batch1_ms
        lines.append(
            f"{name:<{NAME_WIDTH}}  {lat.ort.batch1.text():>19} {lat.ort.batch.text():>19} "
            f"{ratio:>7.2f} {'!' if lat.ort.noisy else ''}".rstrip()
        )
    lines.append("-" * TABLE_WIDTH)
    for item in timed:
        if item.latency.ort is None:
            lines += _wrap(f"not measured on ONNX Runtime: {item.name}: {item.latency.ort_absent}")
    return lines


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
        f"{'jump':>4} {'map':>5} {'act mem':>8}",
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
            f"{_cell(cost.jump):>4} {shape:>5} {memory:>8}"
        )
    lines.append(rule)
    lines += _wrap(
        "rf and jump: receptive field and effective stride at the input of the head's global "
        "pool, in input pixels. map: the feature map pooled there. act mem: what one training "
        f"step keeps for backward at batch {batch}. CPU latency: --latency."
    )
    latency = latency_table(catalog)
    if latency:
        lines += ["", *latency]
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
