"""Pareto fronts: variants that no other variant beats on accuracy and cost at once."""

from __future__ import annotations

from collections.abc import Sequence


def dominates(
    a_acc: float, a_costs: Sequence[float], b_acc: float, b_costs: Sequence[float]
) -> bool:
    """a is at least as accurate and as cheap as b on every axis, and better on one."""
    no_worse = a_acc >= b_acc and all(x <= y for x, y in zip(a_costs, b_costs, strict=True))
    better = a_acc > b_acc or any(x < y for x, y in zip(a_costs, b_costs, strict=True))
    return no_worse and better


def pareto_front(
    acc: Sequence[float], costs: Sequence[Sequence[float]], names: Sequence[str]
) -> list[bool]:
    """Which points are on the front (accuracy ↑, every cost ↓).

    Ties are broken deterministically: among points with identical accuracy and costs, only
    the one with the smallest name is on the front.
    """
    n = len(acc)
    on = []
    for i in range(n):
        beaten = any(dominates(acc[j], costs[j], acc[i], costs[i]) for j in range(n) if j != i)
        twin_first = any(
            acc[j] == acc[i] and list(costs[j]) == list(costs[i]) and names[j] < names[i]
            for j in range(n)
            if j != i
        )
        on.append(not beaten and not twin_first)
    return on


def staircase(
    acc: Sequence[float], cost: Sequence[float], on_front: Sequence[bool]
) -> list[tuple[float, float]]:
    """The front's points sorted by cost, as (cost, accuracy), for drawing a step line."""
    return sorted((c, a) for a, c, f in zip(acc, cost, on_front, strict=True) if f)
