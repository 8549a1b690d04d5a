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
RUNNING is told FAIL (``outcome = "interrupted"``) and its plan may be proposed again. One
process at a time owns a search study (several workers sharing one are not supported yet);
`kablate.trials.search_run` runs it for `kablate run`.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass

import optuna
from optuna.distributions import CategoricalDistribution
from optuna.trial import FrozenTrial, TrialState

from kablate.analysis.pareto import pareto_front
from kablate.costs.screen import Screen
from kablate.errors import SweepError
from kablate.plans.space import Choices, space_size

optuna.logging.set_verbosity(optuna.logging.WARNING)

EVALUATED, FILTERED, REPEAT = "evaluated", "filtered", "repeat"  # a proposal's outcome
INTERRUPTED = "interrupted"  # a proposal whose training was cut short by a kill
PROPOSALS_PER_EVALUATION = 20  # the default cap on proposals, per evaluation of the budget


@dataclass(frozen=True)
class Candidate:
    """One proposal of the sampler and what became of it."""

    number: int  # the Optuna trial number
    plan: dict[str, str]  # layer group → kernel spec
    key: str
    cost: float
    accuracy: float | None  # None unless evaluated
    outcome: str  # EVALUATED, FILTERED or REPEAT
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


def search_study(seed: int, population: int, **create) -> optuna.Study:
    """A two-objective study (accuracy ↑, cost ↓) sampled by NSGA-II; ``create`` goes to
    `optuna.create_study` (storage, study_name, load_if_exists)."""
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
    """
    study = study or search_study(seed, default_population(budget))
    fail_interrupted(study)
    if not study.get_trials(deepcopy=False):
        for plan in first:
            study.enqueue_trial(dict(plan))
    distributions = {group: CategoricalDistribution(specs) for group, specs in choices.items()}
    cap = max_proposals or PROPOSALS_PER_EVALUATION * budget
    candidates = [c for t in study.get_trials(deepcopy=False) if (c := read_candidate(t))]
    seen = {c.key for c in candidates if c.outcome == EVALUATED}
    while len(seen) < budget and len(candidates) < cap:
        trial = study.ask(distributions)
        plan = {group: trial.params[group] for group in choices}
        found = screen(plan)
        outcome = FILTERED if found.reason else REPEAT if found.key in seen else EVALUATED
        accuracy = score(plan) if outcome == EVALUATED else None
        candidate = Candidate(
            trial.number, plan, found.key, found.cost, accuracy, outcome, found.reason or ""
        )
        record_candidate(study, trial, candidate)
        candidates.append(candidate)
        if outcome == EVALUATED:
            seen.add(found.key)
    return SearchResult(candidates, space_size(choices), budget)


def fail_interrupted(study: optuna.Study) -> int:
    """Tell FAIL every trial left RUNNING (its process was killed mid-training), with
    ``outcome = "interrupted"``, so that the search continues from its finished trials and the
    plan may be proposed again; return how many. One process owns a search study at a time."""
    stale = study.get_trials(deepcopy=False, states=(TrialState.RUNNING,))
    for trial in stale:
        study._storage.set_trial_user_attr(trial._trial_id, "outcome", INTERRUPTED)
        study.tell(trial.number, state=TrialState.FAIL)
    return len(stale)


def record_candidate(study: optuna.Study, trial: optuna.Trial, candidate: Candidate) -> None:
    """Store what the candidate was (user attributes) and tell the sampler its values."""
    trial.set_user_attr("key", candidate.key)
    trial.set_user_attr("cost", candidate.cost)
    trial.set_user_attr("outcome", candidate.outcome)
    if candidate.reason:
        trial.set_user_attr("reason", candidate.reason)
    if candidate.outcome == EVALUATED:
        study.tell(trial, [candidate.accuracy, candidate.cost])
    else:
        study.tell(trial, state=TrialState.FAIL)


def read_candidate(trial: FrozenTrial) -> Candidate | None:
    """A finished trial of a search study as a `Candidate`; None for one still open."""
    if trial.state not in (TrialState.COMPLETE, TrialState.FAIL) or "key" not in trial.user_attrs:
        return None
    attrs = trial.user_attrs
    accuracy = trial.values[0] if trial.state == TrialState.COMPLETE else None
    return Candidate(
        trial.number,
        {group: str(spec) for group, spec in trial.params.items()},
        attrs["key"],
        float(attrs["cost"]),
        accuracy,
        attrs["outcome"],
        attrs.get("reason", ""),
    )


def refuse_search_run(sweep, how: str) -> None:
    """`kablate run` ``how`` (``--dry-run``, ``--budget``) cannot search yet: refuse a
    ``[search]`` sweep rather than estimate or budget only the finalists' trials.

    Raises:
        SweepError: naming the ``search`` key of the sweep file.
    """
    if sweep.search is not None:
        raise SweepError(
            sweep.source,
            "search",
            f"declares a space to search, which `kablate run` {how} cannot do yet (its "
            "estimate would leave out the search's trials): run it without that option; "
            "`kablate plan` shows the space's size and what the budget covers",
        )


def plan_key(plan: Mapping[str, str]) -> str:
    """A plan's own text as its key, for spaces where no two plans build the same network."""
    return json.dumps(dict(plan), sort_keys=True)
