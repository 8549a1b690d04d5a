"""Pareto fronts against a brute-force reference written from the definition of dominance."""

from __future__ import annotations

import math

from hypothesis import given, settings
from hypothesis import strategies as st

from kablate.analysis.pareto import pareto_front, staircase


def brute_force_front(acc, costs, names):
    """Reference: O(n²) straight from the definition (Pareto dominance, common practice):
    j dominates i if it is no worse on accuracy (↑) and every cost (↓) and better on one.
    Exact twins keep only the smallest name."""
    n = len(acc)

    def dom(j, i):
        no_worse = acc[j] >= acc[i] and all(
            cj <= ci for cj, ci in zip(costs[j], costs[i], strict=True)
        )
        better = acc[j] > acc[i] or any(cj < ci for cj, ci in zip(costs[j], costs[i], strict=True))
        return no_worse and better

    out = []
    for i in range(n):
        beaten = any(dom(j, i) for j in range(n) if j != i)
        twin = any(
            acc[j] == acc[i] and list(costs[j]) == list(costs[i]) and names[j] < names[i]
            for j in range(n)
            if j != i
        )
        out.append(not beaten and not twin)
    return out


@st.composite
def points(draw):
    n = draw(st.integers(0, 14))
    k = draw(st.integers(1, 3))
    # Few distinct values, so ties on accuracy, on a cost and exact twins all happen often.
    acc = draw(st.lists(st.sampled_from([0.5, 0.7, 0.8, 0.9, 0.95]), min_size=n, max_size=n))
    costs = draw(
        st.lists(st.lists(st.integers(1, 5), min_size=k, max_size=k), min_size=n, max_size=n)
    )
    names = draw(st.permutations([f"v{i:02d}" for i in range(n)]))
    return acc, [[float(c) for c in row] for row in costs], list(names)


@settings(max_examples=300, deadline=None)
@given(points())
def test_front_matches_brute_force_on_random_points(data):
    acc, costs, names = data
    assert pareto_front(acc, costs, names) == brute_force_front(acc, costs, names)


@settings(max_examples=100, deadline=None)
@given(points())
def test_front_does_not_depend_on_input_order(data):
    acc, costs, names = data
    flags = dict(zip(names, pareto_front(acc, costs, names), strict=True))
    rev = pareto_front(acc[::-1], costs[::-1], names[::-1])
    assert dict(zip(names[::-1], rev, strict=True)) == flags


def test_hand_worked_front_and_twins():
    # a: cheapest; b: dominated by c (same cost, less accurate); c, d: trade-off;
    # e is an exact twin of d and loses on name.
    acc = [0.80, 0.85, 0.90, 0.95, 0.95]
    costs = [[1.0], [3.0], [3.0], [7.0], [7.0]]
    names = ["a", "b", "c", "d", "e"]
    assert pareto_front(acc, costs, names) == [True, False, True, True, False]
    assert staircase(acc, [c[0] for c in costs], [True, False, True, True, False]) == [
        (1.0, 0.80),
        (3.0, 0.90),
        (7.0, 0.95),
    ]


def test_nan_is_never_on_the_front():
    assert pareto_front([math.nan, 0.5], [[1.0], [2.0]], ["a", "b"]) == [False, True]
    assert pareto_front([0.9, 0.5], [[math.nan], [2.0]], ["a", "b"]) == [False, True]
