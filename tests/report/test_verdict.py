"""The card's words for the decision: signed percentage points, the closest cheaper plan, the
stability verdict at the 70% threshold and the resolution sentence, each checked against the
figures of a synthetic analysis (test_card.py checks the headline they make up)."""

from __future__ import annotations

import math
from dataclasses import replace

import pytest

from kablate.analysis.decide import STABLE_SHARE, Contrast
from kablate.analysis.summary import analyze
from kablate.report.verdict import (
    closest_cheaper,
    cost_ratio,
    diff_prose,
    pct,
    pp,
    raced_sentence,
    resolution_sentence,
    stability_sentence,
)
from kablate.spec.schema import PickSpec
from tests.analysis.synthetic import VAL, data_json, plan, rows, with_predictions

EVERY = dict(VAL, v2=[0.93, 0.94, 0.95], v3=[0.85, 0.80, 0.90])  # all four trained


@pytest.fixture(scope="module")
def analysis():
    return analyze(with_predictions(rows(EVERY)), [], plan(), [], data_json(), PickSpec())


def test_figures_are_signed_percentage_points_or_n_a():
    assert (pp(-0.0011), pp(0.005), pp(0.0)) == ("-0.11 pp", "+0.50 pp", "+0.00 pp")
    assert (pct(0.12345), pct(math.nan), pp(None)) == ("12.35%", "n/a", "n/a")
    c = Contrast("x", -0.0011, -0.0078, 0.0056, -0.0067, 0.003, 0.7)
    assert diff_prose(c) == ("-0.11 pp [-0.78 pp, +0.56 pp] (one-sided 95% lower bound -0.67 pp)")


def test_the_closest_cheaper_plan_has_the_highest_lower_bound_among_the_cheaper(analysis):
    d = analysis.decision
    # cheaper than base (1,000 MACs): cheap (400) and never (10); big (5,000) is not
    cheaper = [d.contrasts["cheap"], d.contrasts["never"]]
    assert closest_cheaper(analysis) == max(cheaper, key=lambda c: c.lower_bound)
    assert closest_cheaper(analysis).name == "cheap"  # 0.90 against never's 0.85


def test_the_cost_ratio_is_the_plans_cost_over_the_baselines(analysis):
    assert cost_ratio(analysis, "cheap") == "400 (0.40×)"
    assert cost_ratio(analysis, "big") == "5.0k (5.00×)"


def test_below_70_percent_of_resamples_the_verdict_is_said_to_be_unsettled(analysis):
    d = analysis.decision
    assert STABLE_SHARE == 0.7
    settled = stability_sentence(replace(d, stability=0.7, leave_one_out={}))
    assert settled == "Stability: the rule picks it in 70% of the bootstrap resamples."
    unsettled = stability_sentence(replace(d, stability=0.69, leave_one_out={0: "base"}))
    assert unsettled.startswith("**The data cannot decide firmly:**")
    assert "only 69% of the time (below 70%)" in unsettled
    assert unsettled.endswith("Leaving one seed out picks: without seed 0: base.")


def test_the_resolution_sentence_quotes_the_resolution_and_what_the_margin_needs(analysis):
    r, d = analysis.resolution, analysis.decision
    text = resolution_sentence(analysis)
    assert f"differences of about {100 * r.smallest:.2f} pp" in text
    assert f"with {r.n_images} validation images" in text
    assert f"needs about {r.images_for(d.margin):,} validation images" in text
    assert ("so this sweep can resolve it" in text) == (r.images_for(d.margin) <= r.n_images)


def test_the_headline_counts_the_plans_racing_retired(analysis):
    assert raced_sentence(analysis) == []  # no race: nothing said
    variants = analysis.variants.copy()
    variants["retired_after"] = [None, 0, None, 1][: len(variants)]
    raced = replace(analysis, variants=variants)
    assert raced_sentence(raced) == [
        f"Racing retired 2 of the {len(variants)} plans after fewer seeds (see Racing over "
        "seeds): they are left out of this comparison."
    ]
