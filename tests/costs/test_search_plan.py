"""What `kablate plan` says under the table of a search sweep: the size of the space, the
budget's share of it and of the distinct networks the filters leave, within 100 columns."""

from __future__ import annotations

from kablate.costs.catalog import build_catalog
from kablate.costs.screen import SpaceScreen, survey_space
from kablate.costs.search_plan import search_lines
from kablate.spec import load_sweep
from tests.conftest import kablate, search_sweep


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
