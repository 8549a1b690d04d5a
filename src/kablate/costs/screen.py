"""What is known of a searched plan before it trains: its network, its static cost, and
whether the sweep's static filters (`kablate.plans.filters`) rule it out.

A search (`kablate.trials.search`) screens every plan the sampler proposes, so that nothing
a filter would drop, nothing that cannot be built and no network already trained reaches the
trainer. `survey_space` screens every plan of a space small enough to enumerate, for
`kablate plan`.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass

from kablate.costs.static import static_cost
from kablate.errors import PlanError
from kablate.nets.layout import Layout, layout_network
from kablate.plans.expand import Variant, cell_name
from kablate.plans.filters import filter_reason
from kablate.plans.groups import resolve_kernels
from kablate.plans.space import Choices, space_plans, space_size
from kablate.spec.bounds import MAX_GRID_CELLS
from kablate.spec.schema import SweepSpec


@dataclass(frozen=True)
class Screen:
    """What is known of a plan before it trains."""

    key: str  # equal keys build the same network
    cost: float  # the static cost that is minimised
    reason: str | None = None  # why it is ruled out (a filter, or no network); None: allowed


@dataclass(frozen=True)
class SpaceScreen:
    """Screens the plans of ``sweep``'s ``[search]`` space on the data's input. As in
    `kablate.costs.catalog`, the baseline (``baseline_key``) is never ruled out by a filter, and
    ``equal_rf`` compares with ``baseline_rf``, its receptive field."""

    sweep: SweepSpec
    in_shape: tuple[int, int, int]
    n_classes: int
    baseline_rf: int
    baseline_key: str

    @classmethod
    def of(cls, catalog) -> SpaceScreen:
        """The screen of a costed sweep (`kablate.costs.catalog.Catalog`)."""
        baseline = catalog.baseline
        return cls(
            catalog.sweep,
            catalog.in_shape,
            catalog.n_classes,
            baseline.cost.rf,
            network_key(baseline.blueprint),
        )

    def __call__(self, plan: dict[str, str]) -> Screen:
        sweep = self.sweep
        variant = Variant(cell_name(plan), dict(plan), resolve_kernels(sweep.network, plan))
        try:
            layout = layout_network(sweep.network, variant, self.in_shape, self.n_classes)
        except PlanError as exc:
            return Screen(variant.key, float("inf"), f"cannot be built: {exc}")
        cost = static_cost(layout, sweep.recipe.batch_size)
        reason = filter_reason(
            cost.params, cost.macs, cost.rf, self.baseline_rf, sweep.filters, cost.act_mem_bytes
        )
        key = network_key(layout)
        reason = None if key == self.baseline_key else reason
        return Screen(key, float(getattr(cost, sweep.search.cost)), reason)


def network_key(layout: Layout) -> str:
    """A short text that equal networks share: a digest of the layout's signature."""
    return hashlib.sha1(repr(layout.signature).encode()).hexdigest()[:16]


@dataclass(frozen=True)
class Survey:
    """A whole space screened: how many plans, how many ruled out, how many networks left."""

    n_plans: int
    n_ruled_out: int
    n_networks: int  # distinct networks among the allowed plans


def survey_space(choices: Choices, screen: SpaceScreen, cap: int = MAX_GRID_CELLS) -> Survey | None:
    """Screen every plan of the space; None when it has more than ``cap`` plans (as many as a
    sweep's grids may have), which would take too long to lay out one by one."""
    if space_size(choices) > cap:
        return None
    screens = [screen(plan) for plan in space_plans(choices)]
    allowed = {s.key for s in screens if s.reason is None}
    n_ruled_out = sum(1 for s in screens if s.reason is not None)
    return Survey(len(screens), n_ruled_out, len(allowed))
