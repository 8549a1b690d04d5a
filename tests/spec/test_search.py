"""The [search] table of a sweep: what it reads, and every refusal naming its key (what
`kablate plan` says about the space: tests/costs/test_screen.py, test_search_plan.py)."""

from __future__ import annotations

import pytest

from kablate.costs.catalog import build_catalog
from kablate.errors import SweepError
from kablate.spec import load_sweep
from tests.conftest import TINY_SEARCH, kablate, search_sweep


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


def test_plan_and_run_refuse_bad_input_with_exit_2(tmp_path):
    path = search_sweep(tmp_path, TINY_SEARCH.replace("budget = 3", "budget = 99"))
    out = kablate("plan", str(path), cwd=tmp_path)
    assert out.returncode == 2 and "`search.budget`" in out.stderr and "Traceback" not in out.stderr
    # --budget cannot schedule the search yet: refused before anything trains, and the
    # message points to --dry-run, which estimates a search (trials/search_estimate.py).
    out = kablate("run", str(search_sweep(tmp_path)), "--budget", "1h", cwd=tmp_path)
    assert out.returncode == 2 and "`search`" in out.stderr and "Traceback" not in out.stderr
    assert "`kablate run --budget` cannot schedule yet" in out.stderr
    assert "--dry-run` estimates the search" in out.stderr
    assert not (tmp_path / "results").exists()
