"""The hypervolume of a set of (accuracy, cost) points: how much of the plane a front dominates.

The hypervolume indicator (Zitzler & Thiele 1998) of a set of points is the area (in two
dimensions) of the union of the boxes that each point dominates, bounded by a *reference
point* that every counted point must beat. Here accuracy is maximised and cost minimised, so a
point (a, c) dominates the box [a_ref, a] × [c, c_ref] with the reference (a_ref, c_ref). It
grows when a front moves up (more accurate) or left (cheaper) and never shrinks when a point is
added, which makes it the usual single figure for comparing two fronts found on the same axes
with the same reference point (common practice; it is what Optuna's
`optuna.visualization.plot_hypervolume_history` draws).

The reference point must be stated with every figure: hypervolumes computed with different
reference points cannot be compared. `reference_point` gives the one kablate uses: accuracy 0
and the largest cost among the points compared.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass


@dataclass(frozen=True)
class Reference:
    """The reference point: the worst accuracy and the worst cost a point may have to count."""

    accuracy: float
    cost: float

    def box(self, best_accuracy: float = 1.0) -> float:
        """The area of the box between the reference and (``best_accuracy``, cost 0): the
        hypervolume of an ideal point, by which a hypervolume is made a share."""
        return (best_accuracy - self.accuracy) * self.cost


def reference_point(costs: Sequence[float], accuracy: float = 0.0) -> Reference:
    """Accuracy 0 and the largest of ``costs``: a point of that cost adds nothing, any cheaper
    point adds its box."""
    return Reference(accuracy, max(costs))


def hypervolume(accuracy: Sequence[float], cost: Sequence[float], reference: Reference) -> float:
    """The area that the points (accuracy ↑, cost ↓) dominate, bounded by ``reference``.

    A point no better than the reference on either axis adds nothing; so does a dominated one.
    Sweep by cost, cheapest first: between one point's cost and the next, the area is as high
    as the best accuracy seen so far.
    """
    kept = sorted(
        (c, a)
        for a, c in zip(accuracy, cost, strict=True)
        if math.isfinite(a) and math.isfinite(c) and a > reference.accuracy and c < reference.cost
    )
    area, best = 0.0, reference.accuracy
    for i, (c, a) in enumerate(kept):
        best = max(best, a)
        next_cost = kept[i + 1][0] if i + 1 < len(kept) else reference.cost
        area += (next_cost - c) * (best - reference.accuracy)
    return area


def hypervolume_history(
    accuracy: Sequence[float], cost: Sequence[float], reference: Reference
) -> list[float]:
    """The hypervolume of the first n points, for every n: how the front grew, trial by trial."""
    return [hypervolume(accuracy[:n], cost[:n], reference) for n in range(1, len(accuracy) + 1)]
