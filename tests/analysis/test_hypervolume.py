"""Hypervolume of (accuracy ↑, cost ↓) points against a hand-worked case and Optuna's own."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

# Optuna 5.0.0's hypervolume (WFG for 3+ objectives, an exact sweep for 2), for minimised
# objectives: optuna/_hypervolume/wfg.py, compute_hypervolume(loss_vals, reference_point).
# Private in name, but it is what optuna.visualization.plot_hypervolume_history calls.
from optuna._hypervolume import compute_hypervolume

from kablate.analysis.hypervolume import (
    Reference,
    hypervolume,
    hypervolume_history,
    reference_point,
)


def test_hand_worked_case():
    # Reference (accuracy 0, cost 10). Points (0.5, 2), (0.8, 6) and the dominated (0.6, 8).
    # By hand: cost 2..6 is covered up to accuracy 0.5 → 4 × 0.5 = 2.0; cost 6..10 up to
    # 0.8 → 4 × 0.8 = 3.2; (0.6, 8) lies inside (0.8, 6)'s box. Total 5.2.
    ref = Reference(0.0, 10.0)
    assert hypervolume([0.5, 0.8, 0.6], [2, 6, 8], ref) == pytest.approx(5.2)


def test_points_beyond_the_reference_add_nothing():
    # By hand: (0.9, 12) costs more than the reference; (-0.1, 1) is below its accuracy.
    ref = Reference(0.0, 10.0)
    assert hypervolume([0.9, -0.1, 0.5], [12, 1, 2], ref) == pytest.approx(0.5 * 8)
    assert hypervolume([], [], ref) == 0.0


def test_reference_point_is_accuracy_zero_and_the_largest_cost():
    ref = reference_point([3.0, 7.5, 1.0])
    assert (ref.accuracy, ref.cost) == (0.0, 7.5)
    assert ref.box() == pytest.approx(7.5)  # the ideal point (1, 0) dominates the whole box


points = st.lists(st.tuples(st.floats(0.0, 1.0), st.floats(0.0, 100.0)), min_size=1, max_size=25)


@settings(max_examples=200, deadline=None)
@given(points, st.floats(-0.5, 0.5), st.floats(1.0, 120.0))
def test_agrees_with_optunas_hypervolume(pairs, acc_ref, cost_ref):
    accuracy = [a for a, _ in pairs]
    cost = [c for _, c in pairs]
    ours = hypervolume(accuracy, cost, Reference(acc_ref, cost_ref))
    # Optuna minimises: accuracy becomes -accuracy; points that do not beat the reference
    # are left out (Optuna refuses them rather than clipping).
    losses = np.array([[-a, c] for a, c in pairs if a > acc_ref and c < cost_ref])
    theirs = compute_hypervolume(losses, np.array([-acc_ref, cost_ref])) if len(losses) else 0.0
    assert ours == pytest.approx(theirs, rel=1e-9, abs=1e-12)


def test_history_grows_and_ends_at_the_whole_set():
    accuracy, cost = [0.5, 0.4, 0.8, 0.6], [2.0, 1.0, 6.0, 8.0]
    ref = Reference(0.0, 10.0)
    history = hypervolume_history(accuracy, cost, ref)
    # By hand: 0.5 × 8 = 4.0; then (0.4, 1) adds 1 × 0.4 = 0.4; then (0.8, 6) adds
    # 4 × 0.3 = 1.2; (0.6, 8) is dominated.
    assert history == pytest.approx([4.0, 4.4, 5.6, 5.6])
