"""The hypervolume-over-trials plot draws `analysis.hypervolume`'s growth on the search's
trained plans: the drawn line's y values are asserted through matplotlib's artists."""

from __future__ import annotations

import matplotlib.pyplot as plt
import pytest

from kablate.analysis.hypervolume import hypervolume_history, reference_point
from kablate.report.search_plots import (
    HYPERVOLUME_LINE,
    HYPERVOLUME_PLOT,
    draw_hypervolume,
    plot_hypervolume,
)

# (accuracy, MACs) of five trained plans, in the order trained, and one filtered proposal
POINTS = [(0.90, 400.0), (0.85, 100.0), (0.80, 300.0), (0.93, 900.0), (0.88, 200.0)]


def record() -> dict:
    candidates = [
        {"name": f"p{i}", "accuracy": a, "cost": c, "outcome": "evaluated"}
        for i, (a, c) in enumerate(POINTS)
    ]
    candidates.insert(2, {"name": "x", "accuracy": None, "cost": 5000.0, "outcome": "filtered"})
    return {
        "candidates": candidates,
        "cost": "macs",
        "n_space": 81,
        "budget": 5,
        "training_seed": 0,
    }


def test_the_line_is_the_hypervolume_history(tmp_path):
    fig = draw_hypervolume(record(), "sub")
    (line,) = [ln for ln in fig.axes[0].get_lines() if ln.get_label() == HYPERVOLUME_LINE]
    accuracy, cost = [a for a, _ in POINTS], [c for _, c in POINTS]
    expected = hypervolume_history(accuracy, cost, reference_point(cost))
    # by hand, with the reference (accuracy 0, MACs 900, the largest): the first box is
    # (900 − 400) × 0.90 = 450; the second plan adds (400 − 100) × 0.85 = 255
    assert expected[:2] == pytest.approx([450.0, 705.0])
    assert list(line.get_ydata()) == pytest.approx(expected)
    assert list(line.get_xdata()) == [1, 2, 3, 4, 5]
    assert "reference: accuracy 0" in fig.axes[0].get_ylabel()
    plt.close(fig)
    written = plot_hypervolume(record(), tmp_path, "sub")
    assert sorted(p.name for p in written) == [f"{HYPERVOLUME_PLOT}.png", f"{HYPERVOLUME_PLOT}.svg"]
    assert all(p.stat().st_size > 0 for p in written)


def test_no_plot_before_a_plan_is_trained(tmp_path):
    empty = dict(record(), candidates=record()["candidates"][2:3])
    assert plot_hypervolume(empty, tmp_path, "sub") == []
