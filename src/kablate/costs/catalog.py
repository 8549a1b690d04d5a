"""Cost every variant of a sweep and apply its filters: the answer of `kablate plan`."""

from __future__ import annotations

from dataclasses import dataclass, field

from kablate.costs.latency import Latency, measure_latency
from kablate.costs.static import StaticCost, static_cost
from kablate.data.sources import describe_source
from kablate.nets.layout import layout_network
from kablate.plans.expand import Variant, expand_plans, pick_baseline
from kablate.plans.filters import filter_reason
from kablate.spec.schema import SweepSpec


@dataclass
class CostedVariant:
    variant: Variant
    cost: StaticCost
    latency: Latency | None = None

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
    costed = []
    for variant in expand_plans(sweep):
        layout = layout_network(sweep.network, variant, in_shape, n_classes)
        costed.append(CostedVariant(variant, static_cost(layout, sweep.recipe.batch_size)))
    base_variant = pick_baseline(sweep, [c.variant for c in costed])
    baseline = next(c for c in costed if c.variant is base_variant)
    kept, dropped = [], []
    for item in costed:
        reason = filter_reason(
            item.cost.params, item.cost.macs, item.cost.rf, baseline.cost.rf, sweep.filters
        )
        if reason and item is not baseline:
            dropped.append((item, reason))
        else:
            kept.append(item)
    if latency:
        for item in kept:
            item.latency = measure_latency(
                item.cost.layout, sweep.recipe.batch_size, threads=threads
            )
    warnings = [w for item in kept for w in item.cost.layout.warnings]
    return Catalog(sweep, in_shape, n_classes, kept, baseline, dropped, warnings)
