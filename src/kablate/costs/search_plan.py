"""What `kablate plan` says about a sweep's ``[search]`` space: its size, what the budget
covers, and (for a space small enough to screen plan by plan) what the filters leave."""

from __future__ import annotations

from kablate.costs.plan_output import _wrap
from kablate.costs.screen import SpaceScreen, survey_space
from kablate.plans.space import space_size
from kablate.spec.bounds import MAX_GRID_CELLS
from kablate.spec.costs import COSTS


def search_lines(catalog) -> list[str]:
    """Lines under the plan table of a search sweep (`kablate.costs.catalog.Catalog`), wrapped
    to the table's width; none for a sweep without ``[search]``."""
    return [line for text in search_notes(catalog) for line in _wrap(text)]


def search_notes(catalog) -> list[str]:
    """The search's size, budget and screening, one sentence each, unwrapped."""
    search = catalog.sweep.search
    if search is None:
        return []
    n_plans = space_size(search.choices)
    sizes = " × ".join(f"{group} {len(specs)}" for group, specs in search.choices.items())
    lines = [
        f"search: {n_plans:,} plans in the space ({sizes}); the table shows the plans it starts "
        "from and the explicit ones",
        f"search: budget {search.budget:,} plans trained with seed {catalog.sweep.seeds[0]} = "
        f"{share(search.budget, n_plans)} of the space; NSGA-II (sampler seed {search.seed}) "
        f"maximises validation accuracy and minimises {COSTS[search.cost].label}",
    ]
    survey = survey_space(search.choices, SpaceScreen.of(catalog))
    if survey is None:
        lines.append(
            f"search: the space has over {MAX_GRID_CELLS:,} plans, too many to screen one by "
            "one here; the filters screen each plan the search proposes"
        )
    else:
        lines.append(
            f"search: the filters rule out {survey.n_ruled_out:,} of the {n_plans:,} plans; "
            f"{survey.n_networks:,} distinct networks remain, of which the budget covers "
            f"{share(min(search.budget, survey.n_networks), survey.n_networks)}"
        )
    return lines


def share(part: int, whole: int) -> str:
    """``part`` of ``whole`` as a percentage with one decimal (exact counts, no uncertainty)."""
    return f"{100 * part / whole:.1f}%" if whole else "none"
