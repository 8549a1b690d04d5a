"""Read a sweep's ``[search]`` table: a per-layer choice space, its trial budget and its cost.

The group names and kernel specs are checked against the network by
`kablate.plans.expand.check_search_choices`, once the network is known; everything that does
not need the network is checked here, so that each error names its key.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import Literal

from kablate.plans.space import space_size
from kablate.spec.bounds import MAX_SEED
from kablate.spec.fields import Where, at_least, between, check, read_table
from kablate.spec.schema import PickSpec, PlanSpec, SearchSpec, SweepSpec

SEARCH_COSTS = ("macs", "params")  # the static costs a search may minimise (known untrained)


@dataclass(frozen=True)
class SearchTable:
    """The ``[search]`` table as written; ``cost = ""`` means the ``[pick]`` cost."""

    choices: dict[str, tuple[str, ...]]
    budget: int = check(at_least(1))
    cost: Literal["", "macs", "params"] = ""
    seed: int = check(between(0, MAX_SEED, "an integer"), 0)


def read_search(raw: dict, where: Where, pick: PickSpec) -> SearchSpec | None:
    """The ``[search]`` table of a parsed sweep, or None when it has none.

    Raises:
        SweepError: a wrong key or type, an empty or repeated choice, a budget larger than the
            space, or ``[search]`` beside ``[[grid]]`` or ``[model]``.
    """
    if "search" not in raw:
        return None
    at = where.key("search")
    for other, why in (
        ("grid", "a sweep either enumerates [[grid]] cells or searches a [search] space"),
        ("model", "searching the convs of your own [model] is not supported yet"),
    ):
        if other in raw:
            raise at.fail(f"cannot be combined with [{other}]: {why}")
    table = read_table(SearchTable, raw["search"], at)
    if not table.choices:
        raise at.key("choices").fail(
            'is empty: give each layer group its specs, e.g. stem = ["3", "5"]'
        )
    for group, specs in table.choices.items():
        if not specs:
            raise at.key("choices").key(group).fail("must list at least one kernel spec")
        if len(set(specs)) < len(specs):
            raise at.key("choices").key(group).fail(f"lists a spec twice: {list(specs)}")
    n_plans = space_size(table.choices)
    if table.budget > n_plans:
        raise at.key("budget").fail(
            f"is {table.budget}, but the space has only {n_plans:,} plans: lower the budget, or "
            "write the choices as a [[grid]], which trains every plan"
        )
    cost = table.cost or (pick.cost if pick.cost in SEARCH_COSTS else "macs")
    return SearchSpec(table.choices, table.budget, cost, table.seed)


def finalist_sweep(sweep: SweepSpec, record: dict) -> SweepSpec:
    """The sweep the runner trains: ``sweep``'s explicit plans plus the finalists of its search
    (``record``, as in ``search.json``), with no ``[search]`` left and its baseline named."""
    plans = tuple(sweep.plans) + tuple(
        PlanSpec(f["name"], dict(f["plan"]), "search.finalists") for f in record["finalists"]
    )
    return dataclasses.replace(
        sweep, plans=plans, search=None, baseline=sweep.baseline or record["baseline"]
    )
