"""The columns of variants.csv hold every cost of the cost vocabulary, with its front."""

from __future__ import annotations

from kablate.results.columns import RETIRED_COLUMNS, TRIAL_COLUMNS, VARIANT_COLUMNS
from kablate.spec.costs import COSTS


def test_every_cost_has_its_column_and_its_front_and_no_front_lacks_a_cost():
    fronts = {c for c in VARIANT_COLUMNS if c.startswith("front_")}
    assert fronts == {cost.front for cost in COSTS.values()} | {"front_all"}
    assert all(cost.column in VARIANT_COLUMNS for cost in COSTS.values())


def test_no_column_is_listed_twice_and_racing_adds_its_own():
    for columns in (VARIANT_COLUMNS, TRIAL_COLUMNS):
        assert len(set(columns)) == len(columns)
    assert set(RETIRED_COLUMNS) <= set(VARIANT_COLUMNS)
