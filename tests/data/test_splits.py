"""Splits: fixed-seed, class-balanced, disjoint, stratified; statistics from train only."""

from __future__ import annotations

import json

import numpy as np
import pytest
import torch
from sklearn.datasets import load_digits

from kablate.data import prepare_data
from kablate.data.splits import balanced_subset, stratified_split
from kablate.errors import DataError
from kablate.spec.schema import DataSpec


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


def test_prepared_digits_splits_are_disjoint_balanced_and_reproducible():
    spec = DataSpec(source="digits", train_size=500, val_size=200, test_fraction=0.25)
    data = prepare_data(spec)
    train, val, test = (set(s.indices.tolist()) for s in (data.train, data.val, data.test))
    assert not (train & val or train & test or val & test)  # the same pool: must not overlap
    assert (len(train), len(val)) == (500, 200)
    assert np.bincount(data.val.labels.numpy()).tolist() == [20] * 10
    assert np.bincount(data.train.labels.numpy()).tolist() == [50] * 10
    again = prepare_data(spec)
    for a, b in zip(
        (data.train, data.val, data.test), (again.train, again.val, again.test), strict=True
    ):
        assert np.array_equal(a.indices, b.indices)
    other = prepare_data(DataSpec(source="digits", train_size=500, val_size=200, split_seed=1))
    assert not np.array_equal(data.train.indices, other.train.indices)


def test_normalisation_statistics_come_from_the_training_subset_only():
    data = prepare_data(DataSpec(source="digits", train_size=50, val_size=200))
    raw = load_digits().images.astype(np.float64) / 16.0
    # numpy's mean and sample standard deviation (ddof=1, as torch.std) of the train subset.
    train_raw = raw[data.train.indices]
    assert data.mean[0] == pytest.approx(train_raw.mean(), rel=1e-6)
    assert data.std[0] == pytest.approx(train_raw.std(ddof=1), rel=1e-6)
    assert abs(data.mean[0] - raw[data.val.indices].mean()) > 1e-3  # not validation's
    assert float(data.train.images.mean()) == pytest.approx(0.0, abs=1e-5)
    val_expected = (raw[data.val.indices] - data.mean[0]) / data.std[0]
    np.testing.assert_allclose(data.val.images[:, 0].numpy(), val_expected, atol=1e-5)


def test_the_manifest_records_every_index_and_serialises():
    data = prepare_data(DataSpec(source="digits", train_size=100, val_size=50, test_size=60))
    manifest = json.loads(json.dumps(data.manifest()))
    assert manifest["sizes"] == {"train": 100, "val": 50, "test": 60}
    assert manifest["indices"]["train"] == data.train.indices.tolist()
    assert manifest["indices"]["test"] == data.test.indices.tolist()
    assert manifest["in_shape"] == [1, 8, 8] and manifest["n_classes"] == 10
    assert manifest["indices_sha1"] == prepare_data(data.spec).manifest()["indices_sha1"]


def test_splits_are_channels_last_float32():
    data = prepare_data(DataSpec(source="digits", val_size=50))
    for split in (data.train, data.val, data.test):
        assert split.images.dtype.is_floating_point and split.images.dtype.itemsize == 4
        assert split.images.is_contiguous(memory_format=torch.channels_last)
