"""Prepared data: the splits of a source cut fixed-seed, class-balanced and disjoint, the
normalisation from the training subset only, and the manifest that data.json records, checked
against scikit-learn's copy of the UCI digits and hashlib."""

from __future__ import annotations

import hashlib
import json

import numpy as np
import pytest
import torch
from sklearn.datasets import load_digits

from kablate.data import prepare_data
from kablate.spec.schema import DataSpec


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


def test_the_manifest_hashes_the_indices_and_lists_the_true_labels_of_the_scored_images():
    spec = DataSpec(source="digits", train_size=100, val_size=50, test_size=60, stop_size=20)
    data = prepare_data(spec)
    manifest = data.manifest()
    target = load_digits().target
    for name in ("train", "val", "test"):
        indices = np.asarray(manifest["indices"][name], dtype=np.int64)
        assert manifest["indices_sha1"][name] == hashlib.sha1(indices.tobytes()).hexdigest()[:12]
    for name in ("val", "test"):  # the evidence is scored against these
        assert manifest["labels"][name] == target[manifest["indices"][name]].tolist()
    stop = set(manifest["indices"]["stop"])
    assert len(stop) == manifest["sizes"]["stop"] == 20
    assert not stop & (set(manifest["indices"]["train"]) | set(manifest["indices"]["val"]))
