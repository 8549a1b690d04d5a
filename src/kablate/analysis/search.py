"""What a search found, as plain data for the report: the front, the hypervolume after every
trained plan, and the share of the space evaluated (`kablate.trials.search` makes the trials).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

from kablate.analysis.hypervolume import Reference, hypervolume_history, reference_point
from kablate.analysis.pareto import pareto_front


@dataclass(frozen=True)
class SearchSummary:
    """One search, summarised; every list is over the trained plans, in the order trained."""

    reference: Reference  # the hypervolume's reference point (accuracy 0, largest cost)
    history: list[float]  # hypervolume of the first n trained plans, n = 1, 2, ...
    on_front: list[bool]  # on the front of the trained plans
    n_trained: int
    n_space: int  # plans in the choice space
    n_proposed: int  # proposals, filtered and repeated ones included

    @property
    def share_evaluated(self) -> float:
        """Trained plans over the plans of the space."""
        return self.n_trained / self.n_space

    @property
    def share_of_box(self) -> float:
        """The final hypervolume over that of an ideal plan (accuracy 1 at no cost)."""
        return self.history[-1] / self.reference.box() if self.history else 0.0


def summarize_search(
    accuracy: Sequence[float],
    cost: Sequence[float],
    names: Sequence[str],
    n_space: int,
    n_proposed: int,
) -> SearchSummary:
    """Summarise the trained plans of a search (accuracy ↑, cost ↓, in the order trained)."""
    reference = reference_point(cost) if cost else Reference(0.0, 0.0)
    return SearchSummary(
        reference,
        hypervolume_history(accuracy, cost, reference),
        pareto_front(accuracy, [[c] for c in cost], names),
        len(accuracy),
        n_space,
        n_proposed,
    )


def summarize_record(record: dict) -> SearchSummary:
    """Summarise a search as ``search.json`` records it (`kablate.trials.search_run`): its
    candidates in the order proposed; a trained one has an accuracy, the others None."""
    done = [c for c in record["candidates"] if c["accuracy"] is not None]
    return summarize_search(
        [c["accuracy"] for c in done],
        [c["cost"] for c in done],
        [c["name"] for c in done],
        record["n_space"],
        len(record["candidates"]),
    )
