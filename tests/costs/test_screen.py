"""Screening a search's space before it trains: the survey of a small space counts the plans
the filters rule out and the distinct networks left, and must agree with the same choices
written as a [[grid]], which `kablate plan` enumerates, merges and filters on its own path."""

from __future__ import annotations

import pytest

from kablate.costs.catalog import build_catalog
from kablate.costs.screen import SpaceScreen, survey_space
from kablate.spec import load_sweep
from tests.conftest import TINY_PLANS, TINY_SEARCH, TINY_SWEEP, search_sweep, write_sweep


def grid_twin(tmp_path, filters=""):
    """The same choices as a [[grid]], which `kablate plan` enumerates, costs and filters."""
    grid = TINY_SEARCH.replace("[search]\nbudget = 3\n\n[search.choices]", "[[grid]]")
    return build_catalog(
        load_sweep(write_sweep(tmp_path, TINY_SWEEP.replace(TINY_PLANS, grid + filters), "grid"))
    )


@pytest.mark.parametrize("filters", ["", "\n[filter]\nmax_macs = 60_000\n"])
def test_the_survey_counts_what_the_grid_keeps_and_drops(tmp_path, filters):
    catalog = build_catalog(load_sweep(search_sweep(tmp_path, extra=filters)))
    survey = survey_space(catalog.sweep.search.choices, SpaceScreen.of(catalog))
    twin = grid_twin(tmp_path, filters)
    # the grid merges plans that build one network ("3:stack" is "3") and drops what the
    # filters rule out; the survey must agree on both counts
    assert survey.n_plans == 12
    assert survey.n_networks == len(twin.variants)
    dropped_plans = sum(1 + len(item.variant.aliases) for item, _ in twin.dropped)
    assert survey.n_ruled_out == dropped_plans
    if filters:
        assert survey.n_ruled_out > 0
