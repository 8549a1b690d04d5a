"""The recommended plan: non-inferiority, the one-standard-error rule, Holm and McNemar."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats
from statsmodels.stats.contingency_tables import mcnemar

from kablate.analysis.decide import (
    Contrast,
    decide,
    exact_mcnemar,
    holm_adjust,
    noninferior_pick,
    one_se_pick,
    point_picks,
)
from kablate.analysis.evidence import Evidence
from kablate.analysis.power import resolution_before, z_sum

# Liu et al. 2022, "A ConvNet for the 2020s", appendix table of kernel sizes (ImageNet-1K,
# mean ± sd over 3 seeds, GFLOPs).
CONVNEXT = {
    "k3": (79.92, 0.08, 4.07),
    "k5": (80.35, 0.08, 4.10),
    "k7": (80.57, 0.14, 4.15),
    "k9": (80.57, 0.06, 4.21),
    "k11": (80.47, 0.11, 4.29),
}


@pytest.mark.parametrize(("within_se", "expected"), [(1, "k7"), (2, "k7"), (3, "k5")])
def test_one_se_rule_on_the_convnext_kernel_table(within_se, expected):
    scores = {k: m for k, (m, _, _) in CONVNEXT.items()}
    ses = {k: s / math.sqrt(3) for k, (_, s, _) in CONVNEXT.items()}
    costs = {k: g for k, (_, _, g) in CONVNEXT.items()}
    picked, best, tolerance, _ = one_se_pick(scores, ses, costs, within_se)
    assert best == "k7"  # tied with k9 on the mean; the cheaper one is the best
    assert picked == expected
    assert tolerance == pytest.approx(within_se * 0.14 / math.sqrt(3))


def test_noninferiority_hand_worked_in_both_directions():
    # Baseline costs 10. "a" (cost 5) has lower bound −1.2 pp, "b" (cost 7) −0.4 pp, "c"
    # (cost 12) +0.2 pp. With a 1 pp margin only b qualifies among the cheaper ones: b.
    costs = {"base": 10, "a": 5, "b": 7, "c": 12}
    lower = {"a": -0.012, "b": -0.004, "c": 0.002}
    counts = {"base": 900, "a": 890, "b": 897, "c": 903}
    pick, qualifying, worth = noninferior_pick(costs, lower, counts, "base", 0.01)
    assert (pick, qualifying, worth) == ("b", ("b",), ("c",))
    # A wider margin lets the cheaper "a" in; a narrower one keeps the baseline.
    assert noninferior_pick(costs, lower, counts, "base", 0.015)[0] == "a"
    assert noninferior_pick(costs, lower, counts, "base", 0.003)[0] == "base"
    # "Above −margin" is strict: a bound of exactly −margin (3 images in 300) does not pass.
    assert noninferior_pick(costs, {"a": -0.01}, counts, "base", 0.01)[0] == "base"


def test_a_costlier_variant_is_never_recommended_for_being_as_good():
    costs = {"base": 10, "big": 30}
    pick, qualifying, worth = noninferior_pick(
        costs, {"big": 0.01}, {"base": 1, "big": 2}, "base", 0.01
    )
    assert pick == "base" and qualifying == () and worth == ("big",)


def test_ties_in_cost_go_to_more_correct_predictions_then_name():
    costs = {"base": 10, "x": 5, "y": 5}
    lower = {"x": -0.001, "y": -0.001}
    assert noninferior_pick(costs, lower, {"base": 9, "x": 7, "y": 8}, "base", 0.01)[0] == "y"
    assert noninferior_pick(costs, lower, {"base": 9, "x": 8, "y": 8}, "base", 0.01)[0] == "x"


def test_holm_matches_the_hand_worked_step_down():
    # Holm 1979: sort p ascending, multiply the i-th smallest by (m − i + 1), keep it monotone.
    # p = .01, .04, .03, .005 → .005·4 = .02, .01·3 = .03, .03·2 = .06, max(.04·1, .06) = .06.
    found = {
        n: Contrast(n, 0.0, 0.0, 0.0, 0.0, 0.0, p)
        for n, p in zip("abcd", (0.01, 0.04, 0.03, 0.005), strict=True)
    }
    adjusted = {n: c.p_holm for n, c in holm_adjust(found).items()}
    assert adjusted == pytest.approx({"a": 0.03, "b": 0.06, "c": 0.06, "d": 0.02})


def test_exact_mcnemar_matches_statsmodels_and_the_binomial():
    rng = np.random.default_rng(4)
    a = rng.random(300) < 0.95
    b = a.copy()
    b[:6] = ~b[:6]  # six images change, some each way
    n01 = int((a & ~b).sum())
    n10 = int((~a & b).sum())
    ref = mcnemar([[int((a & b).sum()), n01], [n10, int((~a & ~b).sum())]], exact=True).pvalue
    assert exact_mcnemar(a, b) == pytest.approx(ref)
    # The exact test is the two-sided binomial test of the discordant pairs (McNemar 1947).
    assert exact_mcnemar(a, b) == pytest.approx(stats.binomtest(n01, n01 + n10).pvalue)


def evidence_of(correct: dict[str, np.ndarray]) -> Evidence:
    names = tuple(correct)
    stack = np.stack([correct[n] for n in names])
    labels = np.zeros(stack.shape[2], dtype=int)
    return Evidence(names, tuple(range(stack.shape[1])), stack, np.where(stack, 0, 1), labels)


def test_identical_plans_are_not_given_zero_width():
    rng = np.random.default_rng(5)
    base = rng.random((3, 300)) < 0.97
    ev = evidence_of({"base": base, "cheap": base.copy()})
    d = decide(ev, {"base": 10, "cheap": 5}, "base", margin=0.01, n_resamples=500)
    c = d.contrasts["cheap"]
    assert c.n_discordant == 0
    assert c.lower_bound == pytest.approx(-(1 - 0.05 ** (1 / 300)))
    assert d.recommended == "cheap"  # −1.0 pp bound vs a 1 pp margin: just inside
    tight = decide(ev, {"base": 10, "cheap": 5}, "base", margin=0.005, n_resamples=500)
    assert tight.recommended == "base"


def test_a_plan_at_100_percent_keeps_an_interval():
    perfect = np.ones((3, 300), dtype=bool)
    ev = evidence_of({"base": perfect, "other": perfect.copy()})
    acc = decide(ev, {"base": 1, "other": 2}, "base", n_resamples=200).accuracy["base"]
    assert acc.high == 1.0 and 1 - acc.low > 0.009


def test_the_one_se_rule_keeps_a_tolerance_when_the_best_plan_scores_100_percent():
    # Every seed right on every image: the bootstrap's spread is zero, but the exact binomial
    # (Clopper & Pearson 1934) 95% interval of 300 images at 300/300 is [0.98777, 1], so the
    # SE it implies is (1 − 0.98777) / (2 · 1.95996) = 0.312 pp, not 0.
    perfect = np.ones((3, 300), dtype=bool)
    near = perfect.copy()
    near[:, :1] = False  # one image missed on every seed: 99.67%
    ev = evidence_of({"base": perfect, "cheap": near})
    d = decide(ev, {"base": 10, "cheap": 5}, "base", rule="one-se", within_se=1.0)
    assert d.accuracy["base"].se == 0
    assert d.tolerance == pytest.approx((1 - 0.025 ** (1 / 300)) / 3.91993, rel=1e-4)
    # cheap is 1/300 = 0.33 pp below: just outside one SE, inside two.
    assert d.recommended == "base" and d.qualifying == ("base",)
    # In a resample that leaves out the one missed image the two tie and the cheaper is
    # picked: a given image is left out of a bootstrap draw of n with probability
    # (1 − 1/n)ⁿ ≈ e⁻¹ (Efron & Tibshirani 1993, §6 — from memory), 0.367 at n = 300.
    assert d.pick_share["cheap"] == pytest.approx((1 - 1 / 300) ** 300, abs=0.03)
    assert d.pick_share["base"] + d.pick_share["cheap"] == pytest.approx(1.0)
    loose = decide(ev, {"base": 10, "cheap": 5}, "base", rule="one-se", within_se=2.0)
    assert loose.recommended == "cheap" and loose.qualifying == ("cheap", "base")
    # It stays within 0.62 pp while the missed image is drawn at most once: binomial
    # P(X ≤ 1) for X ~ Bin(300, 1/300) = (1 − 1/n)ⁿ + (1 − 1/n)ⁿ⁻¹ = 0.736.
    assert loose.pick_share["cheap"] == pytest.approx(
        (1 - 1 / 300) ** 300 + (1 - 1 / 300) ** 299, abs=0.03
    )


def test_decide_recommends_a_cheaper_equal_plan_and_reports_stability():
    rng = np.random.default_rng(6)
    base = rng.random((3, 1000)) < 0.95
    near = base.copy()
    for s in range(3):  # four images lost and four gained on every seed
        right, wrong = np.flatnonzero(base[s]), np.flatnonzero(~base[s])
        near[s, right[:4]] = False
        near[s, wrong[:4]] = True
    worse = base & (rng.random((3, 1000)) < 0.9)  # loses ~9.5 pp
    ev = evidence_of({"base": base, "near": near, "worse": worse})
    d = decide(ev, {"base": 10, "near": 6, "worse": 3}, "base", margin=0.01, n_resamples=1000)
    assert d.recommended == "near"
    assert d.qualifying == ("near",)
    assert d.contrasts["worse"].p_holm < 0.05
    assert d.stability > 0.9 and not d.unstable
    assert set(d.leave_one_out) == {0, 1, 2}


def test_point_picks_prefer_the_cheapest_within_the_margin():
    boot = np.array([[0.90, 0.895, 0.80], [0.90, 0.85, 0.899]])
    picks = point_picks(
        boot, ["base", "mid", "cheap"], {"base": 10, "mid": 6, "cheap": 3}, "base", 0.01
    )
    assert picks.tolist() == [1, 2]


def test_power_uses_the_normal_sample_size_formula():
    # NIST/SEMATECH e-Handbook §7.2.2.2: z₀.₉₅ + z₀.₈₀ = 1.6449 + 0.8416.
    assert z_sum() == pytest.approx(1.6449 + 0.8416, abs=1e-3)
    r = resolution_before(300, 0.05)
    assert r.smallest == pytest.approx(2.4865 * math.sqrt(0.05 / 300), rel=1e-3)
    assert r.images_for(r.smallest / 2) == 4 * 300


def test_the_plan_note_says_how_many_images_a_margin_needs():
    from kablate.analysis.power import plan_note

    # At 5% disagreement: 2.4865 · √(0.05/300) = 3.21 pp > 1 pp, so 300 · 3.21² ≈ 3,092
    # images are needed (d·z²/m²); at 1%: 1.44 pp → 0.01 · 2.4865² / 0.01² → 619 images.
    text = plan_note(300, 1.0, 3)
    assert "5% → 3.21 pp (the margin needs 3,092 images)" in text
    assert "1% → 1.44 pp (the margin needs 619 images)" in text
    assert "1% → 0.18 pp (enough for the margin)" in plan_note(20000, 1.0, 3)


def test_one_se_best_among_equal_scores_is_the_cheaper_whatever_its_name():
    # Equal scores: the cheaper "z-cheap" is the best, so with zero tolerance it is picked,
    # not "a-costly", which only comes first by name.
    scores, ses = {"a-costly": 0.9, "z-cheap": 0.9}, {"a-costly": 0.01, "z-cheap": 0.05}
    picked, best, tolerance, _ = one_se_pick(scores, ses, {"a-costly": 2, "z-cheap": 1}, 1.0)
    assert (picked, best) == ("z-cheap", "z-cheap") and tolerance == pytest.approx(0.05)
