"""What a search found, as the report reads it: the hypervolume after each trained plan, the
front, and the shares of the space, worked by hand (the hypervolume itself is checked against
Optuna's in test_hypervolume.py)."""

from __future__ import annotations

import pytest

from kablate.analysis.search import summarize_record, summarize_search


def test_a_search_summary_holds_its_front_history_and_shares():
    # Four trained plans of a 16-plan space, out of 6 proposals; reference (0, 8), the largest
    # cost. By hand: (0.5, 2) → 0.5 × 6 = 3.0; (0.9, 8) adds nothing at the reference's cost;
    # (0.7, 4) adds 4 × 0.2 = 0.8; (0.6, 6) is dominated by (0.7, 4).
    summary = summarize_search([0.5, 0.9, 0.7, 0.6], [2, 8, 4, 6], ["a", "b", "c", "d"], 16, 6)
    assert (summary.reference.accuracy, summary.reference.cost) == (0.0, 8)
    assert summary.history == pytest.approx([3.0, 3.0, 3.8, 3.8])
    assert summary.on_front == [True, True, True, False]
    assert summary.share_evaluated == 4 / 16
    assert summary.share_of_box == pytest.approx(3.8 / 8)


def test_a_record_is_summarised_over_its_trained_candidates_in_the_order_proposed():
    record = {
        "n_space": 16,
        "candidates": [
            {"name": "a", "accuracy": 0.5, "cost": 2},
            {"name": "x", "accuracy": None, "cost": 1},  # filtered or repeated: not trained
            {"name": "b", "accuracy": 0.9, "cost": 8},
            {"name": "c", "accuracy": 0.7, "cost": 4},
            {"name": "y", "accuracy": None, "cost": 3},
            {"name": "d", "accuracy": 0.6, "cost": 6},
        ],
    }
    summary = summarize_record(record)
    assert summary == summarize_search([0.5, 0.9, 0.7, 0.6], [2, 8, 4, 6], "abcd", 16, 6)
    assert (summary.n_trained, summary.n_proposed) == (4, 6)
    assert summarize_record({"n_space": 4, "candidates": []}).share_of_box == 0.0
