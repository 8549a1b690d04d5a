"""A per-layer choice space: its size is the product of its lists, its plans are the
Cartesian product in itertools.product's order (first group slowest), and a search starts
from the uniform plans or, without one, from every group's first choice."""

from __future__ import annotations

import itertools

from kablate.plans.space import space_plans, space_size, start_plans, uniform_plans

CHOICES = {"stem": ("3", "5", "7"), "stage1": ("3", "5"), "stage2": ("5", "3", "3x2")}


def test_the_plans_are_the_cartesian_product_first_group_slowest():
    plans = list(space_plans(CHOICES))
    assert space_size(CHOICES) == len(plans) == 3 * 2 * 3
    expected = [dict(zip(CHOICES, c, strict=True)) for c in itertools.product(*CHOICES.values())]
    assert plans == expected
    assert plans[:2] == [
        {"stem": "3", "stage1": "3", "stage2": "5"},
        {"stem": "3", "stage1": "3", "stage2": "3"},
    ]


def test_a_search_starts_from_each_spec_every_group_may_take():
    assert uniform_plans(CHOICES) == [
        {"stem": "3", "stage1": "3", "stage2": "3"},
        {"stem": "5", "stage1": "5", "stage2": "5"},
    ]
    assert start_plans(CHOICES) == uniform_plans(CHOICES)


def test_without_a_common_spec_a_search_starts_from_every_groups_first_choice():
    disjoint = {"stem": ("7", "5"), "body": ("3", "3x2")}
    assert uniform_plans(disjoint) == []
    assert start_plans(disjoint) == [{"stem": "7", "body": "3"}]
