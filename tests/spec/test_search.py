"""The [search] table of a sweep: what it reads, every refusal naming its key, and what
`kablate plan` says about the space, checked against the same choices written as a grid."""

from __future__ import annotations

import pytest

from kablate.costs.catalog import build_catalog
from kablate.costs.screen import SpaceScreen, survey_space
from kablate.costs.search_plan import search_lines
from kablate.errors import SweepError
from kablate.spec import load_sweep
from tests.conftest import TINY_PLANS, TINY_SEARCH, TINY_SWEEP, kablate, search_sweep, write_sweep


def test_a_search_table_reads_its_space_budget_and_cost(tmp_path):
    sweep = load_sweep(search_sweep(tmp_path, extra='\n[pick]\ncost = "params"\n'))
    assert sweep.search.choices["stage1"] == ("3", "5", "3:stack")
    assert (sweep.search.budget, sweep.search.seed) == (3, 0)
    assert sweep.search.cost == "params"  # unset: the [pick] cost, when it is macs or params
    sweep = load_sweep(search_sweep(tmp_path, extra='\n[pick]\ncost = "latency"\n'))
    assert sweep.search.cost == "macs"  # latency is not known before training


@pytest.mark.parametrize(
    ("old", "new", "key", "words"),
    [
        ("budget = 3", "budget = 13", "search.budget", ["13", "only 12 plans", "[[grid]]"]),
        ("budget = 3", "budget = 0", "search.budget", ["≥ 1"]),
        ("budget = 3", "budgets = 3", "search.budgets", ["did you mean `budget`"]),
        ("budget = 3", 'budget = "3"', "search.budget", ["an integer"]),
        ('stem = ["3", "5"]', "stem = []", "search.choices.stem", ["at least one"]),
        ('stem = ["3", "5"]', 'stem = ["3", "3"]', "search.choices.stem", ["twice"]),
        ('stem = ["3", "5"]', 'stem = "3"', "search.choices.stem", ["a list"]),
        ("budget = 3", 'budget = 3\ncost = "rf"', "search.cost", ['"macs", "params"']),
    ],
)
def test_bad_search_tables_name_the_key(tmp_path, old, new, key, words):
    with pytest.raises(SweepError) as caught:
        load_sweep(search_sweep(tmp_path, TINY_SEARCH.replace(old, new)))
    assert caught.value.key == key
    assert all(w in str(caught.value) for w in words), str(caught.value)


def test_search_beside_a_grid_or_without_choices_is_refused(tmp_path):
    with pytest.raises(SweepError, match="cannot be combined with \\[grid\\]") as caught:
        load_sweep(search_sweep(tmp_path, extra='\n[[grid]]\nstem = ["3", "5"]\n'))
    assert caught.value.key == "search"
    with pytest.raises(SweepError) as caught:
        load_sweep(search_sweep(tmp_path, "[search]\nbudget = 3\n[search.choices]\n"))
    assert caught.value.key == "search.choices"


@pytest.mark.parametrize(
    ("old", "new", "key"),
    [
        ('stage2 = ["3"', 'stag2 = ["3"', "search.choices.stag2"),
        ('"3:depthwise"]', '"3:depthwize"]', "search.choices.stage2"),
        ('stage1 = ["3",', 'stage1 = ["3s2",', "search.choices.stage1"),  # a stem-only stride
    ],
)
def test_groups_and_specs_the_network_refuses_name_the_key(tmp_path, old, new, key):
    sweep = load_sweep(search_sweep(tmp_path, TINY_SEARCH.replace(old, new)))
    with pytest.raises(SweepError) as caught:
        build_catalog(sweep)
    assert caught.value.key == key


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


def test_plan_prints_the_space_and_the_budgets_share(tmp_path):
    path = search_sweep(tmp_path, extra="\n[filter]\nmax_macs = 60_000\n")
    catalog = build_catalog(load_sweep(path))
    survey = survey_space(catalog.sweep.search.choices, SpaceScreen.of(catalog))
    text = " ".join(" ".join(search_lines(catalog)).split())  # unwrapped
    assert "12 plans in the space (stem 2 × stage1 3 × stage2 2)" in text
    assert "budget 3 plans trained with seed 0 = 25.0% of the space" in text
    share = f"{100 * 3 / survey.n_networks:.1f}%"
    assert (
        f"{survey.n_networks} distinct networks remain, of which the budget covers {share}" in text
    )
    out = kablate("plan", str(path), cwd=tmp_path)
    assert out.returncode == 0, out.stderr
    assert "25.0% of the space" in out.stdout
    assert max(len(line) for line in out.stdout.splitlines()) <= 100


def test_plan_and_run_refuse_bad_input_with_exit_2(tmp_path):
    path = search_sweep(tmp_path, TINY_SEARCH.replace("budget = 3", "budget = 99"))
    out = kablate("plan", str(path), cwd=tmp_path)
    assert out.returncode == 2 and "`search.budget`" in out.stderr and "Traceback" not in out.stderr
    out = kablate("run", str(search_sweep(tmp_path)), "--dry-run", cwd=tmp_path)
    assert out.returncode == 2 and "`search`" in out.stderr
    assert "--dry-run cannot do yet" in out.stderr
