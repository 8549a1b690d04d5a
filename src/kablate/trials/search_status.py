"""How a ``[search]`` sweep's search stands, read from its study (`kablate status`): plans
proposed, trained and in training against the budget, the front found so far and its
hypervolume (`kablate.analysis.search`, the same figures the card gives once it is done)."""

from __future__ import annotations

from dataclasses import asdict, dataclass

import optuna
from optuna.trial import TrialState

from kablate.analysis.search import summarize_search
from kablate.trials.search import EVALUATED, read_candidate
from kablate.trials.search_claim import CLAIMED, TICKET


@dataclass(frozen=True)
class SearchStatus:
    budget: int  # budget slots issued (`search_claim.issue_tickets`)
    n_proposed: int  # screened proposals: trained, in training, filtered, repeated, interrupted
    n_trained: int
    n_training: int
    n_front: int  # trained plans on the front found so far
    hypervolume: float  # of the trained plans, with the reference below
    reference: dict  # the reference point (accuracy, cost)

    def to_dict(self) -> dict:
        return asdict(self)


def search_status(storage, sweep_name: str) -> SearchStatus | None:
    """The search of sweep ``sweep_name`` in ``storage``; None when it has no search study."""
    from kablate.trials.search_run import search_study_name  # it imports the runner's modules

    try:
        study = optuna.load_study(study_name=search_study_name(sweep_name), storage=storage)
    except KeyError:
        return None
    trials = study.get_trials(deepcopy=False)
    done = [c for t in trials if (c := read_candidate(t)) and c.outcome == EVALUATED]
    summary = summarize_search(
        [c.accuracy for c in done], [c.cost for c in done], [c.key for c in done], 1, 0
    )
    running = [t for t in trials if t.state == TrialState.RUNNING]
    return SearchStatus(
        budget=len({t.user_attrs[TICKET] for t in trials if TICKET in t.user_attrs}),
        n_proposed=sum("key" in t.user_attrs for t in trials),
        n_trained=len(done),
        n_training=sum(t.user_attrs.get("outcome") == CLAIMED for t in running),
        n_front=sum(summary.on_front),
        hypervolume=summary.history[-1] if summary.history else 0.0,
        reference=asdict(summary.reference),
    )


def search_line(status: SearchStatus | None) -> list[str]:
    """The status's line for the search; nothing for a sweep without one."""
    if status is None:
        return []
    ref = status.reference
    return [
        f"search (NSGA-II): {status.n_trained}/{status.budget} plans trained, "
        f"{status.n_training} training, {status.n_proposed} proposed (filtered and repeated "
        f"ones cost no budget); {status.n_front} on the front so far, hypervolume "
        f"{status.hypervolume:.6g} (reference: accuracy {ref['accuracy']:g}, cost "
        f"{ref['cost']:,.0f}, the largest trained)"
    ]
