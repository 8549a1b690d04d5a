"""Warnings that travel with a variant: still learning, at chance level, diverged."""

from __future__ import annotations

import pandas as pd
import pytest
from scipy import stats

from kablate.analysis.flags import at_chance, still_learning, variant_flags


def curve(losses, accs):
    return pd.DataFrame({"epoch": range(len(losses)), "train_loss": losses, "val_acc": accs})


def test_a_loss_still_falling_well_above_the_floor_is_still_learning():
    flat_acc = [0.5, 0.6, 0.7, 0.7, 0.7, 0.7]
    assert still_learning(curve([2.0, 1.5, 1.2, 1.0, 0.8, 0.6], flat_acc))
    # The same relative drop near zero is noise: the network already fits its images.
    assert not still_learning(curve([0.02, 0.01, 0.009, 0.006, 0.005, 0.004], flat_acc))
    # A plateau is not.
    plateau = [1.0, 0.6, 0.45, 0.41, 0.40, 0.40, 0.41, 0.40, 0.40]
    assert not still_learning(curve(plateau, [0.5, 0.6, 0.7] + [0.7] * 6))


def test_best_accuracy_only_at_the_last_epoch_is_still_learning():
    losses = [0.5] * 6
    assert still_learning(curve(losses, [0.5, 0.6, 0.7, 0.7, 0.7, 0.71]))
    assert not still_learning(curve(losses, [0.5, 0.6, 0.7, 0.71, 0.7, 0.71]))  # a tie is earlier


def test_chance_level_uses_the_exact_binomial_test():
    # 10 classes, 100 images: 14 correct is p ≈ 0.08 > 0.05 against 1/10 (scipy.stats.binomtest,
    # one-sided); 17 correct is p ≈ 0.02.
    assert stats.binomtest(14, 100, 0.1, alternative="greater").pvalue > 0.05
    assert at_chance(14 * 3, 100, 3, 10)
    assert not at_chance(17 * 3, 100, 3, 10)


def test_variant_flags_name_each_warning():
    trials = pd.DataFrame(
        {"variant": ["a", "a", "b"], "seed": [0, 1, 0], "status": ["done", "diverged", "done"]}
    )
    rising = curve([2.0, 1.5, 1.2, 1.0, 0.8, 0.6], [0.5] * 6)
    curves = pd.concat(
        [
            rising.assign(variant="a", seed=0),
            curve([0.1] * 6, [0.9] * 6).assign(variant="b", seed=0),
        ]
    )
    flags = variant_flags(trials, curves, {"a": 12, "b": 95}, 100, 1, 10)
    assert flags["a"][0] == "diverged in 1 of 2 seeds"
    assert "at chance level (1 in 10)" in flags["a"]
    assert any(f.startswith("still learning") for f in flags["a"])
    assert flags["b"] == []


@pytest.mark.parametrize("n_seeds", [1, 3])
def test_chance_uses_one_seeds_worth_of_images(n_seeds):
    assert not at_chance(90 * n_seeds, 100, n_seeds, 10)
