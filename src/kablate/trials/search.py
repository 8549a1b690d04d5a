"""Search a per-layer choice space with NSGA-II instead of training every plan of it.

A choice space gives each layer group a list of kernel specs; its plans are every combination,
which soon outgrows a grid (6 convs × 4 specs is 4,096 plans). The search trains only
``budget`` of them, chosen by Optuna's NSGA-II sampler (Deb, Pratap, Agarwal & Meyarivan 2002,
"A fast and elitist multiobjective genetic algorithm: NSGA-II";
`optuna.samplers.NSGAIISampler`) on two objectives: validation accuracy, maximised, and a
static cost (MACs or params), minimised.

Read `search_front` first. Each proposal of the sampler is one Optuna trial whose parameters
are the layer groups (categorical over their specs). Before anything trains it is screened
(``screen``: its network's key and static cost, and the reason the sweep's static filters rule
it out, if one does):

- ruled out by a filter: told FAIL with ``outcome = "filtered"``; it costs no budget;
- a network already evaluated (the same plan again, or specs that build the same layers):
  told FAIL with ``outcome = "repeat"``; no budget either, and the population stays distinct;
- otherwise ``score`` trains it (or reads a table) and it is told COMPLETE with
  (accuracy, cost). Only these count against the budget.

The sampler only counts COMPLETE trials into its generations, so failed proposals leave the
genetic algorithm's populations as NSGA-II defines them. A space with fewer allowed networks
than the budget would never end, so at most ``max_proposals`` proposals are made.

With a small budget NSGA-II's first generation, drawn at random, is most of the search, and a
random draw of a fifth of a space seldom holds its cheapest corner, whose box is a large share
of the hypervolume. So the search starts from given plans (``first``; the runner gives
`kablate.plans.space.uniform_plans`, every group at one spec, among them the all-3×3
baseline), which join the first generation as the seeded initial population of an
evolutionary algorithm does (common practice).

A study that already holds trials (a resumed run) continues where it stopped: its evaluated
networks count against the budget and are never evaluated again; a trial that a kill left
RUNNING is told FAIL (``outcome = "interrupted"``) and its plan may be proposed again.
Several processes, on one machine or several sharing a PostgreSQL storage, may run
`search_front` on one study at once: `kablate.trials.search_claim` keeps the budget in the
study and tells which proposals repeat another's. `kablate.trials.search_run` runs it for
`kablate run`.
"""

from __future__ import annotations

import json
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass

import optuna
from optuna.distributions import CategoricalDistribution
from optuna.trial import FrozenTrial, TrialState

from kablate.analysis.pareto import pareto_front
from kablate.costs.screen import Screen
from kablate.errors import SweepError
from kablate.plans.space import Choices, space_size
from kablate.trials.queue import has_waiting
from kablate.trials.search_claim import (
    CLAIMED,
    INTERRUPTED,
    TICKET,
    SoloLiveness,
    give_back,
    has_running,
    holds_ticket,
    issue_tickets,
    pop,
    recover_search,
    repeats,
)

optuna.logging.set_verbosity(optuna.logging.WARNING)

EVALUATED, FILTERED, REPEAT = "evaluated", "filtered", "repeat"  # a proposal's outcome
POLL_SECONDS = 1.0  # how often a process with nothing to propose looks again
PROPOSALS_PER_EVALUATION = 20  # the default cap on proposals, per evaluation of the budget


@dataclass(frozen=True)
class Candidate:
    """One proposal of the sampler and what became of it."""

    number: int  # the Optuna trial number
    plan: dict[str, str]  # layer group → kernel spec
    key: str
    cost: float
    accuracy: float | None  # None unless evaluated
    outcome: str  # EVALUATED, FILTERED, REPEAT or INTERRUPTED
    reason: str = ""  # the filter's reason, for FILTERED


@dataclass(frozen=True)
class SearchResult:
    """Every proposal in order, and the front of the evaluated ones."""

    candidates: list[Candidate]
    n_space: int  # plans in the choice space (combinations, before filters and duplicates)
    budget: int

    @property
    def evaluated(self) -> list[Candidate]:
        return [c for c in self.candidates if c.outcome == EVALUATED]

    @property
    def front(self) -> list[Candidate]:
        """The evaluated candidates no other evaluated one beats on accuracy and cost at once,
        cheapest first."""
        done = self.evaluated
        on = pareto_front(
            [c.accuracy for c in done], [[c.cost] for c in done], [c.key for c in done]
        )
        return sorted((c for c, f in zip(done, on, strict=True) if f), key=lambda c: c.cost)


def default_population(budget: int) -> int:
    """NSGA-II's population per generation: a quarter of the budget, from 4 to 50, so that a
    small budget still runs several generations (our choice; Optuna's default is 50)."""
    return min(50, max(4, budget // 4))


def search_study(seed: int | None, population: int, **create) -> optuna.Study:
    """A two-objective study (accuracy ↑, cost ↓) sampled by NSGA-II; ``create`` goes to
    `optuna.create_study` (storage, study_name, load_if_exists). Each of several processes
    that share a study needs its own ``seed`` (None: from the system's entropy), or they
    propose the same plans in step."""
    sampler = optuna.samplers.NSGAIISampler(population_size=population, seed=seed)
    return optuna.create_study(directions=["maximize", "minimize"], sampler=sampler, **create)


def search_front(
    choices: Choices,
    screen: Callable[[dict[str, str]], Screen],
    score: Callable[[dict[str, str]], float],
    budget: int,
    seed: int = 0,
    study: optuna.Study | None = None,
    max_proposals: int | None = None,
    first: Sequence[Mapping[str, str]] = (),
    liveness=None,
) -> SearchResult:
    """Evaluate at most ``budget`` distinct allowed networks of the space, chosen by NSGA-II.

    Args:
        choices: layer group → the kernel specs it may take.
        screen: a plan's network key, static cost and filter verdict (no training).
        score: a plan's validation accuracy (trains it).
        budget: evaluations; filtered and repeated proposals do not count.
        seed: the sampler's seed (not a training seed).
        study: where the trials go; a new in-memory one (`search_study`) when None.
        max_proposals: stop after this many proposals in all, even short of the budget.
        first: plans of the space proposed before the sampler's own (a new study only).
        liveness: how to tell a live proposal from one whose process died
            (`kablate.trials.liveness`); None when this process alone uses the study.
    """
    study = study or search_study(seed, default_population(budget))
    liveness = liveness or SoloLiveness()
    distributions = {group: CategoricalDistribution(specs) for group, specs in choices.items()}
    cap = max_proposals or PROPOSALS_PER_EVALUATION * budget
    recover_search(study, liveness)
    while True:
        with liveness.queue_lock():
            issue_tickets(study, budget, first)
        if n_proposed(study) >= cap:
            break
        if not has_waiting(study):
            if not has_running(study):
                break  # every slot settled
            time.sleep(POLL_SECONDS)  # others train; a slot may come free again
            recover_search(study, liveness)
            continue
        trial, token = pop(study, liveness, distributions)
        try:
            propose(study, trial, choices, screen, score)
        finally:
            liveness.release(token)
    return read_result(study, choices, budget)


def propose(study: optuna.Study, trial: optuna.Trial, choices: Choices, screen, score) -> None:
    """Screen, claim and train one popped proposal, and tell the study what became of it."""
    ticket = trial.user_attrs.get(TICKET)
    if not holds_ticket(study.get_trials(deepcopy=False), trial.number, ticket):
        give_back(study, trial)
        return
    plan = {group: trial.params[group] for group in choices}
    found = screen(plan)
    number, key, cost = trial.number, found.key, found.cost
    if found.reason:
        filtered = Candidate(number, plan, key, cost, None, FILTERED, found.reason)
        record_candidate(study, trial, filtered)
        return
    # One attribute per write, and a kill may fall between two: the cost goes first, so that a
    # trial with a key always has its cost, and a key without an outcome reads as interrupted.
    trial.set_user_attr("cost", cost)
    trial.set_user_attr("key", key)
    trial.set_user_attr("outcome", CLAIMED)  # written before the others' claims are read
    outcome = REPEAT if repeats(study.get_trials(deepcopy=False), number, key) else EVALUATED
    accuracy = score(plan) if outcome == EVALUATED else None
    record_candidate(study, trial, Candidate(number, plan, key, cost, accuracy, outcome))


def n_proposed(study: optuna.Study) -> int:
    """Proposals screened so far (evaluated, filtered, repeated, interrupted or in training)."""
    return sum("key" in t.user_attrs for t in study.get_trials(deepcopy=False))


def read_result(study: optuna.Study, choices: Choices, budget: int) -> SearchResult:
    """The study's finished proposals, in the order proposed."""
    candidates = [c for t in study.get_trials(deepcopy=False) if (c := read_candidate(t))]
    return SearchResult(candidates, space_size(choices), budget)


def record_candidate(study: optuna.Study, trial: optuna.Trial, candidate: Candidate) -> None:
    """Store what the candidate was (user attributes) and tell the sampler its values."""
    trial.set_user_attr("cost", candidate.cost)  # before the key: see `propose`
    trial.set_user_attr("key", candidate.key)
    trial.set_user_attr("outcome", candidate.outcome)
    if candidate.reason:
        trial.set_user_attr("reason", candidate.reason)
    if candidate.outcome == EVALUATED:
        study.tell(trial, [candidate.accuracy, candidate.cost])
    else:
        study.tell(trial, state=TrialState.FAIL)


def read_candidate(trial: FrozenTrial) -> Candidate | None:
    """A finished trial of a search study as a `Candidate`; None for one still open, or for a
    claim cut by a kill before its cost was written (possible in studies written before the
    cost came first, `propose`): it had not started training."""
    attrs = trial.user_attrs
    if trial.state not in (TrialState.COMPLETE, TrialState.FAIL) or "key" not in attrs:
        return None
    if "cost" not in attrs:
        return None
    accuracy = trial.values[0] if trial.state == TrialState.COMPLETE else None
    return Candidate(
        trial.number,
        trial_plan(trial),
        attrs["key"],
        float(attrs["cost"]),
        accuracy,
        # a claim cut between its key and its outcome, or during its training: interrupted
        attrs["outcome"] if attrs.get("outcome", CLAIMED) != CLAIMED else INTERRUPTED,
        attrs.get("reason", ""),
    )


def trial_plan(trial: FrozenTrial) -> dict[str, str]:
    """The plan a search trial proposed: layer group → kernel spec."""
    return {group: str(spec) for group, spec in trial.params.items()}


def refuse_search_run(sweep) -> None:
    """`kablate run --budget` cannot schedule a search yet: refuse a ``[search]`` sweep rather
    than budget only the finalists' trials.

    Raises:
        SweepError: naming the ``search`` key of the sweep file.
    """
    if sweep.search is not None:
        raise SweepError(
            sweep.source,
            "search",
            "declares a space to search, which `kablate run --budget` cannot schedule yet (its "
            "schedule would leave out the search's trials): run it without --budget; `kablate "
            "run --dry-run` estimates the search and bounds its finalists' time",
        )


def plan_key(plan: Mapping[str, str]) -> str:
    """A plan's own text as its key, for spaces where no two plans build the same network."""
    return json.dumps(dict(plan), sort_keys=True)
