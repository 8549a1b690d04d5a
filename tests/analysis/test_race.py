"""The racing rule (analysis/race.py) on synthetic evidence (invented data, for tests only):
a hand-worked round, Holm against statsmodels and by hand, the bound against scipy, and the
promise that racing never retires the plan the full sweep recommends."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from statsmodels.stats.multitest import multipletests

from kablate.analysis.decide import decide
from kablate.analysis.evidence import Evidence
from kablate.analysis.race import DOMINATED, FUTILE, INFERIOR, compare_pairs, retirements


def evidence_of(correct: dict[str, np.ndarray]) -> Evidence:
    """Evidence from (seeds, images) correctness arrays; labels are all 0."""
    names = tuple(correct)
    stacked = np.stack([correct[n] for n in names]).astype(bool)
    n_seeds, n_images = stacked.shape[1:]
    predicted = np.where(stacked, 0, 1)
    return Evidence(names, tuple(range(n_seeds)), stacked, predicted, np.zeros(n_images, int))


def first_right(n_right: int, n_images: int = 200, n_seeds: int = 1) -> np.ndarray:
    """The first ``n_right`` images right on every seed, the rest wrong."""
    row = np.arange(n_images) < n_right
    return np.tile(row, (n_seeds, 1))


def test_hand_worked_round():
    # 200 images, one seed, 1 pp margin. "cheap" (cost 5) and "base" (cost 10) get 180 right;
    # "blind" (cost 10) gets 60 right, a subset of theirs: 120 discordant images, all against
    # it, 60 pp behind; its upper bound is near −60 + 1.645 × √(0.6 × 0.4 / 200) ≈ −54 pp
    # (normal approximation to the resampled count), and no resample comes near −1 pp: p = 0.
    # "near" (cost 12) gets 179 right: 1 image behind, worked out below.
    # "base" is worse than nothing cheaper and is never retired anyway.
    ev = evidence_of(
        {
            "base": first_right(180),
            "cheap": first_right(180),
            "blind": first_right(60),
            "near": first_right(179),
        }
    )
    costs = {"base": 10, "cheap": 5, "blind": 10, "near": 12}
    out = retirements(ev, costs, "base", 0.01, n_resamples=2000)
    assert set(out) == {"blind"}
    # Two dominators with p = 0: the cheaper one is named.
    assert out["blind"].by == "cheap"
    assert out["blind"].diff == pytest.approx(-0.6)
    assert out["blind"].upper == pytest.approx(-0.6 + 1.645 * np.sqrt(0.24 / 200), abs=0.01)
    assert out["blind"].p_holm == 0.0
    pairs = {(d.name, d.by): d for d in compare_pairs(ev, costs, "base", 0.01, 2000)}
    # Pairs tested: w costs no more than v, v not the baseline; the baseline is a dominator.
    assert set(pairs) == {
        ("blind", "base"),
        ("blind", "cheap"),
        ("near", "base"),
        ("near", "cheap"),
        ("near", "blind"),
    }
    # near vs cheap: 1 discordant image of 200; d ≥ −1 pp unless the draw holds it 3+ times
    # (Binomial(200, 1/200) ≥ 3: 1 − P(≤ 2) ≈ 0.080), so p ≈ 0.92, Holm keeps it in.
    expected = 1 - stats.binom.sf(2, 200, 1 / 200)
    assert pairs[("near", "cheap")].p_value == pytest.approx(expected, abs=0.03)
    assert not pairs[("near", "cheap")].retires


def test_a_wider_margin_keeps_a_variant_that_a_narrow_one_retires():
    # "worse" is 10 images of 200 behind (5 pp). The resampled count of those images is
    # Binomial(200, 0.05): at a 1 pp margin p = P(count ≤ 2) ≈ 0.002 (retired); at 8 pp,
    # P(count ≤ 16) ≈ 0.99 (kept).
    ev = evidence_of({"base": first_right(190), "worse": first_right(180)})
    costs = {"base": 10, "worse": 10}
    (pair,) = compare_pairs(ev, costs, "base", 0.01, 4000)
    assert pair.p_value == pytest.approx(stats.binom.cdf(2, 200, 0.05), abs=0.003)
    assert set(retirements(ev, costs, "base", 0.01, 4000)) == {"worse"}
    assert retirements(ev, costs, "base", 0.08, 4000) == {}


def test_holm_adjustment_matches_statsmodels_and_the_hand_formula():
    # Holm 1979: sort the m p-values, multiply the i-th smallest by (m − i), take running
    # maxima, cap at 1. statsmodels.stats.multitest.multipletests is the reference library.
    rng = np.random.default_rng(7)
    truth = (0.9, 0.88, 0.8, 0.9, 0.7)
    correct = {n: rng.random((2, 150)) < p for n, p in zip("abcde", truth, strict=True)}
    costs = {"a": 5, "b": 4, "c": 6, "d": 3, "e": 7}
    pairs = compare_pairs(evidence_of(correct), costs, "a", 0.01, 1000)
    p = np.array([d.p_value for d in pairs])
    reference = multipletests(p, method="holm")[1]
    np.testing.assert_allclose([d.p_holm for d in pairs], reference)
    order = np.argsort(p)
    m = len(p)
    by_hand = np.minimum(1, np.maximum.accumulate(p[order] * (m - np.arange(m))))
    np.testing.assert_allclose(np.array([d.p_holm for d in pairs])[order], by_hand)


def test_upper_bound_agrees_with_scipy_bootstrap_on_one_seed():
    # With one seed the two-level bootstrap is the paired bootstrap of the per-image
    # differences; scipy.stats.bootstrap (percentile, one-sided "less") is the reference.
    rng = np.random.default_rng(3)
    a = rng.random((1, 400)) < 0.85
    b = a.copy()
    flip = rng.random(400) < 0.1
    b[0, flip] = ~b[0, flip]
    ev = evidence_of({"base": a, "other": b})
    (pair,) = compare_pairs(ev, {"base": 1, "other": 2}, "base", 0.01, 20000)
    per_image = b[0].astype(float) - a[0].astype(float)
    ref = stats.bootstrap(
        (per_image,),
        np.mean,
        n_resamples=20000,
        method="percentile",
        alternative="less",
        random_state=1,
    )
    assert pair.upper == pytest.approx(ref.confidence_interval.high, abs=0.006)


@pytest.mark.parametrize("world", range(6))
def test_never_retires_what_the_full_sweep_recommends(world):
    # Known ground truth: each variant's true accuracy and cost; 3 seeds × 300 images. Racing
    # on seed 0 alone must not retire the plan the full sweep's margin rule recommends.
    rng = np.random.default_rng(100 + world)
    n_variants = 6
    truth = rng.uniform(0.75, 0.95, n_variants)
    costs = {f"v{i}": float(c) for i, c in enumerate(rng.integers(1, 10, n_variants))}
    shared = rng.random((3, 300))  # common difficulty of each (seed, image): paired evidence
    correct = {f"v{i}": shared < t for i, t in enumerate(truth)}
    for name in correct:  # each variant also errs on a few images of its own
        correct[name] = correct[name] ^ (rng.random((3, 300)) < 0.03)
    ev = evidence_of(correct)
    full = decide(ev, costs, "v0", margin=0.01, n_resamples=1000, leave_one_out=False)
    retired = retirements(ev.without_seed(1).without_seed(2), costs, "v0", 0.01, 1000)
    assert full.recommended not in retired
    assert "v0" not in retired


def test_futility_hand_worked_round():
    # 200 images, one seed, 1 pp margin, the baseline "base" (cost 10) gets 180 right.
    # "twin" (cost 20) gets the same images right: d = 0 in every resample, p = 0, retired
    #   for futility (it cannot gain the margin it would need to pay for itself).
    # "edge" (cost 20) gets 2 more right (+1 pp): d ≥ 1 pp when the resample draws those two
    #   images at least twice, Binomial(200, 2/200) ≥ 2, p = P ≈ 0.595 (scipy.stats.binom):
    #   kept.
    # "gain" (cost 30) gets 20 more right (+10 pp): kept. (It costs more than "edge", which it
    #   would otherwise dominate.)
    # "cheap" (cost 5) costs less than the baseline: never tested for futility; it is tested
    #   for inferiority to the baseline instead (d = 0 in every resample, p = 1: kept).
    ev = evidence_of(
        {
            "base": first_right(180),
            "twin": first_right(180),
            "edge": first_right(182),
            "gain": first_right(200),
            "cheap": first_right(180),
        }
    )
    costs = {"base": 10, "twin": 20, "edge": 20, "gain": 30, "cheap": 5}
    futile = {
        d.name: d
        for d in compare_pairs(ev, costs, "base", 0.01, 4000, futility=True)
        if d.why == FUTILE
    }
    assert set(futile) == {"twin", "edge", "gain"}
    assert all(d.by == "base" for d in futile.values())
    assert futile["twin"].p_value == 0.0 and futile["twin"].upper == 0.0
    assert futile["edge"].p_value == pytest.approx(stats.binom.sf(1, 200, 0.01), abs=0.03)
    assert futile["gain"].p_value == pytest.approx(1.0)
    out = retirements(ev, costs, "base", 0.01, 4000, futility=True)
    assert set(out) == {"twin"} and out["twin"].why == FUTILE
    # Without futility (the one-standard-error rule's race) nobody is retired here.
    assert retirements(ev, costs, "base", 0.01, 4000) == {}


@pytest.mark.parametrize("world", range(6))
def test_futility_never_changes_the_margin_rules_pick(world):
    # Known ground truth: the plans cheaper than the baseline v0 anywhere from 80% to 90%, the
    # costlier ones within ±0.4 pp of it (a gain too small to pay for), 3 seeds × 1,000
    # images, each plan erring on 0.5% of images of its own. Futility on seed 0 retires only
    # plans costlier than the baseline; dropping every plan retired on seed 0 from the full
    # evidence leaves the margin rule's recommendation and its qualifying set unchanged.
    rng = np.random.default_rng(200 + world)
    names = [f"v{i}" for i in range(7)]
    costs = dict(zip(names, (5.0, 1.0, 2.0, 3.0, 8.0, 9.0, 12.0), strict=True))
    base = rng.uniform(0.8, 0.9)
    truth = {
        n: base + rng.uniform(-0.004, 0.004) if costs[n] > costs["v0"] else rng.uniform(0.8, 0.9)
        for n in names
    }
    truth["v0"] = base
    shared = rng.random((3, 1000))
    correct = {n: (shared < t) ^ (rng.random((3, 1000)) < 0.005) for n, t in truth.items()}
    ev = evidence_of(correct)
    first = ev.without_seed(1).without_seed(2)
    tested = compare_pairs(first, costs, "v0", 0.01, 1000, futility=True)
    assert any(d.why == FUTILE and d.retires for d in tested)  # the rule is exercised here
    retired = retirements(first, costs, "v0", 0.01, 1000, True)
    assert all(costs[n] > costs["v0"] for n, d in retired.items() if d.why == FUTILE)
    kept = evidence_of({n: c for n, c in correct.items() if n not in retired})
    full = decide(ev, costs, "v0", margin=0.01, n_resamples=1000, leave_one_out=False)
    raced = decide(kept, costs, "v0", margin=0.01, n_resamples=1000, leave_one_out=False)
    assert raced.recommended == full.recommended
    assert set(raced.qualifying) == set(full.qualifying) - set(retired)


def test_the_margin_rules_family_holds_the_tests_that_bear_on_its_pick():
    # Under the margin rule a variant costlier than the baseline is tested for futility only
    # (none of its domination pairs), and a cheaper one keeps its domination pairs and gains a
    # test against the baseline. 200 images, one seed: "base" (cost 10) 180 right, "dear"
    # (cost 20) and "dearer" (cost 30) 180 right, "cheap" (cost 5) and "cheaper" (cost 2) 180
    # and 179 right.
    ev = evidence_of(
        {
            "base": first_right(180),
            "dear": first_right(180),
            "dearer": first_right(180),
            "cheap": first_right(180),
            "cheaper": first_right(179),
        }
    )
    costs = {"base": 10, "dear": 20, "dearer": 30, "cheap": 5, "cheaper": 2}
    tested = {(d.name, d.by): d.why for d in compare_pairs(ev, costs, "base", 0.01, 500, True)}
    assert tested == {
        ("dear", "base"): FUTILE,
        ("dearer", "base"): FUTILE,
        ("cheap", "cheaper"): DOMINATED,
        ("cheap", "base"): INFERIOR,
        ("cheaper", "base"): INFERIOR,
    }
    # The one-standard-error rule's race (no futility) tests every domination pair instead.
    every = {(d.name, d.by) for d in compare_pairs(ev, costs, "base", 0.01, 500)}
    assert every == {
        (v, w) for v in costs for w in costs if v != "base" and w != v and costs[w] <= costs[v]
    }


def test_inferiority_hand_worked_round():
    # 200 images, one seed, 1 pp margin. "base" (cost 10) gets 190 right; "lean" (cost 4) gets
    # 180 of the same right (10 discordant images, all against it: 5 pp behind). Its
    # resampled deficit is the count of those 10 images drawn, Binomial(200, 0.05): d ≥ −1 pp
    # when the count is ≤ 2, p = P(count ≤ 2) ≈ 0.0023 (scipy.stats.binom). It is the only
    # test, so Holm leaves p as it is: retired as inferior, by the baseline that costs more.
    # "slim" (cost 3) gets 189 right: 1 image behind, P(count of 1/200 ≤ 2) ≈ 0.92: kept.
    ev = evidence_of({"base": first_right(190), "lean": first_right(180)})
    (pair,) = compare_pairs(ev, {"base": 10, "lean": 4}, "base", 0.01, 8000, futility=True)
    assert (pair.name, pair.by, pair.why) == ("lean", "base", INFERIOR)
    assert pair.diff == pytest.approx(-0.05)
    assert pair.p_value == pytest.approx(stats.binom.cdf(2, 200, 0.05), abs=0.002)
    assert pair.retires
    ev = evidence_of({"base": first_right(190), "slim": first_right(189)})
    (pair,) = compare_pairs(ev, {"base": 10, "slim": 3}, "base", 0.01, 4000, futility=True)
    assert pair.p_value == pytest.approx(stats.binom.cdf(2, 200, 0.005), abs=0.02)
    assert not pair.retires


@pytest.mark.parametrize("world", range(6))
def test_inferiority_never_retires_the_margin_rules_pick(world):
    # Known ground truth: plans cheaper than the baseline v0 (true accuracy 0.85) lie anywhere
    # from 6 pp below it to 1 pp above, 3 seeds × 1,000 images, each plan erring on 1% of
    # images of its own. Racing on seed 0 must not retire the plan the full sweep's margin
    # rule recommends; what it retires as inferior truly loses more than the margin and is
    # not in the full sweep's qualifying set. (Three of the six worlds retire a plan as
    # inferior, the others by domination.)
    rng = np.random.default_rng(300 + world)
    names = [f"v{i}" for i in range(6)]
    costs = dict(zip(names, (10.0, 2.0, 3.0, 5.0, 7.0, 9.0), strict=True))
    truth = {n: 0.85 + (0 if n == "v0" else rng.uniform(-0.06, 0.01)) for n in names}
    shared = rng.random((3, 1000))
    correct = {n: (shared < t) ^ (rng.random((3, 1000)) < 0.01) for n, t in truth.items()}
    ev = evidence_of(correct)
    full = decide(ev, costs, "v0", margin=0.01, n_resamples=1000, leave_one_out=False)
    retired = retirements(ev.without_seed(1).without_seed(2), costs, "v0", 0.01, 1000, True)
    assert retired  # the rule is exercised in every world
    assert full.recommended not in retired
    inferior = {n for n, d in retired.items() if d.why == INFERIOR}
    assert all(truth[n] < truth["v0"] - 0.01 for n in inferior)
    assert not set(full.qualifying) & inferior
