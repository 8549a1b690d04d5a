"""Pareto fronts: variants that no other variant beats on accuracy and cost at once.

Accuracy is maximised and every cost minimised. A point is on the front when no other point
is at least as good on every axis and strictly better on one (Pareto dominance).
"""

from __future__ import annotations

import math
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

    Points are visited best-first: by accuracy (descending), then costs, then name. A point
    can only be dominated by one visited before it, and if it is dominated at all it is
    dominated by a point already on the front, so comparing with the front so far suffices.

    Ties are broken deterministically: among points with identical accuracy and costs, only
    the one with the smallest name is on the front. A point with a NaN accuracy or cost is
    never on the front.

    Args:
        acc: accuracy per point.
        costs: per point, its costs (one or more, the same number for every point).
        names: per point, a unique name (the tie-breaker).
    """
    n = len(acc)
    ok = [math.isfinite(acc[i]) and all(math.isfinite(c) for c in costs[i]) for i in range(n)]
    order = sorted(
        (i for i in range(n) if ok[i]), key=lambda i: (-acc[i], tuple(costs[i]), names[i])
    )
    front: list[int] = []
    for i in order:
        ci = tuple(costs[i])
        if any(
            dominates(acc[j], costs[j], acc[i], ci) or (acc[j] == acc[i] and tuple(costs[j]) == ci)
            for j in front
        ):
            continue
        front.append(i)
    on = set(front)
    return [i in on for i in range(n)]


def staircase(
    acc: Sequence[float], cost: Sequence[float], on_front: Sequence[bool]
) -> list[tuple[float, float]]:
    """The front's points sorted by cost, as (cost, accuracy), for drawing a step line."""
    return sorted((c, a) for a, c, f in zip(acc, cost, on_front, strict=True) if f)
