"""Splits: fixed-seed, class-balanced, disjoint, stratified."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.datasets import load_digits

from kablate.data.splits import balanced_subset, stratified_split
from kablate.errors import DataError


@pytest.fixture(scope="module")
def digits_labels() -> np.ndarray:
    return load_digits().target


def test_stratified_split_holds_out_the_fraction_of_every_class(digits_labels):
    rest, held = stratified_split(digits_labels, 0.25, seed=0)
    assert len(np.intersect1d(rest, held)) == 0
    assert len(rest) + len(held) == len(digits_labels)
    # Stratified: each class keeps its share of the pool in the held-out part, up to rounding
    # (the definition, as in scikit-learn's StratifiedShuffleSplit).
    for cls, n in zip(*np.unique(digits_labels, return_counts=True), strict=True):
        assert abs(int((digits_labels[held] == cls).sum()) - 0.25 * n) <= 0.5
    again = stratified_split(digits_labels, 0.25, seed=0)
    assert np.array_equal(held, again[1])  # fixed seed, fixed split
    assert not np.array_equal(held, stratified_split(digits_labels, 0.25, seed=1)[1])


def test_balanced_subset_is_as_equal_as_the_classes_allow(digits_labels):
    pool = np.arange(len(digits_labels))
    taken, left = balanced_subset(digits_labels, pool, 205, seed=3, what="train_size")
    counts = np.bincount(digits_labels[taken], minlength=10)
    assert counts.sum() == 205 and counts.max() - counts.min() <= 1
    assert len(np.intersect1d(taken, left)) == 0 and len(taken) + len(left) == len(pool)
    # A class with too few images gives its share to the others.
    few = np.concatenate([np.flatnonzero(digits_labels == 0)[:5], np.flatnonzero(digits_labels)])
    taken, _ = balanced_subset(digits_labels, few, 100, seed=0, what="train_size")
    counts = np.bincount(digits_labels[taken], minlength=10)
    assert counts[0] == 5 and counts.sum() == 100 and counts[1:].max() - counts[1:].min() <= 1


def test_balanced_subset_refuses_more_than_there_is(digits_labels):
    with pytest.raises(DataError, match=r"`data.val_size` asks for 2000 images but only 1797"):
        balanced_subset(digits_labels, np.arange(1797), 2000, seed=0, what="val_size")
