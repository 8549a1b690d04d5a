"""The paired two-level bootstrap, checked against scipy.stats.bootstrap and exact intervals."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from kablate.analysis.bootstrap import (
    exact_binomial_interval,
    percentile_interval,
    resample_accuracies,
    zero_discordance_bound,
)


def correctness(rng, n_variants, n_seeds, n_images, p):
    return rng.random((n_variants, n_seeds, n_images)) < p


def test_one_seed_agrees_with_scipy_bootstrap_of_a_mean():
    # With one seed the two-level bootstrap is the ordinary bootstrap of the mean over images;
    # scipy.stats.bootstrap (percentile method) is the reference.
    rng = np.random.default_rng(0)
    correct = correctness(rng, 1, 1, 300, 0.9)
    ours = resample_accuracies(correct, n_resamples=20000)[:, 0]
    ref = stats.bootstrap(
        (correct[0, 0].astype(float),),
        np.mean,
        n_resamples=20000,
        method="percentile",
        random_state=1,
    )
    assert ours.std() == pytest.approx(ref.standard_error, rel=0.05)
    low, high = percentile_interval(ours)
    assert low == pytest.approx(ref.confidence_interval.low, abs=0.006)
    assert high == pytest.approx(ref.confidence_interval.high, abs=0.006)


def test_resamples_pair_the_variants_on_seeds_and_images():
    # Two identical variants: every resample gives them the same accuracy (the same draw).
    rng = np.random.default_rng(1)
    one = correctness(rng, 1, 3, 200, 0.8)
    boot = resample_accuracies(np.concatenate([one, one]), n_resamples=500)
    np.testing.assert_array_equal(boot[:, 0], boot[:, 1])
    assert boot[:, 0].std() > 0


def test_the_seed_level_adds_the_seed_spread():
    # Seeds that differ a lot: the two-level spread exceeds the images-only spread of one seed.
    rng = np.random.default_rng(2)
    correct = np.stack([rng.random((3, 400)) < p for p in (0.6,)])
    correct[0, 1] = rng.random(400) < 0.9
    correct[0, 2] = rng.random(400) < 0.75
    two_level = resample_accuracies(correct, n_resamples=4000)[:, 0].std()
    images_only = resample_accuracies(correct[:, :1], n_resamples=4000)[:, 0].std()
    assert two_level > 2 * images_only


def test_deterministic_and_inside_unit_interval():
    rng = np.random.default_rng(3)
    correct = correctness(rng, 4, 2, 100, 0.97)
    a = resample_accuracies(correct, n_resamples=1000)
    b = resample_accuracies(correct, n_resamples=1000)
    np.testing.assert_array_equal(a, b)
    assert a.min() >= 0 and a.max() <= 1


def test_exact_interval_at_100_percent_is_the_rule_of_three():
    # Clopper–Pearson at k = n: the lower limit is (α/2)^(1/n); for n = 300 about 1 − 3.7/300,
    # close to the rule of three's 1 − 3/n (Hanley & Lippman-Hand 1983).
    low, high = exact_binomial_interval(300, 300)
    assert high == 1.0
    assert low == pytest.approx(0.025 ** (1 / 300), rel=1e-9)
    assert 1 - low == pytest.approx(3 / 300, abs=0.003)


def test_zero_discordance_bound_is_about_three_over_n():
    # One-sided 95% exact bound after 0 of n: 1 − 0.05^(1/n) ≈ 3/n (the rule of three).
    assert zero_discordance_bound(300) == pytest.approx(1 - 0.05 ** (1 / 300))
    assert zero_discordance_bound(300) == pytest.approx(3 / 300, rel=0.01)


def test_per_class_accuracy_is_the_confusion_diagonal():
    from kablate.analysis.classes import confusion, per_class_accuracy
    from kablate.analysis.evidence import Evidence

    labels = np.array([0, 0, 1, 1, 2, 2])
    predicted = np.array([[[0, 1, 1, 1, 2, 0]], [[0, 0, 1, 2, 2, 2]]])  # (V=2, S=1, I=6)
    ev = Evidence(("a", "b"), (0,), predicted == labels, predicted, labels)
    # Hand-worked: a gets class 0 half right, class 1 all, class 2 half; b: 1, ½, 1.
    np.testing.assert_array_equal(confusion(ev, "a"), [[1, 1, 0], [0, 2, 0], [1, 0, 1]])
    table = per_class_accuracy(ev, ["a", "b"], ("zero", "one", "two"))
    assert table["a"].tolist() == [0.5, 1.0, 0.5]
    assert table["b"].tolist() == [1.0, 0.5, 1.0]
    assert table["n_images"].tolist() == [2, 2, 2]
