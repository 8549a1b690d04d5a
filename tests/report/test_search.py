"""The card's search section: the front table lists exactly the front of the trained plans,
and the hypervolume table the plans that moved it, with the figures worked by hand in
tests/analysis/test_search.py."""

from __future__ import annotations

from kablate.report.search import search_section
from tests.report.markdown import md_table

RECORD = {
    "n_space": 16,
    "cost": "macs",
    "sampler_seed": 3,
    "training_seed": 0,
    "candidates": [
        {"name": "a", "accuracy": 0.5, "cost": 2000},
        {"name": "x", "accuracy": None, "cost": 1000},  # ruled out by a filter
        {"name": "b", "accuracy": 0.9, "cost": 8000},
        {"name": "c", "accuracy": 0.7, "cost": 4000},
        {"name": "d", "accuracy": 0.6, "cost": 6000},  # dominated by c
    ],
}


def test_the_front_table_lists_the_front_of_the_trained_plans_with_their_figures():
    lines = search_section(RECORD)
    assert md_table(lines, "| plan on the front found") == [
        ["a", "2,000", "50.00%"],
        ["b", "8,000", "90.00%"],
        ["c", "4,000", "70.00%"],
    ]
    prose = lines[2]
    assert "trained 4 of the 16 plans of the space (25.0%" in prose
    assert "1 more proposals were ruled out" in prose and "sampler seed 3" in prose


def test_the_hypervolume_table_shows_the_plans_that_moved_the_front_and_the_last():
    # reference: accuracy 0 and the largest MACs trained, 8,000; box 8,000
    # a: 0.5 × 6,000 = 3,000; b adds nothing; c adds 0.2 × 4,000 = 800; d adds nothing
    rows = md_table(search_section(RECORD), "| plans trained")
    assert rows == [["1", "3000", "37.5%"], ["3", "3800", "47.5%"], ["4", "3800", "47.5%"]]


def test_no_section_without_a_search_and_a_note_before_any_plan_trained():
    assert search_section(None) == []
    untrained = dict(RECORD, candidates=[dict(c, accuracy=None) for c in RECORD["candidates"]])
    assert "No plan has been trained by the search yet." in search_section(untrained)
