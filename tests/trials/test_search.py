"""The NSGA-II search on a synthetic objective (no training) whose front is known by
enumerating its 81 plans."""

from __future__ import annotations

import itertools

import optuna
import pytest
from optuna.trial import TrialState

from kablate.analysis.hypervolume import hypervolume, reference_point
from kablate.costs.screen import Screen
from kablate.plans.space import space_plans, space_size, uniform_plans
from kablate.trials.search import (
    EVALUATED,
    FILTERED,
    INTERRUPTED,
    REPEAT,
    plan_key,
    read_candidate,
    search_front,
    search_study,
)
from kablate.trials.search_claim import CLAIMED

GROUPS = ("stem", "stage1.0", "stage2.0", "stage3.0")
CHOICES = {group: ("3", "5", "7") for group in GROUPS}
WEIGHTS = {"stem": 0.02, "stage1.0": 0.05, "stage2.0": 0.01, "stage3.0": 0.08}


def cost_of(plan):
    """Synthetic MACs: each conv's grows with k², as a dense conv's does."""
    return float(sum(int(spec) ** 2 for spec in plan.values()))


def accuracy_of(plan):
    """Synthetic accuracy: each group gains from a larger kernel, with diminishing returns."""
    return 0.8 + sum(WEIGHTS[g] * (1 - 3 / int(spec)) for g, spec in plan.items())


def every_plan():
    return [dict(zip(GROUPS, combo, strict=True)) for combo in itertools.product(*CHOICES.values())]


def test_the_space_lists_every_combination_once():
    assert list(space_plans(CHOICES)) == every_plan()
    assert uniform_plans(CHOICES) == [dict.fromkeys(GROUPS, s) for s in ("3", "5", "7")]
    assert uniform_plans({"stem": ("3", "5"), "body": ("5", "7")}) == [{"stem": "5", "body": "5"}]


def brute_force_front(plans):
    """Reference front, straight from the definition of Pareto dominance (common practice):
    no other plan is at least as accurate and as cheap, and better on one."""

    def beats(p, q):
        no_worse = accuracy_of(p) >= accuracy_of(q) and cost_of(p) <= cost_of(q)
        return no_worse and (accuracy_of(p) > accuracy_of(q) or cost_of(p) < cost_of(q))

    return {plan_key(q) for q in plans if not any(beats(p, q) for p in plans)}


def screen(plan):
    return Screen(plan_key(plan), cost_of(plan))


class Counter:
    """The objective, counting what it was asked to train."""

    def __init__(self):
        self.keys = []

    def __call__(self, plan):
        self.keys.append(plan_key(plan))
        return accuracy_of(plan)


def test_space_size_is_the_product_of_the_choices():
    assert space_size(CHOICES) == 3**4 == len(every_plan())


def test_a_full_budget_finds_the_exhaustive_front():
    score = Counter()
    result = search_front(CHOICES, screen, score, budget=81, seed=0)
    assert len(result.evaluated) == 81
    assert len(set(score.keys)) == len(score.keys) == 81  # nothing trained twice
    assert {c.key for c in result.front} == brute_force_front(every_plan())
    assert {c.outcome for c in result.candidates} <= {EVALUATED, REPEAT}


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_a_quarter_budget_reaches_most_of_the_hypervolume(seed):
    plans = every_plan()
    ref = reference_point([cost_of(p) for p in plans])
    exhaustive = hypervolume([accuracy_of(p) for p in plans], [cost_of(p) for p in plans], ref)
    first = uniform_plans(CHOICES)
    result = search_front(CHOICES, screen, Counter(), budget=20, seed=seed, first=first)
    found = result.evaluated
    assert [c.plan for c in found[:3]] == first  # all-3, all-5, all-7 first
    assert len(found) == 20
    ratio = hypervolume([c.accuracy for c in found], [c.cost for c in found], ref) / exhaustive
    assert 0.9 <= ratio <= 1.0
    # every plan on the found front is truly on it or dominated only by unseen plans
    assert all(c.accuracy == pytest.approx(accuracy_of(c.plan)) for c in found)


def test_filtered_plans_cost_no_budget_and_never_train():
    limit = 120.0
    score = Counter()

    def filtered(plan):
        cost = cost_of(plan)
        reason = f"MACs {cost:g} > max_macs {limit:g}" if cost > limit else None
        return Screen(plan_key(plan), cost, reason)

    result = search_front(CHOICES, filtered, score, budget=15, seed=0)
    assert len(result.evaluated) == len(score.keys) == 15
    assert all(c.cost <= limit for c in result.evaluated)
    dropped = [c for c in result.candidates if c.outcome == FILTERED]
    assert dropped and all(c.cost > limit and "max_macs" in c.reason for c in dropped)
    assert not {c.key for c in dropped} & set(score.keys)


def test_plans_that_build_one_network_are_trained_once():
    # "3:stack" is one 3×3 conv, the same network as "3" (VGG's stack of (k−1)/2 3×3 convs):
    # the screen gives both one key, so 9 plans hold 4 distinct networks
    choices = {group: ("3", "3:stack", "5") for group in GROUPS[:2]}

    def merged(plan):
        same = {g: s.removesuffix(":stack") for g, s in plan.items()}
        return Screen(plan_key(same), cost_of(same))

    trained = []
    result = search_front(choices, merged, lambda p: trained.append(merged(p).key) or 0.9, 4)
    assert len(trained) == len(set(trained)) == 4
    assert any(c.outcome == REPEAT for c in result.candidates)


def test_the_cap_on_proposals_ends_a_space_smaller_than_the_budget():
    score = Counter()
    result = search_front(CHOICES, screen, score, budget=100, seed=0, max_proposals=200)
    assert len(result.candidates) == 200
    # at most the 81 networks of the space; every other proposal repeats one of them
    assert len(result.evaluated) == len(score.keys) <= 81
    assert all(c.outcome == REPEAT for c in result.candidates if c.outcome != EVALUATED)


def test_a_resumed_search_continues_and_trains_nothing_twice(tmp_path):
    storage = f"sqlite:///{tmp_path / 'search.db'}"
    first = Counter()
    study = search_study(0, 5, storage=storage, study_name="s")
    search_front(CHOICES, screen, first, budget=10, seed=0, study=study)
    again = Counter()
    study = search_study(0, 5, storage=storage, study_name="s", load_if_exists=True)
    result = search_front(CHOICES, screen, again, budget=20, seed=0, study=study)
    assert len(first.keys) == 10 and len(again.keys) == 10
    assert not set(first.keys) & set(again.keys)
    assert {c.key for c in result.evaluated} == set(first.keys) | set(again.keys)


def test_a_search_killed_mid_training_resumes_to_its_budget(tmp_path):
    # A kill while the 6th plan trains leaves its trial RUNNING in the storage (a
    # KeyboardInterrupt out of `score` stands for the kill: nothing is told).
    storage = f"sqlite:///{tmp_path / 'search.db'}"
    trained = []

    def killed_at_sixth(plan):
        if len(trained) == 5:
            raise KeyboardInterrupt
        trained.append(plan_key(plan))
        return accuracy_of(plan)

    study = search_study(0, 5, storage=storage, study_name="s")
    with pytest.raises(KeyboardInterrupt):
        search_front(CHOICES, screen, killed_at_sixth, budget=12, seed=0, study=study)
    stale = study.get_trials(states=(TrialState.RUNNING,))
    assert len(stale) == 1
    again = Counter()
    study = search_study(0, 5, storage=storage, study_name="s", load_if_exists=True)
    result = search_front(CHOICES, screen, again, budget=12, seed=0, study=study)
    assert len(result.evaluated) == 12 and len(again.keys) == 7
    assert not set(trained) & set(again.keys)  # the 5 finished plans never train again
    assert study.get_trials(states=(TrialState.RUNNING,)) == []
    assert study.trials[stale[0].number].user_attrs["outcome"] == INTERRUPTED


@pytest.mark.parametrize(
    "written, expected",
    [
        ({"cost": 7.0, "key": "k"}, INTERRUPTED),  # cut between its key and its outcome
        ({"cost": 7.0, "key": "k", "outcome": CLAIMED}, INTERRUPTED),  # cut in training
        ({"cost": 7.0, "key": "k", "outcome": REPEAT}, REPEAT),
        ({"key": "k"}, None),  # cut before its cost, in a study written before it came first
        ({"cost": 7.0}, None),  # cut before its key: never proposed
    ],
)
def test_a_claim_cut_between_two_writes_reads_as_interrupted_or_not_at_all(written, expected):
    # A kill can fall between any two user-attribute writes (each is one write to the storage);
    # the recovery then tells the trial FAIL. Whatever was written, reading it never fails.
    study = optuna.create_study(directions=["maximize", "minimize"])
    trial = study.ask({"stem": optuna.distributions.CategoricalDistribution(["3", "5"])})
    for name, value in written.items():
        trial.set_user_attr(name, value)
    study.tell(trial, state=TrialState.FAIL)
    found = read_candidate(study.trials[0])
    assert (found.outcome if found else None) == expected
    if found:
        assert (found.key, found.cost, found.accuracy) == ("k", 7.0, None)
