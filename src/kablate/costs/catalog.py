"""Cost every variant of a sweep and apply its filters: the answer of `kablate plan`."""

from __future__ import annotations

from dataclasses import dataclass, field, replace

from kablate.costs.graph import GraphCost
from kablate.costs.latency import Latency, measure_layout_latencies
from kablate.costs.memory import inference_peak_bytes
from kablate.costs.static import StaticCost, static_cost
from kablate.costs.user_model import UserModel, check_rf_known
from kablate.data.prepare import check_splits
from kablate.data.sources import describe_source
from kablate.errors import PlanError, UsageError
from kablate.nets.build import build_network
from kablate.nets.layout import Layout, layout_network
from kablate.nets.model_variant import ModelVariant
from kablate.nets.onnx_file import onnx_missing
from kablate.nets.padding import is_symmetric
from kablate.plans.expand import Variant, expand_plans, pick_baseline, with_alias
from kablate.plans.filters import filter_reason
from kablate.spec.bounds import check_input_bounds
from kablate.spec.schema import SweepSpec


@dataclass
class CostedVariant:
    """A variant with its costs, and what builds it: `build_network(item.blueprint)`."""

    variant: Variant
    cost: StaticCost | GraphCost
    blueprint: Layout | ModelVariant
    latency: Latency | None = None
    infer_mem_bytes: int | None = None  # peak live activations at batch 1, when measured

    @property
    def name(self) -> str:
        return self.variant.name


@dataclass
class Catalog:
    """The variants a sweep will train, with their costs, plus what was dropped and why."""

    sweep: SweepSpec
    in_shape: tuple[int, int, int]
    n_classes: int
    variants: list[CostedVariant]
    baseline: CostedVariant
    dropped: list[tuple[CostedVariant, str]] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)

    def by_name(self, name: str) -> CostedVariant:
        return next(v for v in self.variants if v.name == name)


def build_catalog(
    sweep: SweepSpec,
    latency: bool = False,
    threads: int | None = None,
    in_shape: tuple[int, int, int] | None = None,
    n_classes: int | None = None,
) -> Catalog:
    """Expand, lay out, cost and filter every variant of ``sweep``.

    Raises:
        SweepError: a bad plan in the sweep file.
        PlanError: a variant that cannot be built on this input.
    """
    if in_shape is None or n_classes is None:
        in_shape, n_classes = describe_source(sweep.data)
        check_splits(sweep.data)
    check_input_bounds(sweep, in_shape)
    model = None
    if sweep.model is not None:
        try:
            model = UserModel.load(sweep, in_shape, n_classes)
        except UsageError as exc:  # also PlanError: name the sweep file, as every error does
            raise type(exc)(f"{sweep.source}: {exc}") from None
    variants = expand_plans(sweep, model.sites if model else None)
    base_name = pick_baseline(sweep, variants).name  # before merging: an all-3×3 spec wins
    costed: list[CostedVariant] = []
    by_signature: dict[tuple, int] = {}
    for variant in variants:
        try:
            if model is not None:
                item = CostedVariant(variant, *model.cost(variant, sweep.recipe.batch_size))
            else:
                layout = layout_network(sweep.network, variant, in_shape, n_classes)
                item = CostedVariant(variant, static_cost(layout, sweep.recipe.batch_size), layout)
        except PlanError as exc:
            raise PlanError(f"{sweep.source}: {exc}") from None  # name the file too
        signature = item.blueprint.signature
        first = by_signature.get(signature)
        if first is not None:  # different specs, same layers: one variant, the name an alias
            earlier = costed[first]
            merged = with_alias(earlier.variant, variant.name)
            for alias in variant.aliases:
                merged = with_alias(merged, alias)
            costed[first] = CostedVariant(merged, earlier.cost, earlier.blueprint)
            continue
        by_signature[signature] = len(costed)
        costed.append(item)
    baseline = next(c for c in costed if base_name == c.name or base_name in c.variant.aliases)
    if model is not None and baseline.cost.rf is None:
        check_rf_known(sweep)
    kept, dropped = [], []
    for item in costed:
        reason = filter_reason(
            item.cost.params,
            item.cost.macs,
            item.cost.rf,
            baseline.cost.rf,
            sweep.filters,
            item.cost.act_mem_bytes,
        )
        if reason and item is not baseline:
            dropped.append((item, reason))
        else:
            kept.append(item)
    warnings = model.warnings if model is not None else padding_warnings(kept)
    catalog = Catalog(sweep, in_shape, n_classes, kept, baseline, dropped, warnings)
    if latency:
        measure_latencies(catalog, threads)
    return catalog


def measure_latencies(catalog: Catalog, threads: int | None = None) -> None:
    """Measure every kept variant's CPU latency (`kablate plan --latency`, `kablate run`), in
    place, all in the same interleaved rounds (see `kablate.costs.latency`), and its peak of
    live activations at inference, batch 1 (`kablate.costs.memory.inference_peak_bytes`), on
    the sweep's `[target]`: its batch, its input size, its runtime, and ``threads`` (else the
    target's, else torch's).

    Raises:
        UsageError: ``runtime = "onnxruntime"`` without the onnx extra.
        PlanError: a variant that cannot be laid out at the target's input size.
    """
    target = catalog.sweep.target
    missing = onnx_missing()
    if target.runtime == "onnxruntime" and missing:
        raise UsageError(
            f'{catalog.sweep.source}: target.runtime = "onnxruntime" needs ONNX Runtime: '
            f'{missing}, or set runtime = "torch"'
        )
    blueprints = [at_target_input(catalog, item) for item in catalog.variants]
    batch = target.batch or catalog.sweep.recipe.batch_size
    found = measure_layout_latencies(blueprints, batch, threads=threads or target.threads or None)
    for item, blueprint, latency in zip(catalog.variants, blueprints, found, strict=True):
        item.latency = latency
        network = build_network(blueprint)
        item.infer_mem_bytes = inference_peak_bytes(network, blueprint.in_shape)


def at_target_input(catalog: Catalog, item: CostedVariant) -> Layout | ModelVariant:
    """The variant's blueprint at the `[target]` input size (the data's when not stated)."""
    if not catalog.sweep.target.input:
        return item.blueprint
    shape = (catalog.in_shape[0], *catalog.sweep.target.input)
    if isinstance(item.blueprint, ModelVariant):
        return replace(item.blueprint, in_shape=shape)
    try:
        return layout_network(catalog.sweep.network, item.variant, shape, catalog.n_classes)
    except PlanError as exc:
        raise PlanError(f"{catalog.sweep.source}: at target.input {shape}: {exc}") from None


def padding_warnings(items: list[CostedVariant], n_named: int = 4) -> list[str]:
    """One warning per even-kernel layer padded asymmetrically, naming the variants it is in."""
    where: dict[tuple, list[str]] = {}
    for item in items:
        for layer in item.blueprint.layers:
            if layer.kind == "conv" and not is_symmetric(layer.padding):
                key = (layer.name, layer.kernel, layer.dilation, layer.padding)
                where.setdefault(key, []).append(item.name)
    out = []
    for (name, (kh, kw), _, padding), names in where.items():
        shown = ", ".join(names[:n_named])
        more = f" and {len(names) - n_named} more" if len(names) > n_named else ""
        out.append(
            f"layer {name}: the even {kh}×{kw} kernel is padded {padding} (top, bottom, left, "
            f"right) under same padding, so its feature map shifts by half a pixel "
            f"(in {shown}{more})"
        )
    return out
