"""Confusion matrices and per-class accuracy pool every compared seed: checked against
counts made by hand, and against the definition of a confusion matrix (rows: true class,
columns: predicted, as ``sklearn.metrics.confusion_matrix`` documents it)."""

from __future__ import annotations

import numpy as np
import pytest

from kablate.analysis.classes import confusion, per_class_accuracy
from kablate.analysis.evidence import Evidence

LABELS = np.array([0, 0, 1, 1, 2])
PREDICTED = np.array(
    [
        [[0, 1, 1, 1, 2], [0, 0, 1, 2, 2]],  # "a", seeds 0 and 1
        [[2, 2, 2, 2, 2], [2, 2, 2, 2, 2]],  # "b": always class 2
    ]
)


def evidence() -> Evidence:
    return Evidence(("a", "b"), (0, 1), PREDICTED == LABELS, PREDICTED, LABELS)


def test_a_cell_counts_seed_image_pairs_of_that_true_and_predicted_class():
    m = confusion(evidence(), "a")
    # true 0: predicted 0, 1 (seed 0) and 0, 0 (seed 1); true 1: 1, 1 and 1, 2; true 2: 2, 2
    assert m.tolist() == [[3, 1, 0], [0, 3, 1], [0, 0, 2]]
    reference = np.zeros((3, 3), dtype=int)
    np.add.at(reference, (np.tile(LABELS, 2), PREDICTED[0].ravel()), 1)
    assert (m == reference).all()
    assert m.sum(axis=1).tolist() == [4, 4, 2]  # seeds × images of each class


def test_per_class_accuracy_is_the_diagonal_over_the_row_sum():
    table = per_class_accuracy(evidence(), ["a", "b"], ("zero", "one", "two"))
    assert table["class"].tolist() == ["zero", "one", "two"]
    assert table["n_images"].tolist() == [2, 2, 1]
    assert table["a"].tolist() == pytest.approx([0.75, 0.75, 1.0])
    assert table["b"].tolist() == pytest.approx([0.0, 0.0, 1.0])


def test_a_class_with_no_scored_image_has_no_accuracy():
    table = per_class_accuracy(evidence(), ["a"], ("zero", "one", "two", "three"))
    assert table["n_images"].tolist() == [2, 2, 1, 0]
    assert np.isnan(table["a"].iloc[3])
