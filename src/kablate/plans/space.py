"""A per-layer choice space: each layer group may take one of several kernel specs.

A sweep's ``[search]`` table declares one (`kablate.spec.schema.SearchSpec`). Its plans are
every combination of the groups' choices, as a ``[[grid]]``'s cells are, but the space is
searched (`kablate.trials.search`) rather than enumerated. A searched plan is named as a grid
cell is (`kablate.plans.expand.cell_name`).
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Iterator, Mapping

Choices = Mapping[str, tuple[str, ...]]  # layer group → the kernel specs it may take


def space_size(choices: Choices) -> int:
    """The number of plans of a choice space: the product of its lists' lengths."""
    return math.prod(len(specs) for specs in choices.values())


def space_plans(choices: Choices) -> Iterator[dict[str, str]]:
    """Every plan of the space, first group slowest (as a grid's cells)."""
    groups = list(choices)
    for combo in itertools.product(*choices.values()):
        yield dict(zip(groups, combo, strict=True))


def uniform_plans(choices: Choices) -> list[dict[str, str]]:
    """For every spec that all groups may take, the plan that gives it to all of them."""
    common = [s for s in next(iter(choices.values())) if all(s in v for v in choices.values())]
    return [dict.fromkeys(choices, spec) for spec in common]


def start_plans(choices: Choices) -> list[dict[str, str]]:
    """The plans a search starts from, and that `kablate plan` costs: the uniform plans, or,
    when no spec is common to all groups, the plan of every group's first choice."""
    return uniform_plans(choices) or [{group: specs[0] for group, specs in choices.items()}]
