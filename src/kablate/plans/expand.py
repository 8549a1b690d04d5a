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
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

from kablate.errors import SweepError, did_you_mean
from kablate.plans.grammar import KernelSpec
from kablate.plans.groups import GroupError, resolve_kernels
from kablate.plans.space import start_plans
from kablate.spec.schema import PlanSpec, SweepSpec

if TYPE_CHECKING:  # nets imports plans: the sites of a user's model are only passed through
    from kablate.nets.sites import ConvSite

UNCHANGED = "unchanged"  # the name of a [model] sweep's unchanged model, its default baseline


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


def plan_text(plan: dict[str, str]) -> str:
    """A plan on one line, for tables and CSV: ``stem=5;body=3``; the unchanged model of a
    ``[model]`` sweep, which sets nothing, is ``as built``."""
    return ";".join(f"{group}={spec}" for group, spec in plan.items()) or "as built"


def read_plan_text(text: str) -> dict[str, str]:
    """The plan that `plan_text` wrote: ``stem=5;body=3`` → ``{"stem": "5", "body": "3"}``;
    parts without ``=`` (a table that names the variant in place of its plan) are skipped."""
    return dict(part.rpartition("=")[::2] for part in text.split(";") if "=" in part)


def grid_cells(grid: dict[str, tuple[str, ...]]) -> list[dict[str, str]]:
    """The cross product of a grid's axes, first axis slowest."""
    groups = list(grid)
    return [dict(zip(groups, combo, strict=True)) for combo in itertools.product(*grid.values())]


def cell_name(cell: dict[str, str]) -> str:
    """``{"stem": "7", "stage1.0": "3"}`` → ``stem=7+stage1.0=3`` (the ``=`` keeps stage names
    that end in a digit apart from the kernel size)."""
    return "+".join(f"{group}={spec}" for group, spec in cell.items())


Resolver = Callable[[dict[str, str]], dict[str, KernelSpec]]


def plan_resolver(sweep: SweepSpec, sites: Sequence[ConvSite] | None = None) -> Resolver:
    """How a plan's keys become a kernel spec per conv: layer groups of kablate's own network,
    or module-path patterns and roles over the ``sites`` (Conv2d layers) of the user's model."""
    if sweep.model is None:
        return lambda plan: resolve_kernels(sweep.network, plan)
    from kablate.nets.sites import resolve_model_plan

    assert sites is not None, "a [model] sweep's plans resolve over its model's convs"
    return lambda plan: resolve_model_plan(list(sites), plan)


def expand_plans(sweep: SweepSpec, sites: Sequence[ConvSite] | None = None) -> list[Variant]:
    """All distinct variants of a sweep, explicit plans first, then grid cells in order. A
    ``[model]`` sweep (``sites``: its model's convs) also gets its unchanged model, last,
    named `UNCHANGED` unless a plan already makes that network.

    Raises:
        SweepError: an unknown layer group, a bad kernel spec or a name used twice for
            different networks, naming the key in the sweep file.
    """
    resolve = plan_resolver(sweep, sites)
    check_grid_axes(sweep, resolve)
    candidates: list[tuple[PlanSpec, tuple[tuple[str, str], ...], int]] = [
        (plan, (), -1) for plan in sweep.plans
    ]
    for g, grid in enumerate(sweep.grids):
        for cell in grid_cells(grid):
            plan = PlanSpec(name=cell_name(cell), kernels=cell, line=f"grid[{g}]")
            candidates.append((plan, tuple(cell.items()), g))
    if sweep.search is not None:  # a searched space: only the plans its search starts from
        for start in start_plans(sweep.search.choices):
            candidates.append((PlanSpec(cell_name(start), start, "search.choices"), (), -1))

    by_key: dict[str, Variant] = {}
    names: dict[str, str] = {}
    for plan, axes, g in candidates:
        try:
            kernels = resolve(plan.kernels)
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
    if sites is not None:
        add_unchanged(sweep, by_key, names, sites)
    return list(by_key.values())


def unchanged_variant(sites: Sequence[ConvSite]) -> Variant:
    """The user's model as its factory builds it: every conv keeps its own kernel."""
    return Variant(UNCHANGED, {}, {site.path: site.spec for site in sites})


def add_unchanged(
    sweep: SweepSpec, by_key: dict[str, Variant], names: dict[str, str], sites: Sequence[ConvSite]
) -> None:
    unchanged = unchanged_variant(sites)
    if unchanged.key in by_key:  # a plan that changes nothing: it is the unchanged model
        first = by_key[unchanged.key]
        if first.name != UNCHANGED and UNCHANGED not in first.aliases:
            by_key[unchanged.key] = with_alias(first, UNCHANGED)
        return
    if UNCHANGED in names:
        line = next(p.line for p in sweep.plans if p.name == UNCHANGED)
        raise SweepError(
            sweep.source,
            f"{line}.name",
            f'is "{UNCHANGED}", the name kablate gives the unchanged model of a [model] sweep, '
            "but this plan changes it: choose another name",
        )
    by_key[unchanged.key] = unchanged


def check_grid_axes(sweep: SweepSpec, resolve: Resolver | None = None) -> None:
    """Check every grid axis's (and the ``[search]`` space's) group name and kernel specs once,
    before any cell is built, so a typo in a large grid is reported at once rather than after
    building its cells."""
    resolve = resolve or plan_resolver(sweep)
    for g, grid in enumerate(sweep.grids):
        check_axes(sweep, grid, f"grid[{g}]", resolve)
    if sweep.search is not None:
        check_axes(sweep, sweep.search.choices, "search.choices", resolve)


def check_axes(
    sweep: SweepSpec, axes: dict[str, tuple[str, ...]], where: str, resolve: Resolver
) -> None:
    for group, specs in axes.items():
        for spec in specs:
            try:
                resolve({group: spec})
            except GroupError as exc:
                raise SweepError(sweep.source, f"{where}.{exc.group}", str(exc)) from None


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
    """The variant the others are compared with: the one the sweep names, else (a ``[model]``
    sweep) the unchanged model, else all-3×3, else the first variant."""
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
    if sweep.model is not None:  # expand_plans adds the unchanged model (under some name)
        return next(v for v in variants if UNCHANGED in (v.name, *v.aliases))
    for variant in variants:
        if variant.is_all_3x3:
            return variant
    return variants[0]
