"""How a ``[search]`` sweep's search stands, read from its study (`kablate status`): plans
proposed, trained and in training against the budget, the front found so far and its
hypervolume (`kablate.analysis.search`, the same figures the card gives once it is done), and
the plans in training now, each with the process that trains it and whether that process is
still running. It is read while the search runs as well as after it: the study is its home."""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from datetime import datetime

import optuna
from optuna.trial import TrialState

from kablate.analysis.search import summarize_search
from kablate.plans.expand import cell_name
from kablate.trials.liveness import WORKER, process_alive, running_since
from kablate.trials.search import EVALUATED, read_candidate, trial_plan
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
    # per plan in training: plan (its name), worker (host:pid), started (ISO time), seconds, and
    # alive (the worker's process runs: true, false, or null when it is on another machine)
    training: list[dict] = field(default_factory=list)

    def to_dict(self) -> dict:
        return asdict(self)


def search_status(storage, sweep_name: str, now: datetime | None = None) -> SearchStatus | None:
    """The search of sweep ``sweep_name`` in ``storage``, at local time ``now`` (naive, as
    Optuna's; default: now); None when it has no search study."""
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
    training = [t for t in running if t.user_attrs.get("outcome") == CLAIMED]
    return SearchStatus(
        budget=len({t.user_attrs[TICKET] for t in trials if TICKET in t.user_attrs}),
        n_proposed=sum("key" in t.user_attrs for t in trials),
        n_trained=len(done),
        n_training=len(training),
        n_front=sum(summary.on_front),
        hypervolume=summary.history[-1] if summary.history else 0.0,
        reference=asdict(summary.reference),
        training=[in_training(t, now or datetime.now()) for t in training],
    )


def in_training(trial, now: datetime) -> dict:
    """A search trial being trained, as `SearchStatus.training` lists it."""
    worker = trial.user_attrs.get(WORKER)
    return {
        "plan": cell_name(trial_plan(trial)),
        "worker": worker,
        **running_since(trial, now),
        "alive": process_alive(worker) if worker else None,
    }


def search_line(status: SearchStatus | None) -> list[str]:
    """The status's line for the search; nothing for a sweep without one."""
    if status is None:
        return []
    ref = status.reference
    n_ended = sum(entry["alive"] is False for entry in status.training)
    ended = f" ({n_ended} of them by a process that has ended)" if n_ended else ""
    return [
        f"search (NSGA-II): {status.n_trained}/{status.budget} plans trained, "
        f"{status.n_training} training{ended}, {status.n_proposed} proposed (filtered and repeated "
        f"ones cost no budget); {status.n_front} on the front so far, hypervolume "
        f"{status.hypervolume:.6g} (reference: accuracy {ref['accuracy']:g}, cost "
        f"{ref['cost']:,.0f}, the largest trained)"
    ]
