"""Expand a sweep's explicit plans and grids into variants; drop duplicate networks.

Grid cells are named by their coordinates, e.g. ``stem=7+body=5:stack``. A variant is
identified by the kernel spec of every slot, so two plans that resolve to the same specs are one
variant: the first name is kept and the others are listed as its aliases. (Specs that differ
but build the same layers, such as ``3:stack`` and ``3``, are merged later, once laid out, by
`kablate.costs.catalog`.)
"""

from __future__ import annotations

import hashlib
import itertools
import json
from dataclasses import dataclass, field

from kablate.errors import SweepError, did_you_mean
from kablate.plans.grammar import KernelSpec
from kablate.plans.groups import GroupError, resolve_kernels
from kablate.spec.schema import PlanSpec, SweepSpec


@dataclass(frozen=True)
class Variant:
    """The network one kernel plan makes from the base network."""

    name: str
    plan: dict[str, str]  # the kernel specs as written in the sweep file
    kernels: dict[str, KernelSpec]  # the resolved spec of every slot, in forward order
    axes: tuple[tuple[str, str], ...] = ()  # grid coordinates (group, spec); () if explicit
    grid: int = -1  # index of the grid it came from; -1 for an explicit plan
    aliases: tuple[str, ...] = field(default=(), compare=False)

    @property
    def key(self) -> str:
        """Canonical text of the resolved kernels: equal keys mean equal networks."""
        return json.dumps({slot: str(spec) for slot, spec in self.kernels.items()})

    @property
    def id(self) -> str:
        return "v" + hashlib.sha1(self.key.encode()).hexdigest()[:8]

    @property
    def is_all_3x3(self) -> bool:
        return all(spec.is_plain_3x3 for spec in self.kernels.values())


def grid_cells(grid: dict[str, tuple[str, ...]]) -> list[dict[str, str]]:
    """The cross product of a grid's axes, first axis slowest."""
    groups = list(grid)
    return [dict(zip(groups, combo, strict=True)) for combo in itertools.product(*grid.values())]


def cell_name(cell: dict[str, str]) -> str:
    """``{"stem": "7", "stage1.0": "3"}`` → ``stem=7+stage1.0=3`` (the ``=`` keeps stage names
    that end in a digit apart from the kernel size)."""
    return "+".join(f"{group}={spec}" for group, spec in cell.items())


def expand_plans(sweep: SweepSpec) -> list[Variant]:
    """All distinct variants of a sweep, explicit plans first, then grid cells in order.

    Raises:
        SweepError: an unknown layer group, a bad kernel spec or a name used twice for
            different networks, naming the key in the sweep file.
    """
    check_grid_axes(sweep)
    candidates: list[tuple[PlanSpec, tuple[tuple[str, str], ...], int]] = [
        (plan, (), -1) for plan in sweep.plans
    ]
    for g, grid in enumerate(sweep.grids):
        for cell in grid_cells(grid):
            plan = PlanSpec(name=cell_name(cell), kernels=cell, line=f"grid[{g}]")
            candidates.append((plan, tuple(cell.items()), g))

    by_key: dict[str, Variant] = {}
    names: dict[str, str] = {}
    for plan, axes, g in candidates:
        try:
            kernels = resolve_kernels(sweep.network, plan.kernels)
        except GroupError as exc:
            raise SweepError(sweep.source, f"{plan.line}.{exc.group}", str(exc)) from None
        variant = Variant(plan.name, dict(plan.kernels), kernels, axes, g)
        if plan.name in names and names[plan.name] != variant.key:
            raise SweepError(
                sweep.source, f"{plan.line}.name", f'"{plan.name}" names two different networks'
            )
        names[plan.name] = variant.key
        if variant.key in by_key:
            first = by_key[variant.key]
            if plan.name != first.name and plan.name not in first.aliases:
                by_key[variant.key] = with_alias(first, plan.name)
            continue
        by_key[variant.key] = variant
    return list(by_key.values())


def check_grid_axes(sweep: SweepSpec) -> None:
    """Check every grid axis's group name and kernel specs once, before any cell is built, so
    a typo in a large grid is reported at once rather than after building its cells."""
    for g, grid in enumerate(sweep.grids):
        for group, specs in grid.items():
            for spec in specs:
                try:
                    resolve_kernels(sweep.network, {group: spec})
                except GroupError as exc:
                    raise SweepError(sweep.source, f"grid[{g}].{exc.group}", str(exc)) from None


def with_alias(variant: Variant, alias: str) -> Variant:
    """The same variant, also known as ``alias``."""
    return Variant(
        variant.name,
        variant.plan,
        variant.kernels,
        variant.axes,
        variant.grid,
        (*variant.aliases, alias),
    )


def pick_baseline(sweep: SweepSpec, variants: list[Variant]) -> Variant:
    """The variant the others are compared with: the one the sweep names, else all-3×3,
    else the first variant."""
    if sweep.baseline:
        for variant in variants:
            if sweep.baseline == variant.name or sweep.baseline in variant.aliases:
                return variant
        names = [v.name for v in variants] + [a for v in variants for a in v.aliases]
        hint = did_you_mean(sweep.baseline, names)
        raise SweepError(
            sweep.source,
            "sweep.baseline",
            f'names "{sweep.baseline}", which is not a plan of this sweep{hint}',
        )
    for variant in variants:
        if variant.is_all_3x3:
            return variant
    return variants[0]
